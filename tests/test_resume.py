"""Crash safety of a run directory: ``kill -9`` at any instant, clean stops, and resume.

The contract (see :mod:`hopwell.sampling.store`): every file is written atomically, a chunk is written
before the checkpoint that counts it, and ``hopwell resume DIR`` drops the chunks no checkpoint
counts and redoes that work. Whatever happens, the finished run directory must hold every
(cycle, walker, move) record exactly once, its chunks must all load, and the checkpoint's
counters must agree with the chunks.

The subprocess tests drive the real command line on butane (two walkers, a short run of a few
seconds); kill instants come from seeded generators so a failure can be replayed.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import tomllib
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore

BIN = Path(sys.executable).with_name("hopwell")
HOPWELL = [str(BIN)] if BIN.exists() else [sys.executable, "-m", "hopwell.cli"]

TRAINING_CYCLES = 10
PROPOSALS = 8
BUDGET = 160  # production samples; two walkers record 4 per cycle, so 40 production cycles
RUN_ARGS = ["CCCC", "--samples", str(BUDGET), "--training-cycles", str(TRAINING_CYCLES),
            "--langevin-steps", "50", "--proposals", str(PROPOSALS), "--seed", "11"]
CHUNK_NAME = re.compile(r"\d{6}\.npz")
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "OPENMM_CPU_THREADS": "1"}


# -- helpers ------------------------------------------------------------------------------
def _spawn(args, log_dir: Path, tag: str) -> tuple[subprocess.Popen, Path]:
    err = log_dir / f"{tag}.stderr"
    with open(err, "w") as handle:
        proc = subprocess.Popen(HOPWELL + args, stdout=subprocess.DEVNULL, stderr=handle,
                                env=ENV, cwd=log_dir)
    return proc, err


def _hopwell(args, cwd: Path, timeout=180) -> subprocess.CompletedProcess:
    return subprocess.run(HOPWELL + args, capture_output=True, text=True, env=ENV, cwd=cwd,
                          timeout=timeout)


def _start(run_dir: Path) -> list[str]:
    return ["run", *RUN_ARGS, "-o", str(run_dir)]


def _state(run_dir: Path) -> dict | None:
    path = run_dir / "state.npz"
    if not path.exists():
        return None
    with np.load(path, allow_pickle=False) as data:
        return {k: data[k] for k in data.files}


def _state_cycle(run_dir: Path) -> int:
    try:
        state = _state(run_dir)
    except FileNotFoundError:
        return -1
    return -1 if state is None else int(state["cycle"])


def _inode(path: Path) -> int | None:
    try:
        return os.stat(path).st_ino
    except FileNotFoundError:
        return None


def _temp_files(run_dir: Path) -> set[str]:
    names = set()
    for folder in (run_dir, run_dir / "chunks"):
        try:
            names.update(f"{folder}/{n}" for n in os.listdir(folder) if n.endswith(".tmp"))
        except FileNotFoundError:
            pass
    return names


def _chunk_count(run_dir: Path) -> int:
    try:
        return sum(1 for name in os.listdir(run_dir / "chunks") if CHUNK_NAME.fullmatch(name))
    except FileNotFoundError:
        return 0


def _kill_when(proc: subprocess.Popen, run_dir: Path, mode: str, delay: float, limit: float) -> int:
    """SIGKILL ``proc`` on an event (then ``delay`` s later) or, in mode "time", after ``delay`` s.

    Events: "chunk" (a new chunk file appears), "checkpoint" (state.npz is replaced),
    "progress" (a checkpoint of a later cycle than at the start), "temp" (an atomic write is under
    way). Falls back to a kill at ``limit`` s. Returns the exit status.
    """
    start = time.perf_counter()
    chunks0, inode0 = _chunk_count(run_dir), _inode(run_dir / "state.npz")
    cycle0, seen = _state_cycle(run_dir), inode0
    temps0 = _temp_files(run_dir)  # left by earlier kills
    fire_at = start + delay if mode == "time" else None
    while proc.poll() is None:
        now = time.perf_counter()
        if fire_at is None:
            inode = _inode(run_dir / "state.npz")
            progressed = False
            if mode == "progress" and inode != seen:
                seen, progressed = inode, _state_cycle(run_dir) > cycle0
            if (mode == "chunk" and _chunk_count(run_dir) > chunks0) or \
               (mode == "checkpoint" and inode != inode0) or progressed or \
               (mode == "temp" and _temp_files(run_dir) - temps0):
                fire_at = now + delay
        if (fire_at is not None and now >= fire_at) or now - start > limit:
            proc.send_signal(signal.SIGKILL)
            break
        time.sleep(0.001)
    return proc.wait(timeout=60)


def _load_chunks(run_dir: Path) -> list[dict]:
    chunks = []
    for index in RunStore(run_dir).chunk_indices():
        with np.load(RunStore(run_dir).chunk_path(index), allow_pickle=False) as data:
            chunks.append({k: data[k] for k in data.files})
    return chunks


def _check_after_kill(run_dir: Path) -> None:
    """What must hold at every instant: files under their final names are whole."""
    if not (run_dir / "chunks").is_dir():
        return
    _load_chunks(run_dir)  # a partial chunk under its final name would not load
    state = _state(run_dir)
    if state is not None:
        import torch

        saved = torch.load(run_dir / str(state["flow_file"]), weights_only=True)
        assert set(saved) == {"flow", "optimizer"}
    if (run_dir / "run.toml").exists():
        tomllib.loads((run_dir / "run.toml").read_text())


def _check_run(run_dir: Path, finished: bool = True) -> dict:
    """Check a run directory at rest against its checkpoint; return a summary."""
    chunk_dir = run_dir / "chunks"
    names = sorted(os.listdir(chunk_dir))
    stray = [n for n in names if not CHUNK_NAME.fullmatch(n)]
    assert not stray, f"files in chunks/ that are not chunks: {stray}"
    state = _state(run_dir)
    assert state is not None
    config = tomllib.loads((run_dir / "run.toml").read_text())
    walkers, proposals = config["walkers"], config["sampler"]["proposals_per_cycle"]
    n_chunks, last_cycle = int(state["next_chunk"]), int(state["cycle"])
    assert names == [f"{i:06d}.npz" for i in range(n_chunks)], "chunks must be numbered 0..next_chunk-1"
    chunks = _load_chunks(run_dir)

    # Chunks hold consecutive cycles, in order, each cycle complete.
    previous = -1
    for chunk in chunks:
        cycles = chunk["state_cycle"]
        assert len(cycles) and cycles.min() == previous + 1, "a gap or overlap between chunks"
        assert set(cycles.tolist()) == set(range(previous + 1, int(cycles.max()) + 1))
        previous = int(cycles.max())
    assert previous == last_cycle - 1, "the checkpoint's cycle disagrees with the chunks"

    cycle = np.concatenate([c["state_cycle"] for c in chunks])
    walker = np.concatenate([c["state_walker"] for c in chunks])
    move = np.concatenate([c["state_move"] for c in chunks])
    production = np.concatenate([c["state_production"] for c in chunks]).astype(bool)
    positions = np.concatenate([c["state_positions_nm"] for c in chunks])
    energy = np.concatenate([c["state_energy_kj"] for c in chunks])
    keys = list(zip(cycle.tolist(), walker.tolist(), move.tolist()))
    repeated = [k for k, n in Counter(keys).items() if n > 1]
    assert not repeated, f"duplicated records: {repeated[:5]}"
    expected = {(c, w, m) for c in range(last_cycle) for w in range(walkers)
                for m in (MOVE_LANGEVIN, MOVE_FLOW)}
    missing = sorted(expected - set(keys))
    assert not missing, f"lost records: {missing[:5]}"
    assert set(keys) == expected
    assert np.all(np.isfinite(positions)) and np.all(np.isfinite(energy))

    # Phases and production count agree with the checkpoint.
    end = int(state["training_end_cycle"])
    if end >= 0:
        assert end == TRAINING_CYCLES
        assert np.array_equal(production, cycle >= end)
    else:
        assert not production.any() and last_cycle <= TRAINING_CYCLES
    assert int(production.sum()) == int(state["production_samples"])

    # Proposal records: exactly PROPOSALS per production (cycle, walker), none in training.
    p_cycle = np.concatenate([c.get("proposal_cycle", np.empty(0, np.int64)) for c in chunks])
    p_walker = np.concatenate([c.get("proposal_walker", np.empty(0, np.int32)) for c in chunks])
    p_accepted = np.concatenate([c.get("proposal_accepted", np.empty(0, bool)) for c in chunks])
    p_rejected = np.concatenate([c.get("proposal_rejected_by", np.empty(0, np.int8)) for c in chunks])
    production_cycles = range(max(end, 0), last_cycle) if end >= 0 else range(0)
    assert Counter(zip(p_cycle.tolist(), p_walker.tolist())) == {
        (c, w): proposals for c in production_cycles for w in range(walkers)}

    index = {k: i for i, k in enumerate(keys)}
    # The checkpoint's walker states are the last records; its counters match the records.
    for w in range(walkers):
        i = index[(last_cycle - 1, w, MOVE_FLOW)] if last_cycle else None
        if i is not None:
            np.testing.assert_array_equal(state["positions_nm"][w].astype(np.float32), positions[i])
            assert state["energies_kj"][w] == energy[i]
    stats = json.loads(str(state["stats"]))
    assert stats["production"]["proposed"] == len(p_cycle)
    assert stats["production"]["accepted"] == int(p_accepted.sum())
    assert stats["production"]["clash"] == int((p_rejected == 1).sum())
    assert stats["production"]["stereo"] == int((p_rejected == 2).sum())
    assert stats["training"]["proposed"] == min(last_cycle, TRAINING_CYCLES) * walkers * proposals

    # One flow checkpoint, the one the state names, and it loads.
    flows = sorted(p.name for p in run_dir.glob("flow-*.pt"))
    if finished:
        assert flows == [str(state["flow_file"])]
    assert str(state["flow_file"]) in flows

    if finished:
        per_cycle = 2 * walkers
        expected_samples = math.ceil(BUDGET / per_cycle) * per_cycle
        assert last_cycle == TRAINING_CYCLES + math.ceil(BUDGET / per_cycle)
        assert int(state["production_samples"]) == int(production.sum()) == expected_samples
        assert BUDGET <= expected_samples < BUDGET + per_cycle
        if BUDGET % per_cycle == 0:
            assert expected_samples == BUDGET
    return {"cycle": last_cycle, "walkers": walkers, "chunks": n_chunks}


def _one_line_error(result: subprocess.CompletedProcess) -> str:
    assert result.returncode == 2, (result.returncode, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("hopwell: error:") and "Traceback" not in result.stderr
    return lines[0]


@pytest.fixture(autouse=True)
def _one_torch_thread():
    """In-process sampling with one torch thread, as the command line runs it."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory) -> Path:
    """One uninterrupted run, finished (read-only for the tests: copy before changing)."""
    base = tmp_path_factory.mktemp("finished")
    result = _hopwell(_start(base / "run"), cwd=base)
    assert result.returncode == 0, result.stderr
    return base / "run"


