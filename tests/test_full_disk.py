"""A full disk: the run stops in one line, the directory stays consistent, resume continues.

The disk fills by injection: ``os.fsync`` fails with ``ENOSPC`` (as it does on a full file
system when the data cannot be placed) for the temporary file of one kind of write, after the
bytes went to it, and keeps failing while the test holds the patch. The contract
(:mod:`hopwell.sampling.store`): the command ends with one line (exit 2) naming what it was
writing and ``hopwell resume``; no temporary file is left; state.npz is the checkpoint it was
before; and once space is back, ``hopwell resume`` finishes the run with every record exactly
once.
"""

from __future__ import annotations

import errno
import os
import re

import pytest

from hopwell.atomic import atomic_write_bytes
from run_checks import FINAL_CYCLE, check_records, copy_run, hopwell, log_text, make_run, one_line_error, temp_files

# What each write's open file is called while it is written (a temp name, or the log itself).
TARGETS = {
    "chunk": (r"/chunks/\.\d{6}\.npz\..*\.tmp$", "chunks/000005.npz"),
    "flow": (r"/\.flow-\d{6}\.pt\..*\.tmp$", "the flow checkpoint (flow-000050.pt)"),
    "previous checkpoint": (r"/\.state\.previous\.npz\..*\.tmp$", "the checkpoint (state.npz)"),
    "checkpoint": (r"/\.state\.npz\..*\.tmp$", "the checkpoint (state.npz)"),
    "log": (r"/progress\.log$", "progress.log"),
}


def _fill_disk_for(monkeypatch, pattern: str) -> list[str]:
    """Make ``os.fsync`` fail with ENOSPC on files whose path matches ``pattern``; return their paths."""
    real_fsync, failed = os.fsync, []

    def fsync(fd):
        path = os.readlink(f"/proc/self/fd/{fd}")
        if re.search(pattern, path):
            failed.append(path)
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fsync)  # every caller's: the atomic writes' and the log's
    return failed


@pytest.fixture(scope="module")
def butane(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("butane") / "run")


@pytest.mark.parametrize("target", TARGETS)
def test_a_full_disk_stops_the_run_in_one_line_and_resume_continues(butane, tmp_path, monkeypatch, target):
    run_dir = copy_run(butane, tmp_path / "run")
    pattern, what = TARGETS[target]
    checkpoint = (run_dir / "state.npz").read_bytes()

    failed = _fill_disk_for(monkeypatch, pattern)
    message = one_line_error(hopwell("resume", run_dir, "--samples", 200))
    monkeypatch.undo()  # space is back
    assert failed, "the write was never attempted"
    assert "no space left on its device" in message and f"while writing {what};" in message
    assert f"then run 'hopwell resume {run_dir}'" in message
    assert not temp_files(run_dir), "a temporary file was left behind"
    assert (run_dir / "state.npz").read_bytes() == checkpoint, "the checkpoint must stay the one before"

    result = hopwell("resume", run_dir, "--samples", 200)
    assert result.exit_code == 0, result.stderr
    after = check_records(run_dir)
    assert after["cycle"] == FINAL_CYCLE + 15 and after["production_samples"] == after["production_records"] == 200
    if target in ("flow", "previous checkpoint", "checkpoint"):  # chunk 5 was written, never counted
        assert "removed 1 chunk(s) written after the last checkpoint" in log_text(run_dir)


def test_a_full_disk_while_a_run_starts_stops_in_one_line_and_the_run_can_start_again(tmp_path, monkeypatch):
    run_dir = tmp_path / "run"
    _fill_disk_for(monkeypatch, r"/\.run\.toml\..*\.tmp$")
    message = one_line_error(hopwell("run", "CCCC", "--samples", 8, "--training-cycles", 2, "-o", run_dir))
    monkeypatch.undo()
    assert "while writing the new run's files; the run was not started" in message
    assert not (run_dir / "run.toml").exists() and not temp_files(run_dir)
    result = hopwell("run", "CCCC", "--samples", 8, "--training-cycles", 2, "--langevin-steps", 20, "-o", run_dir)
    assert result.exit_code == 0, result.stderr


def test_a_full_disk_while_writing_a_report_is_one_line(butane, tmp_path, monkeypatch):
    run_dir = copy_run(butane, tmp_path / "run")
    _fill_disk_for(monkeypatch, r"/\.report\.html\..*\.tmp$")
    message = one_line_error(hopwell("report", run_dir))
    assert "no space left on device" in message and "run the command again" in message
    assert not temp_files(run_dir)


def test_atomic_write_removes_its_temporary_file_when_the_disk_is_full(tmp_path, monkeypatch):
    """ENOSPC at the write call itself, half the bytes written: the old file stays, no temp file."""
    target = tmp_path / "000003.npz"
    atomic_write_bytes(target, b"old content")
    real_fdopen = os.fdopen

    class FullDisk:
        def __init__(self, handle):
            self.handle = handle

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.handle.close()

        def write(self, data):
            self.handle.write(data[: len(data) // 2])
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fdopen", lambda fd, mode: FullDisk(real_fdopen(fd, mode)))
    with pytest.raises(OSError) as raised:
        atomic_write_bytes(target, b"new content" * 1000)
    assert raised.value.errno == errno.ENOSPC
    assert target.read_bytes() == b"old content"
    assert sorted(os.listdir(tmp_path)) == ["000003.npz"]
