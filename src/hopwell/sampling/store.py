"""The run directory: configuration, system, append-only sample chunks, checkpoints, log.

Layout of a run directory ``DIR``::

    DIR/run.toml            resolved configuration (written once, at the start)
    DIR/molecule.sdf        the molecule and its seed structures (Angstrom, as SDF keeps them)
    DIR/topology.pdb        the OpenMM topology (first seed), for trajectories and peptides
    DIR/system.xml          the OpenMM system
    DIR/chunks/NNNNNN.npz   sample chunks, numbered from 0, each written atomically
    DIR/state.npz           the sampler checkpoint (walker states, counters, RNG state)
    DIR/state.previous.npz  the checkpoint state.npz replaced, kept to fall back to
    DIR/flow-NNNNNN.pt      flow checkpoints (torch state dicts), named by cycle
    DIR/progress.log        human-readable progress lines (append-only)
    DIR/run.lock            held (flock) by the one process sampling into DIR; holds its pid

Crash safety rests on one ordering: a chunk is written (atomically) before the checkpoint that
counts it. After ``kill -9`` at any instant, the newest checkpoint names ``next_chunk``; chunks
numbered at or above it belong to work the checkpoint does not know about and are removed on
resume, so no sample is lost (everything before the checkpoint is in its chunks) or
duplicated (everything after is redone from the checkpoint's state). The ordering assumes one
writer: a process that samples into the directory holds an exclusive ``flock`` on ``run.lock``
(:meth:`RunStore.exclusive`), so a second start or resume of the same directory is refused. The
kernel releases the lock when its holder dies, ``kill -9`` included, so no stale lock blocks a
resume.

Damage (see :mod:`hopwell.sampling.checkpoint` and :mod:`hopwell.sampling.recovery`): a
checkpoint that no longer loads falls back to the previous one (``DIR/state.previous.npz``);
a chunk that no longer loads is skipped by readers that ask for it (:meth:`RunStore.iter_chunks`)
and named, and never read as samples.

A full disk: every write of the store goes through one boundary that turns ``ENOSPC`` and
``EDQUOT`` into :class:`NoSpaceLeft`, a one-line error. The write that failed leaves no file
behind (:func:`~hopwell.atomic.atomic_write_bytes` removes its temporary file) and the ordering
above holds, so the directory is as after a crash at that instant: ``hopwell resume`` continues
from the last checkpoint once space is back, losing and duplicating nothing.
"""

from __future__ import annotations

import errno
import fcntl
import io
import os
import re
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.checkpoint import STATE_FILE, flow_files_named, keep_previous, newest_good
from hopwell.sampling.files import DamagedFile, check_archive, read_npz
from hopwell.sampling.run_config import read_run_config

CHUNK_DIR = "chunks"
CHUNK_NAME = re.compile(r"\d{6}\.npz")
CONFIG_FILE = "run.toml"
LOG_FILE = "progress.log"
LOCK_FILE = "run.lock"

# Record fields stored per chain sample ("states") and per flow proposal ("proposals").
# "time_s" is the run's sampling time (resumes included) when the state was recorded.
STATE_FIELDS = ("positions_nm", "energy_kj", "walker", "cycle", "move", "accepted", "production",
                "time_s")
PROPOSAL_FIELDS = ("positions_nm", "energy_kj", "log_q", "log_jacobian", "walker", "cycle", "accepted",
                   "rejected_by")
MOVE_LANGEVIN, MOVE_FLOW = 0, 1
NO_SPACE = (errno.ENOSPC, errno.EDQUOT)


class NoSpaceLeft(InputError):
    """A write into a run directory failed for want of space (or quota); the message says what to do."""


@contextmanager
def no_space_stop(run_dir: Path, what: str, fix: str):
    """Turn ``ENOSPC``/``EDQUOT`` inside the block into :class:`NoSpaceLeft` naming ``what`` and ``fix``."""
    try:
        yield
    except OSError as exc:
        if exc.errno not in NO_SPACE:
            raise
        raise NoSpaceLeft(f"{run_dir}: no space left on its device ({os.strerror(exc.errno)}) while"
                          f" writing {what}; {fix}") from None


