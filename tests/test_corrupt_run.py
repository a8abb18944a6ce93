"""Damaged run directories: each damage is recovered from with a logged line, or stops in one line.

The contract (:mod:`hopwell.sampling.recovery`, :mod:`hopwell.sampling.checkpoint`,
:mod:`hopwell.sampling.run_config`): a damaged chunk is skipped and named by ``report`` and named
by ``resume``, which samples on; a damaged checkpoint (or the flow file it names) falls back to
the previous checkpoint, dropping and redoing the chunks written after it; a run.toml that is not
TOML, has an unknown key or a mistyped value, or comes from a newer format stops every command
with one line (exit 2) and changes nothing; a small molecule's missing topology is rebuilt.
Nothing read from a run directory can run code: a pickle that would create a marker file is
refused unread wherever it is planted.

Each test damages a copy of one short n-butane run (:mod:`run_checks`), whose newest
checkpoint is at cycle 45 (chunks 0-4) and whose previous one at cycle 40 (chunks 0-3).
"""

from __future__ import annotations

import io
import json
import os
import shutil

import mdtraj as md
import numpy as np
import pytest
import torch

from run_checks import (
    FINAL_CYCLE,
    check_records,
    copy_run,
    files,
    hopwell,
    log_text,
    make_run,
    one_line_error,
    production_records,
    state,
    warnings_of,
)

CHUNK = 2  # the damaged chunk: cycles 20-29, all production
CHUNK_CYCLES = range(20, 30)


@pytest.fixture(scope="module")
def butane(tmp_path_factory):
    """The finished run (read-only for the tests: they damage copies)."""
    return make_run(tmp_path_factory.mktemp("butane") / "run")


@pytest.fixture
def run_dir(butane, tmp_path):
    return copy_run(butane, tmp_path / "run")