def _copy_run(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


# -- kill -9 -------------------------------------------------------------------------------
@pytest.mark.parametrize("seed, first_kill_s", [
    (20251, (1.2, 3.0)),  # between creating the directory and the first cycles
    (20252, (0.3, 1.0)),  # in the imports and the build, before the directory is a run
])
def test_kill9_at_random_instants_then_resume(tmp_path, seed, first_kill_s):
    """Start, SIGKILL, resume (killed again, several rounds), finish: nothing lost or doubled."""
    rng = np.random.default_rng(seed)
    run_dir = tmp_path / "run"
    kills, early_checked, history = 0, False, []
    for round_ in range(5):
        if round_ == 0:
            # The first kill lands in start-up: imports, building, creating the directory,
            # checkpoint zero.
            mode, delay, limit = "time", float(rng.uniform(*first_kill_s)), 30.0
        else:
            # Round 1 gets past a checkpoint, so later kills also reach production.
            mode = "progress" if round_ == 1 else str(
                rng.choice(["time", "progress", "chunk", "checkpoint", "temp"]))
            delay = {"time": rng.uniform(0.2, 6.0), "progress": rng.uniform(0.0, 1.0)}.get(
                mode, rng.uniform(0.0, 0.02))
            delay, limit = float(delay), 15.0
        cycle_before = _state_cycle(run_dir) if run_dir.exists() else None
        if (run_dir / "run.toml").exists():
            args = ["resume", str(run_dir)]
        else:
            if not early_checked:
                # Killed before the directory became a run: resume refuses in one line, and
                # starting again into the same directory works.
                message = _one_line_error(_hopwell(["resume", str(run_dir)], cwd=tmp_path))
                assert "not a hopwell run directory" in message
                early_checked = True
            args = _start(run_dir)
        proc, err = _spawn(args, tmp_path, f"round{round_}")
        rc = _kill_when(proc, run_dir, mode, delay, limit)
        history.append((args[0], mode, round(delay, 3), rc, cycle_before,
                        _state_cycle(run_dir) if run_dir.exists() else None))
        assert rc in (0, -signal.SIGKILL), (history, err.read_text())
        kills += rc == -signal.SIGKILL
        _check_after_kill(run_dir)
    assert kills >= 3, history
    print(history)
    args = ["resume", str(run_dir)] if (run_dir / "run.toml").exists() else _start(run_dir)
    result = _hopwell(args, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    _check_run(run_dir)


def test_kill9_never_leaves_a_partial_file_under_the_final_name(tmp_path):
    """A process rewriting one file atomically, killed at random instants: the file is whole."""
    target = tmp_path / "data.bin"
    writer = (
        "import hashlib, os, sys\n"
        "from hopwell.atomic import atomic_write_bytes\n"
        "target = sys.argv[1]\n"
        "first = True\n"
        "while True:\n"
        "    body = os.urandom(64) * 32768\n"
        "    atomic_write_bytes(target, hashlib.sha256(body).digest() + body)\n"
        "    if first:\n"
        "        print('ready', flush=True); first = False\n"
    )
    rng = np.random.default_rng(7)
    for _ in range(10):
        proc = subprocess.Popen([sys.executable, "-c", writer, str(target)], stdout=subprocess.PIPE,
                                text=True, env=ENV)
        assert proc.stdout.readline().strip() == "ready"
        time.sleep(float(rng.uniform(0.0, 0.25)))
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=30) == -signal.SIGKILL
        data = target.read_bytes()
        assert len(data) == 32 + 64 * 32768
        assert hashlib.sha256(data[32:]).digest() == data[:32], "a partial or mixed file"


# -- clean stops ---------------------------------------------------------------------------
def _wait_for_cycle(proc, run_dir: Path, above: int, timeout: float = 60.0) -> None:
    start = time.perf_counter()
    while _state_cycle(run_dir) <= above:
        assert proc.poll() is None, "the run ended before it could be signalled"
        assert time.perf_counter() - start < timeout, "no new checkpoint"
        time.sleep(0.01)


def test_sigterm_and_sigint_stop_cleanly_and_resume_continues(tmp_path):
    run_dir = tmp_path / "run"
    # SIGTERM during production of `hopwell run`.
    proc, err = _spawn(_start(run_dir), tmp_path, "run")
    _wait_for_cycle(proc, run_dir, above=TRAINING_CYCLES - 1)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=60) == 0, err.read_text()
    stopped = _check_run(run_dir, finished=False)
    assert f"run finished at cycle {stopped['cycle']}" in err.read_text()
    assert TRAINING_CYCLES <= stopped["cycle"] < TRAINING_CYCLES + BUDGET // 4

    # SIGINT (Ctrl-C) during `hopwell resume`, once it has written a new checkpoint.
    proc, err = _spawn(["resume", str(run_dir)], tmp_path, "resume1")
    _wait_for_cycle(proc, run_dir, above=stopped["cycle"])
    proc.send_signal(signal.SIGINT)
    assert proc.wait(timeout=60) == 0, err.read_text()
    assert "Traceback" not in err.read_text()
    again = _check_run(run_dir, finished=False)
    assert again["cycle"] > stopped["cycle"]
    assert f"run finished at cycle {again['cycle']}" in err.read_text()

    # A clean stop leaves nothing for resume to throw away.
    log = (run_dir / "progress.log").read_text()
    assert f"resumed at cycle {stopped['cycle']}" in log
    assert "removed" not in log


