"""Flow acceptance over time in the report: the plot, and its numbers against the raw chunks."""

from __future__ import annotations

import base64
import io
import json
import re

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from hopwell.analysis.production import (
    ACCEPTANCE_WINDOWS,
    CycleCounts,
    acceptance_over_time,
)
from hopwell.cli import main
from hopwell.sampling.store import MOVE_FLOW, RunStore

WALKERS = 3
TRAINING_CYCLES = 10
PROPOSALS = 4


@pytest.fixture(scope="module")
def reported_run(tmp_path_factory):
    """A short butane run (three walkers) and its report."""
    run_dir = tmp_path_factory.mktemp("acceptance") / "run"
    result = CliRunner().invoke(main, ["run", "CCCC", "-o", str(run_dir), "--samples", "180", "--walkers", str(WALKERS),
                                       "--training-cycles", str(TRAINING_CYCLES), "--langevin-steps", "50",
                                       "--proposals", str(PROPOSALS), "--seeds", str(WALKERS), "--seed", "3"])
    assert result.exit_code == 0, result.output
    result = CliRunner().invoke(main, ["report", str(run_dir)])
    assert result.exit_code == 0, result.output
    return run_dir


def _chunk_records(run_dir):
    """Flow-move states (cycle, accepted, production) and proposals (cycle, accepted), concatenated."""
    chunks = list(RunStore.open(run_dir).iter_chunks())
    flow = [c["state_move"] == MOVE_FLOW for c in chunks]
    states = {k: np.concatenate([c[f"state_{k}"][f] for c, f in zip(chunks, flow)])
              for k in ("cycle", "accepted", "production")}
    proposals = {k: np.concatenate([c[f"proposal_{k}"] for c in chunks if "proposal_cycle" in c])
                 for k in ("cycle", "accepted")}
    return states, proposals


def test_report_has_the_acceptance_plot(reported_run):
    html = (reported_run / "report.html").read_text()
    found = re.search(r'id="acceptance-plot" alt="[^"]*" src="data:image/png;base64,([^"]+)"', html)
    assert found is not None
    # A decodable PNG with real content (Pillow as the reference decoder).
    pixels = np.asarray(Image.open(io.BytesIO(base64.b64decode(found.group(1)))).convert("L"))
    assert pixels.shape[0] > 100 and pixels.std() > 10


def test_acceptance_numbers_equal_a_direct_count(reported_run):
    windows = json.loads((reported_run / "summary.json").read_text())["acceptance_over_time"]
    states, proposals = _chunk_records(reported_run)
    n_cycles = int(states["cycle"].max()) + 1
    # The windows tile the run's cycles in order, and about ACCEPTANCE_WINDOWS of them.
    assert [w["cycle_start"] for w in windows] == [0] + [w["cycle_end"] for w in windows[:-1]]
    assert windows[-1]["cycle_end"] == n_cycles
    assert len(windows) <= ACCEPTANCE_WINDOWS + 1
    for w in windows:
        in_states = (states["cycle"] >= w["cycle_start"]) & (states["cycle"] < w["cycle_end"])
        in_proposals = (proposals["cycle"] >= w["cycle_start"]) & (proposals["cycle"] < w["cycle_end"])
        production = states["production"][in_states].astype(bool)
        assert production.all() or not production.any()  # no window straddles the end of training
        assert w["phase"] == ("production" if production.all() else "training")
        assert w["flow_blocks"] == int(in_states.sum())
        assert w["flow_block_acceptance"] == int(states["accepted"][in_states].sum()) / int(in_states.sum())
        assert w["flow_proposals"] == int(in_proposals.sum())
        if in_proposals.any():
            assert w["flow_proposal_acceptance"] == (int(proposals["accepted"][in_proposals].sum())
                                                     / int(in_proposals.sum()))
        else:
            assert w["flow_proposal_acceptance"] is None
    # The sampler's own checkpoint agrees: where training ended, and its production counters.
    state = RunStore.open(reported_run).read_state()
    assert [w["cycle_start"] for w in windows if w["phase"] == "production"][0] == int(state["training_end_cycle"])
    assert int(state["training_end_cycle"]) == TRAINING_CYCLES
    counters = json.loads(str(state["stats"]))["production"]
    production = [w for w in windows if w["phase"] == "production"]
    assert sum(w["flow_proposals"] for w in production) == counters["proposed"]
    assert sum(round(w["flow_proposal_acceptance"] * w["flow_proposals"]) for w in production) == counters["accepted"]
    training = [w for w in windows if w["phase"] == "training"]
    assert sum(w["flow_blocks"] for w in training) == TRAINING_CYCLES * WALKERS
    assert all(w["flow_proposal_acceptance"] is None for w in training)


def test_windows_split_at_the_end_of_training():
    """Seven cycles, training 0-2: widths of ceil(7 / 3) cycles, restarted at the boundary."""
    counts = CycleCounts(blocks=np.full(7, 2), blocks_accepted=np.array([0, 1, 2, 1, 1, 0, 2]),
                         proposals=np.array([0, 0, 0, 8, 8, 8, 8]),
                         proposals_accepted=np.array([0, 0, 0, 1, 2, 3, 4]),
                         production=np.arange(7) >= 3)
    windows = acceptance_over_time(counts, n_windows=3)
    assert [(w["cycle_start"], w["cycle_end"], w["phase"]) for w in windows] == [
        (0, 3, "training"), (3, 6, "production"), (6, 7, "production")]
    assert [w["flow_block_acceptance"] for w in windows] == [3 / 6, 2 / 6, 2 / 2]
    assert [w["flow_proposal_acceptance"] for w in windows] == [None, 6 / 24, 4 / 8]