def _damage(path, how: str) -> None:
    """Overwrite ``path`` with what a fault could leave there."""
    data = path.read_bytes()
    path.write_bytes({"half": data[: len(data) // 2], "empty": b"", "zeros": bytes(len(data)),
                      "random": np.random.default_rng(5).bytes(len(data))}[how])


def _unchanged(before: dict, after: dict) -> bool:
    """Whether two :func:`files` listings agree (the lock file holds a pid and may be rewritten)."""
    return {k: v for k, v in before.items() if k != "run.lock"} == {k: v for k, v in after.items() if k != "run.lock"}


# -- chunks ---------------------------------------------------------------------------------
@pytest.mark.parametrize("how", ["half", "empty", "zeros"])
def test_a_damaged_chunk_is_skipped_by_report_and_named_by_resume(run_dir, how):
    chunk = run_dir / "chunks" / f"{CHUNK:06d}.npz"
    _damage(chunk, how)
    damaged_bytes = chunk.read_bytes()

    result = hopwell("report", run_dir, "--json")
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert f"chunks/{CHUNK:06d}.npz is damaged" in warning and "skipped" in warning
    summary = json.loads(result.stdout)
    assert summary["samples"] == production_records(run_dir, skip=(CHUNK,)) == 140 - 4 * len(CHUNK_CYCLES)
    assert summary["damage"] == [warning.removeprefix("hopwell: warning: ")]

    result = hopwell("resume", run_dir, "--samples", 200)
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert f"chunks/{CHUNK:06d}.npz is damaged" in warning and "its records are lost" in warning
    assert f"resume: {warning.removeprefix('hopwell: warning: ')}" in log_text(run_dir)
    assert chunk.read_bytes() == damaged_bytes, "resume must not delete or rewrite a damaged chunk"
    after = check_records(run_dir, lost_chunks=(CHUNK,), lost_cycles=CHUNK_CYCLES)
    assert after["cycle"] == 60 and after["production_samples"] == 200
    assert after["production_records"] == 200 - 4 * len(CHUNK_CYCLES)


def test_reweighting_skips_the_damaged_chunk_as_the_report_does(run_dir):
    _damage(run_dir / "chunks" / f"{CHUNK:06d}.npz", "half")
    # Sampled on past the damage, so that reweighting has the effective samples it asks for.
    assert hopwell("resume", run_dir, "--samples", 1200).exit_code == 0
    # MMFF94s differs from MMFF94 only at conjugated nitrogens (Halgren 1999), so for n-butane
    # the weights are all equal: the re-read energies must line up one to one with the samples
    # the report read (a misaligned or longer list stops the report).
    result = hopwell("report", run_dir, "--json", "--reweight-forcefield", "mmff94s")
    assert result.exit_code == 0, result.stderr
    summary = json.loads(result.stdout)
    assert summary["samples"] == 1200 - 4 * len(CHUNK_CYCLES)
    assert summary["reweighted"]["effective_samples"] == pytest.approx(summary["effective_samples"])


# -- checkpoints ----------------------------------------------------------------------------
@pytest.mark.parametrize("how", ["half", "empty", "zeros", "random"])
def test_a_damaged_checkpoint_falls_back_to_the_previous_one(run_dir, how):
    _damage(run_dir / "state.npz", how)

    result = hopwell("status", run_dir, "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    assert info["cycle"] == 40 and info["checkpoint"] == "state.previous.npz"
    (warning,) = warnings_of(result)
    assert "state.npz is damaged" in warning

    result = hopwell("resume", run_dir)  # with the run's own budget
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert "state.npz is damaged" in warning
    assert "continuing from the previous checkpoint (cycle 40); dropped chunk 000004" in warning
    assert f"resume: {warning.removeprefix('hopwell: warning: ')}" in log_text(run_dir)
    after = check_records(run_dir)
    assert after["cycle"] == FINAL_CYCLE and after["production_samples"] == 140
    assert int(state(run_dir, "state.previous.npz")["cycle"]) == 40  # a good fallback again


def test_a_damaged_flow_file_falls_back_to_the_previous_checkpoint(run_dir):
    _damage(run_dir / "flow-000045.pt", "half")
    result = hopwell("resume", run_dir)
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert "state.npz is damaged (its flow file flow-000045.pt is" in warning
    assert check_records(run_dir)["cycle"] == FINAL_CYCLE


def test_no_good_checkpoint_stops_resume_in_one_line_and_report_still_reads(run_dir):
    _damage(run_dir / "state.npz", "random")
    _damage(run_dir / "state.previous.npz", "half")
    before = files(run_dir)
    for command in ("resume", "status"):
        message = one_line_error(hopwell(command, run_dir))
        assert "state.npz is damaged" in message and "state.previous.npz is damaged" in message
        assert "no good checkpoint is left" in message and f"hopwell report {run_dir}" in message
    assert _unchanged(before, files(run_dir))

    result = hopwell("report", run_dir, "--json")
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert "the report has no move counters from a checkpoint" in warning
    assert json.loads(result.stdout)["samples"] == 140


def test_a_missing_checkpoint_beside_chunks_is_refused_with_a_fix_that_works(run_dir):
    (run_dir / "state.npz").unlink()
    before = files(run_dir)
    message = one_line_error(hopwell("resume", run_dir))
    assert "no checkpoint (state.npz)" in message and "copy state.previous.npz to state.npz" in message
    assert _unchanged(before, files(run_dir))

    shutil.copy(run_dir / "state.previous.npz", run_dir / "state.npz")  # the fix the line names
    result = hopwell("resume", run_dir)
    assert result.exit_code == 0, result.stderr
    assert check_records(run_dir)["cycle"] == FINAL_CYCLE


# -- run.toml -------------------------------------------------------------------------------
TOML_DAMAGE = {
    "a string for a number": (("walkers = 2", 'walkers = "two"'), "walkers must be an integer, not 'two'"),
    "a string in a table": (("temperature_K = 300.0", 'temperature_K = "hot"'),
                            "sampler.temperature_K must be a number, not 'hot'"),
    "an unknown key": (("\nseed = 11\n", "\nseed = 11\nbogus_setting = 3\n"), "unknown key 'sampler.bogus_setting'"),
    "a syntax error": ((None, "this is = = broken\n"), "not valid TOML"),
    "a newer format": (("format = 2", "format = 3"), "run directory format 3; this hopwell reads formats 1-2"),
}


@pytest.mark.parametrize("case", TOML_DAMAGE)
def test_a_damaged_run_toml_stops_every_command_in_one_line(run_dir, case):
    (old, new), expected = TOML_DAMAGE[case]
    text = (run_dir / "run.toml").read_text()
    assert old is None or old in text
    (run_dir / "run.toml").write_text(text + new if old is None else text.replace(old, new, 1))
    before = files(run_dir)
    for command in ("resume", "report", "status"):
        message = one_line_error(hopwell(command, run_dir))
        assert f"{run_dir / 'run.toml'}:" in message and expected in message, (command, message)
    assert _unchanged(before, files(run_dir))


# -- other files ----------------------------------------------------------------------------
def test_a_missing_topology_of_a_small_molecule_is_rebuilt(run_dir, butane):
    (run_dir / "topology.pdb").unlink()
    result = hopwell("report", run_dir)
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert "topology.pdb was missing; rebuilt from molecule.sdf" in warning
    assert "rebuilt from molecule.sdf" in log_text(run_dir)
    rebuilt, original = md.load(str(run_dir / "topology.pdb")), md.load(str(butane / "topology.pdb"))
    assert [(a.name, a.element.symbol, a.residue.name) for a in rebuilt.topology.atoms] == \
        [(a.name, a.element.symbol, a.residue.name) for a in original.topology.atoms]
    assert sorted((b[0].index, b[1].index) for b in rebuilt.topology.bonds) == \
        sorted((b[0].index, b[1].index) for b in original.topology.bonds)
    np.testing.assert_allclose(rebuilt.xyz, original.xyz, atol=2e-4)  # PDB keeps 0.001 Angstrom


def test_a_missing_peptide_topology_is_one_line(run_dir):
    (run_dir / "topology.pdb").unlink()
    text = (run_dir / "run.toml").read_text()
    (run_dir / "run.toml").write_text(text.replace('kind = "small"', 'kind = "peptide"'))
    message = one_line_error(hopwell("report", run_dir))
    assert "topology.pdb is missing; a peptide's topology comes from its input PDB" in message
    assert not (run_dir / "topology.pdb").exists()


def test_a_missing_molecule_is_one_line(run_dir):
    (run_dir / "molecule.sdf").unlink()
    before = files(run_dir)
    for command in ("resume", "report"):
        message = one_line_error(hopwell(command, run_dir))
        assert f"{run_dir / 'molecule.sdf'} is missing" in message and "restore it from a backup" in message
    assert _unchanged(before, files(run_dir))


# -- nothing in a run directory runs code ---------------------------------------------------
class _Payload:
    """Unpickled unsafely, this runs ``touch MARKER`` (pickle calls ``os.system`` to rebuild it)."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return os.system, (f"touch {self.marker}",)


def _bomb(marker) -> bytes:
    buffer = io.BytesIO()
    torch.save({"flow": _Payload(marker), "optimizer": {}}, buffer)
    return buffer.getvalue()


def test_a_pickle_bomb_flow_file_is_refused_unread(run_dir, tmp_path):
    marker = tmp_path / "marker"
    for flow in run_dir.glob("flow-*.pt"):
        flow.write_bytes(_bomb(marker))
    before = files(run_dir)
    for command in ("resume", "status"):
        message = one_line_error(hopwell(command, run_dir))
        assert "not plain tensors: refused unread" in message
    assert _unchanged(before, files(run_dir))
    result = hopwell("report", run_dir)
    assert result.exit_code == 0, result.stderr
    assert not marker.exists(), "a pickle in a flow file was run"

    # The bomb is real: an unsafe load would have run it.
    torch.load(next(run_dir.glob("flow-*.pt")), weights_only=False)
    assert marker.exists()


def test_a_pickle_bomb_in_the_newest_flow_file_falls_back(run_dir, tmp_path):
    marker = tmp_path / "marker"
    (run_dir / "flow-000045.pt").write_bytes(_bomb(marker))
    result = hopwell("resume", run_dir)
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert "flow-000045.pt is not plain tensors: refused unread" in warning
    assert not marker.exists()
    assert check_records(run_dir)["cycle"] == FINAL_CYCLE


@pytest.mark.parametrize("target", ["state.npz", f"chunks/{CHUNK:06d}.npz"])
def test_pickled_objects_in_arrays_are_refused_unread(run_dir, tmp_path, target):
    marker = tmp_path / "marker"
    buffer = io.BytesIO()
    np.savez(buffer, cycle=np.array([_Payload(marker)], dtype=object))
    (run_dir / target).write_bytes(buffer.getvalue())
    command = "resume" if target == "state.npz" else "report"
    result = hopwell(command, run_dir)
    assert result.exit_code == 0, result.stderr
    (warning,) = warnings_of(result)
    assert f"{target} is damaged (not plain arrays" in warning
    assert not marker.exists()
    with np.load(io.BytesIO(buffer.getvalue()), allow_pickle=True) as data:
        _ = data["cycle"]  # the bomb is real: loading with pickles allowed runs it
    assert marker.exists()