# -- before the first checkpoint -------------------------------------------------------------
def _strip_to_start(run_dir: Path) -> None:
    """Leave what a kill between creating the directory and checkpoint zero leaves."""
    (run_dir / "state.npz").unlink()
    for path in list((run_dir / "chunks").iterdir()) + list(run_dir.glob("flow-*.pt")):
        path.unlink()


def test_resume_before_checkpoint_zero_starts_from_the_beginning(finished_run, tmp_path):
    from hopwell.sampling.run import resume_run

    run_dir = _copy_run(finished_run, tmp_path / "run")
    _strip_to_start(run_dir)
    (run_dir / "chunks" / ".000000.npz.interrupted.tmp").write_bytes(b"partial")
    sampler = resume_run(run_dir)  # what `hopwell resume` calls
    assert sampler.cycle == _check_run(run_dir)["cycle"]


def test_resume_refuses_chunks_without_a_checkpoint(finished_run, tmp_path):
    """Chunks but no state.npz cannot come from a crash; resume must not guess (nor delete)."""
    from hopwell.sampling.run import resume_run

    run_dir = _copy_run(finished_run, tmp_path / "run")
    (run_dir / "state.npz").unlink()
    before = sorted(os.listdir(run_dir / "chunks"))
    with pytest.raises(InputError, match="no checkpoint"):
        resume_run(run_dir)
    assert sorted(os.listdir(run_dir / "chunks")) == before


