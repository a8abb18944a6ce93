"""Run directories carry a format version; a newer one is refused with one line."""

import pytest

from hopwell.errors import InputError
from hopwell.sampling.run import FORMAT_VERSION, load_sampler
from hopwell.sampling.store import RunStore


def test_a_newer_run_format_is_refused(tmp_path):
    RunStore.create(tmp_path / "run", {"format": FORMAT_VERSION + 1, "input": "CCCC"}, {})
    with pytest.raises(InputError, match=f"format {FORMAT_VERSION + 1}; this hopwell reads formats 1-"):
        load_sampler(tmp_path / "run")