def _npz_bytes(arrays: dict) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def to_toml(config: dict) -> str:
    """Serialize a flat-or-one-level-nested dict of scalars and lists to TOML."""
    def value(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, (int, float)):
            return repr(v)
        if isinstance(v, (list, tuple)):
            return "[" + ", ".join(value(x) for x in v) + "]"
        if v is None:
            raise ValueError("TOML has no null; leave the key out")
        return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"') + '"'

    top = [f"{k} = {value(v)}" for k, v in config.items() if not isinstance(v, dict) and v is not None]
    tables = [
        f"\n[{k}]\n" + "\n".join(f"{kk} = {value(vv)}" for kk, vv in v.items() if vv is not None)
        for k, v in config.items() if isinstance(v, dict)
    ]
    return "\n".join(top) + "\n" + "\n".join(tables) + ("\n" if tables else "")


class RunStore:
    """Reads and writes one run directory (see the module docstring for the layout)."""

    def __init__(self, path: Path):
        self.path = Path(path)

    # -- creation -------------------------------------------------------------------------
    @classmethod
    def create(cls, path: Path, config: dict, files: dict[str, bytes]) -> "RunStore":
        """Make a new run directory; refuses one that already holds a run."""
        path = Path(path)
        cls.refuse_existing(path)
        with no_space_stop(path, "the new run's files",
                           "the run was not started: free some space and start it again"):
            (path / CHUNK_DIR).mkdir(parents=True, exist_ok=True)
            for name, data in files.items():
                atomic_write_bytes(path / name, data)
            atomic_write_bytes(path / CONFIG_FILE, to_toml(config).encode())  # last: marks a run
        return cls(path)

    @staticmethod
    def refuse_existing(path: Path) -> None:
        """Raise InputError if ``path`` already holds a run (a new run must not overwrite it)."""
        if (Path(path) / CONFIG_FILE).exists():
            raise InputError(f"{path} already holds a run; use 'hopwell resume {path}' or another -o")

    @classmethod
    def open(cls, path: Path) -> "RunStore":
        """Open an existing run directory."""
        path = Path(path)
        if not (path / CONFIG_FILE).is_file():
            raise InputError(f"{path} is not a hopwell run directory (no {CONFIG_FILE})")
        return cls(path)

    # -- the one writer --------------------------------------------------------------------
    @contextmanager
    def exclusive(self):
        """Hold the directory's write lock for the ``with`` block; refuse if another process holds it.

        Raises
        ------
        InputError
            Another live process (its pid in the message) is sampling into this directory.
        """
        self.path.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            holder = self.writer_pid()  # None if the holder ended meanwhile
            raise InputError(f"{self.path} is in use by another hopwell process"
                             f"{f' (pid {holder})' if holder and holder > 0 else ''}; wait for it or stop it first") from None
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
            yield self
        finally:
            os.close(fd)  # closing the last descriptor releases the flock

    def writer_pid(self) -> int | None:
        """The pid of the process sampling into this directory now, or None if there is none."""
        try:
            fd = os.open(self.path / LOCK_FILE, os.O_RDONLY)
        except FileNotFoundError:
            return None
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            text = os.pread(fd, 32, 0).decode(errors="replace").strip()
            return int(text) if text.isdigit() else -1
        else:
            return None
        finally:
            os.close(fd)

    def writing(self, what: str):
        """The write boundary of a run in progress: a full disk stops it with one line."""
        return no_space_stop(self.path, what, "everything up to the last checkpoint is kept: free some"
                             f" space, then run 'hopwell resume {self.path}'")

    # -- configuration and files ----------------------------------------------------------
    def config(self) -> dict:
        """run.toml, parsed and checked (:func:`~hopwell.sampling.run_config.read_run_config`)."""
        return read_run_config(self.path / CONFIG_FILE)

    # -- chunks ---------------------------------------------------------------------------
    def chunk_path(self, index: int) -> Path:
        return self.path / CHUNK_DIR / f"{index:06d}.npz"

    def write_chunk(self, index: int, states: dict, proposals: dict) -> None:
        """Write chunk ``index`` atomically: ``state_<field>`` and ``proposal_<field>`` arrays."""
        arrays = {f"state_{k}": np.asarray(v) for k, v in states.items()}
        arrays.update({f"proposal_{k}": np.asarray(v) for k, v in proposals.items()})
        with self.writing(f"{CHUNK_DIR}/{self.chunk_path(index).name}"):
            atomic_write_bytes(self.chunk_path(index), _npz_bytes(arrays))

    def chunk_indices(self) -> list[int]:
        return sorted(int(p.stem) for p in (self.path / CHUNK_DIR).glob("*.npz")
                      if CHUNK_NAME.fullmatch(p.name))

    def iter_chunks(self, upto: int | None = None, damaged: list[DamagedFile] | None = None):
        """Yield each chunk's arrays as a dict, in order, up to (not including) ``upto``.

        Parameters
        ----------
        upto : int, optional
        damaged : list, optional
            Where to collect a :class:`~hopwell.sampling.files.DamagedFile` (path and reason)
            for each chunk that does not load (cut short, zeroed, holding pickles); such chunks
            are skipped. Without it, the first one raises.
        """
        for index in self.chunk_indices():
            if upto is not None and index >= upto:
                break
            try:
                chunk = read_npz(self.chunk_path(index))
            except DamagedFile as exc:
                if damaged is None:
                    raise
                damaged.append(exc)
                continue
            yield chunk

    def unreadable_chunks(self, upto: int) -> list[DamagedFile]:
        """Chunks numbered below ``upto`` that are missing or whose archive does not open.

        A quick look (each archive's directory, not its data), for resume; readers that load
        the data find damage within it too (:meth:`iter_chunks`).
        """
        out = []
        for index in range(upto):
            try:
                check_archive(self.chunk_path(index))
            except DamagedFile as exc:
                out.append(exc)
        return out

    def discard_chunks_from(self, first: int) -> int:
        """Remove chunks numbered ``first`` or above (work no checkpoint counts); return how many."""
        removed = 0
        for index in self.chunk_indices():
            if index >= first:
                self.chunk_path(index).unlink()
                removed += 1
        for folder in (self.path / CHUNK_DIR, self.path):  # leftovers of interrupted writes
            for tmp in folder.glob(".*.tmp"):
                tmp.unlink(missing_ok=True)
        return removed

    # -- checkpoints ----------------------------------------------------------------------
    def write_state(self, arrays: dict) -> None:
        """Write the checkpoint, keeping the one it replaces as ``state.previous.npz``."""
        with self.writing(f"the checkpoint ({STATE_FILE})"):
            keep_previous(self.path)
            atomic_write_bytes(self.path / STATE_FILE, _npz_bytes(arrays))

    def read_state(self) -> dict | None:
        """The arrays of the checkpoint a resume would continue from (see :func:`newest_good`).

        None before the first checkpoint. Raises InputError (one line) when no good
        checkpoint is left.
        """
        checkpoint = newest_good(self.path)
        return None if checkpoint is None else checkpoint.state

    def flow_path(self, cycle: int) -> Path:
        return self.path / f"flow-{cycle:06d}.pt"

    def write_flow(self, cycle: int, data: bytes) -> Path:
        """Write the flow checkpoint of ``cycle`` (torch-saved bytes) atomically; return its path."""
        path = self.flow_path(cycle)
        with self.writing(f"the flow checkpoint ({path.name})"):
            atomic_write_bytes(path, data)
        return path

    def prune_flows(self) -> None:
        """Remove the flow checkpoints that neither state.npz nor state.previous.npz names."""
        keep = flow_files_named(self.path)
        for path in self.path.glob("flow-*.pt"):
            if path.name not in keep:
                path.unlink(missing_ok=True)

    # -- log ------------------------------------------------------------------------------
    def log(self, message: str) -> None:
        """Append one timestamped line to the progress log (durable, not atomic)."""
        line = f"{time.strftime('%Y-%m-%d %H:%M:%S')} {message}\n"
        with self.writing(LOG_FILE), open(self.path / LOG_FILE, "a") as handle:
            handle.write(line)
            handle.flush()
            os.fsync(handle.fileno())