def test_resume_of_a_finished_run_changes_nothing(finished_run, tmp_path):
    from hopwell.sampling.run import resume_run

    run_dir = _copy_run(finished_run, tmp_path / "run")
    before = _state(run_dir)
    chunks = {p.name: p.read_bytes() for p in (run_dir / "chunks").iterdir()}
    sampler = resume_run(run_dir)
    after = _state(run_dir)
    for key in ("cycle", "next_chunk", "production_samples", "positions_nm", "energies_kj"):
        np.testing.assert_array_equal(before[key], after[key])
    assert sampler.cycle == int(before["cycle"])
    assert {p.name: p.read_bytes() for p in (run_dir / "chunks").iterdir()} == chunks
    _check_run(run_dir)


# -- in-process crash points ----------------------------------------------------------------
class SimulatedCrash(BaseException):
    """Stands for the process dying at this point (not an Exception: nothing may catch it)."""


def test_crash_while_rewriting_the_flow_checkpoint_keeps_the_run_resumable(finished_run, tmp_path,
                                                                           monkeypatch):
    """A flush at the checkpoint's own cycle rewrites the flow file the checkpoint names."""
    import torch

    from hopwell.sampling.run import load_sampler

    run_dir = _copy_run(finished_run, tmp_path / "run")
    sampler = load_sampler(run_dir)
    real_save = torch.save

    def dying_save(obj, f, *args, **kwargs):
        buffer = io.BytesIO()
        real_save(obj, buffer, *args, **kwargs)
        half = buffer.getvalue()[: len(buffer.getvalue()) // 2]
        if isinstance(f, (str, os.PathLike)):
            with open(f, "wb") as handle:
                handle.write(half)
        else:
            f.write(half)
        raise SimulatedCrash

    monkeypatch.setattr(torch, "save", dying_save)
    with pytest.raises(SimulatedCrash):
        sampler.flush()
    monkeypatch.undo()
    load_sampler(run_dir)  # the checkpoint and the flow file it names still load
    _check_run(run_dir)


def test_crash_between_chunk_and_checkpoint_drops_the_uncounted_chunk(finished_run, tmp_path,
                                                                      monkeypatch):
    from hopwell.sampling.run import load_sampler
    from hopwell.sampling.sampler import Budget

    run_dir = _copy_run(finished_run, tmp_path / "run")
    sampler = load_sampler(run_dir)
    counted = int(_state(run_dir)["next_chunk"])

    def dying_write_state(self, arrays):
        raise SimulatedCrash

    monkeypatch.setattr(RunStore, "write_state", dying_write_state)
    with pytest.raises(SimulatedCrash):
        sampler.run(Budget(samples=BUDGET + 8))  # two more cycles, then the flush dies
    monkeypatch.undo()
    assert RunStore(run_dir).chunk_indices()[-1] == counted  # written, but no checkpoint counts it
    load_sampler(run_dir)
    assert RunStore(run_dir).chunk_indices() == list(range(counted))
    assert "removed 1 chunk(s)" in (run_dir / "progress.log").read_text()
    _check_run(run_dir, finished=False)  # (the dead flush's flow file is pruned by the next one)


# -- store units --------------------------------------------------------------------------
def test_atomic_write_failure_at_rename_keeps_the_old_content(tmp_path, monkeypatch):
    import hopwell.atomic

    target = tmp_path / "state.npz"
    atomic_write_bytes(target, b"old content")

    def failing_replace(src, dst):
        raise OSError("disk gone")

    monkeypatch.setattr(hopwell.atomic.os, "replace", failing_replace)
    with pytest.raises(OSError, match="disk gone"):
        atomic_write_bytes(target, b"new content" * 1000)
    assert target.read_bytes() == b"old content"
    assert sorted(os.listdir(tmp_path)) == ["state.npz"], "the temp file must be removed"


def test_atomic_write_failure_mid_write_keeps_the_old_content(tmp_path, monkeypatch):
    import hopwell.atomic

    target = tmp_path / "000003.npz"
    atomic_write_bytes(target, b"old content")
    calls = []

    def dying_fsync(fd):
        calls.append(fd)
        raise SimulatedCrash  # after the bytes went to the temp file, before the rename

    monkeypatch.setattr(hopwell.atomic.os, "fsync", dying_fsync)
    with pytest.raises(SimulatedCrash):
        atomic_write_bytes(target, b"new content" * 1000)
    assert calls and target.read_bytes() == b"old content"
    assert sorted(os.listdir(tmp_path)) == ["000003.npz"]
    monkeypatch.undo()
    atomic_write_bytes(target, b"new")
    assert target.read_bytes() == b"new" and sorted(os.listdir(tmp_path)) == ["000003.npz"]


def _toy_store(path: Path, n: int) -> RunStore:
    store = RunStore.create(path, {"input": "toy"}, {})
    for i in range(n):
        store.write_chunk(i, {"cycle": np.full(4, i), "walker": np.arange(4)}, {})
    return store


def test_discard_chunks_from(tmp_path):
    store = _toy_store(tmp_path / "run", 5)
    (store.path / "chunks" / ".000005.npz.abcd.tmp").write_bytes(b"half a chunk")
    assert store.chunk_indices() == [0, 1, 2, 3, 4]  # temp files are never read as chunks
    assert store.discard_chunks_from(3) == 2
    assert store.chunk_indices() == [0, 1, 2]
    assert sorted(os.listdir(store.path / "chunks")) == ["000000.npz", "000001.npz", "000002.npz"]
    assert [int(c["state_cycle"][0]) for c in store.iter_chunks()] == [0, 1, 2]
    assert store.discard_chunks_from(10) == 0 and store.chunk_indices() == [0, 1, 2]
    assert [int(c["state_cycle"][0]) for c in store.iter_chunks(upto=2)] == [0, 1]
    assert store.discard_chunks_from(0) == 3 and store.chunk_indices() == []


def test_create_refuses_a_directory_that_holds_a_run(tmp_path):
    store = _toy_store(tmp_path / "run", 2)
    config = (store.path / "run.toml").read_bytes()
    with pytest.raises(InputError, match="already holds a run"):
        RunStore.create(store.path, {"input": "other"}, {"molecule.sdf": b"x"})
    assert (store.path / "run.toml").read_bytes() == config
    assert not (store.path / "molecule.sdf").exists() and store.chunk_indices() == [0, 1]


def test_cli_run_into_an_existing_run_exits_2_and_leaves_it_alone(finished_run, tmp_path):
    run_dir = _copy_run(finished_run, tmp_path / "run")
    before = {p.name: p.read_bytes() for p in run_dir.rglob("*") if p.is_file()}
    message = _one_line_error(_hopwell(_start(run_dir), cwd=tmp_path))
    assert "already holds a run" in message
    assert {p.name: p.read_bytes() for p in run_dir.rglob("*") if p.is_file()} == before


def test_cli_resume_of_a_non_run_directory_exits_2(tmp_path):
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "notes.txt").write_text("not a run")
    message = _one_line_error(_hopwell(["resume", str(tmp_path / "empty")], cwd=tmp_path))
    assert "not a hopwell run directory" in message and str(tmp_path / "empty") in message
    assert sorted(os.listdir(tmp_path / "empty")) == ["notes.txt"]
    for target in (tmp_path / "missing", tmp_path / "empty" / "notes.txt"):
        with pytest.raises(InputError, match="not a hopwell run directory"):
            RunStore.open(target)
    assert not (tmp_path / "missing").exists()


