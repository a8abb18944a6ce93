"""A short n-butane run directory, the command line run in-process, and checks of a run at rest.

Shared by the tests of damaged run directories and of a full disk. The run (two walkers, ten
training cycles, 140 production samples) ends at cycle 45, so its two checkpoints differ:
state.npz at cycle 45 counts chunks 0-4, state.previous.npz at cycle 40 counts chunks 0-3.
"""

from __future__ import annotations

import re
import shutil
from collections import Counter
from pathlib import Path

import numpy as np
from click.testing import CliRunner

from hopwell.cli import main
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore

WALKERS = 2
TRAINING_CYCLES = 10
RUN_ARGS = ["CCCC", "--samples", "140", "--training-cycles", str(TRAINING_CYCLES), "--langevin-steps", "50",
            "--proposals", "8", "--seed", "11"]
FINAL_CYCLE = 45  # 10 training cycles, then 35 production cycles of 2 walkers x 2 records
PROGRESS_LINE = re.compile(r"(training|production) cycle \d+: ")


def hopwell(*args) -> "click.testing.Result":  # noqa: F821 (click.testing in the string only)
    """Run the ``hopwell`` command line in this process (stdout and stderr kept apart)."""
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def make_run(path: Path) -> Path:
    """The butane run of the module docstring, sampled to its end."""
    result = hopwell("run", *RUN_ARGS, "-o", path)
    assert result.exit_code == 0, result.stderr
    return path


def copy_run(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def stderr_lines(result) -> list[str]:
    """The lines on stderr other than progress lines."""
    return [line for line in result.stderr.splitlines() if line.strip() and not PROGRESS_LINE.match(line)]


def one_line_error(result) -> str:
    """The one error line of a command that had to stop: exit code 2, no traceback."""
    lines = stderr_lines(result)
    assert result.exit_code == 2, (result.exit_code, result.stderr)
    assert "Traceback" not in result.stderr and "internal error" not in result.stderr, result.stderr
    assert len(lines) == 1 and lines[0].startswith("hopwell: error: "), result.stderr
    return lines[0]


def warnings_of(result) -> list[str]:
    """The ``hopwell: warning:`` lines of a command that went on."""
    return [line for line in stderr_lines(result) if line.startswith("hopwell: warning: ")]


def files(run_dir: Path) -> dict[str, bytes]:
    """Every file under ``run_dir`` (name relative to it) with its bytes."""
    return {str(p.relative_to(run_dir)): p.read_bytes() for p in sorted(run_dir.rglob("*")) if p.is_file()}


def temp_files(run_dir: Path) -> list[str]:
    return sorted(str(p) for p in run_dir.rglob("*.tmp"))


def state(run_dir: Path, name: str = "state.npz") -> dict:
    with np.load(run_dir / name, allow_pickle=False) as data:
        return {k: data[k] for k in data.files}


def check_records(run_dir: Path, lost_chunks: tuple[int, ...] = (), lost_cycles: range = range(0)) -> dict:
    """Check a run at rest: every (cycle, walker, move) up to the checkpoint's cycle recorded once.

    ``lost_chunks`` are chunks known to be damaged and ``lost_cycles`` the cycles they held:
    exactly those cycles must be missing. Returns the checkpoint's cycle, its production count
    and the production records found in the intact chunks.
    """
    assert not temp_files(run_dir), temp_files(run_dir)
    store = RunStore(run_dir)
    checkpoint = state(run_dir)
    n_chunks, cycle = int(checkpoint["next_chunk"]), int(checkpoint["cycle"])
    assert store.chunk_indices() == list(range(n_chunks)), "chunks must be numbered 0..next_chunk-1"
    chunks = []
    for index in range(n_chunks):
        if index not in lost_chunks:
            with np.load(store.chunk_path(index), allow_pickle=False) as data:
                chunks.append({k: data[k] for k in data.files})
    keys = [(int(c), int(w), int(m)) for chunk in chunks
            for c, w, m in zip(chunk["state_cycle"], chunk["state_walker"], chunk["state_move"])]
    repeated = [k for k, n in Counter(keys).items() if n > 1]
    assert not repeated, f"duplicated records: {repeated[:5]}"
    expected = {(c, w, m) for c in range(cycle) if c not in lost_cycles
                for w in range(WALKERS) for m in (MOVE_LANGEVIN, MOVE_FLOW)}
    assert set(keys) == expected, (f"lost: {sorted(expected - set(keys))[:5]},"
                                   f" unexpected: {sorted(set(keys) - expected)[:5]}")
    production = sum(int(chunk["state_production"].sum()) for chunk in chunks)
    lost = sum(WALKERS * 2 for c in lost_cycles if c >= TRAINING_CYCLES)  # production records lost
    assert production + lost == int(checkpoint["production_samples"])
    assert (run_dir / str(checkpoint["flow_file"])).is_file()
    return {"cycle": cycle, "production_samples": int(checkpoint["production_samples"]),
            "production_records": production}


def production_records(run_dir: Path, skip: tuple[int, ...] = ()) -> int:
    """Production records in the chunks of ``run_dir`` other than ``skip``."""
    store = RunStore(run_dir)
    total = 0
    for index in store.chunk_indices():
        if index not in skip:
            with np.load(store.chunk_path(index), allow_pickle=False) as data:
                total += int(data["state_production"].sum())
    return total


def log_text(run_dir: Path) -> str:
    return (run_dir / "progress.log").read_text()