# -- one writer per directory ---------------------------------------------------------------
def test_resume_is_refused_while_another_process_samples_into_the_directory(finished_run, tmp_path):
    """A second writer would drop the first one's uncounted chunks; the lock must refuse it.

    The holder is a separate process, killed with SIGKILL afterwards: the kernel frees a flock
    when its holder dies (flock(2), Linux man-pages), so a killed run must not block a resume.
    """
    run_dir = _copy_run(finished_run, tmp_path / "run")
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, time\nfrom hopwell.sampling.store import RunStore\n"
         f"with RunStore({str(run_dir)!r}).exclusive():\n    print('held', flush=True)\n"
         "    time.sleep(120)\n"],
        stdout=subprocess.PIPE, text=True, env=ENV)
    try:
        assert holder.stdout.readline().strip() == "held"
        files = {p.name: p.read_bytes() for p in run_dir.rglob("*") if p.is_file()}
        message = _one_line_error(_hopwell(["resume", str(run_dir)], cwd=tmp_path))
        assert "in use by another hopwell process" in message and f"pid {holder.pid}" in message
        assert {p.name: p.read_bytes() for p in run_dir.rglob("*") if p.is_file()} == files
        status = json.loads(_hopwell(["status", str(run_dir), "--json"], cwd=tmp_path).stdout)
        assert status["sampling_pid"] == holder.pid
    finally:
        holder.kill()
        holder.wait()
    assert RunStore.open(run_dir).writer_pid() is None
    result = _hopwell(["resume", str(run_dir)], cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    _check_run(run_dir)


def test_a_second_start_into_a_directory_being_started_is_refused(tmp_path):
    """Before run.toml exists only the lock stops two starts from writing one directory."""
    from hopwell.sampling.run import start_run
    from hopwell.sampling.sampler import Budget, SamplerSettings
    from hopwell.systems.builder import BuildOptions

    with RunStore(tmp_path / "run").exclusive():
        with pytest.raises(InputError, match=f"in use by another hopwell process \\(pid {os.getpid()}\\)"):
            start_run("CCCC", tmp_path / "run", BuildOptions(), SamplerSettings(), Budget(samples=10))
    assert not (tmp_path / "run" / "run.toml").exists()
