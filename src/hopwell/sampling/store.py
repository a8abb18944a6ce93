"""The run directory: configuration, system, append-only sample chunks, checkpoints, log.

Layout of a run directory ``DIR``::

    DIR/run.toml            resolved configuration (written once, at the start)
    DIR/molecule.sdf        the molecule and its seed structures (Angstrom, as SDF keeps them)
    DIR/topology.pdb        the OpenMM topology (first seed), for trajectories and peptides
    DIR/system.xml          the OpenMM system
    DIR/chunks/NNNNNN.npz   sample chunks, numbered from 0, each written atomically
    DIR/state.npz           the sampler checkpoint (walker states, counters, RNG state)
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
"""

from __future__ import annotations

import fcntl
import io
import os
import time
import tomllib
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError

CHUNK_DIR = "chunks"
STATE_FILE = "state.npz"
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
        (path / CHUNK_DIR).mkdir(parents=True, exist_ok=True)
        store = cls(path)
        for name, data in files.items():
            atomic_write_bytes(path / name, data)
        atomic_write_bytes(path / CONFIG_FILE, to_toml(config).encode())  # last: marks a run
        return store

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

    # -- configuration and files ----------------------------------------------------------
    def config(self) -> dict:
        with open(self.path / CONFIG_FILE, "rb") as handle:
            return tomllib.load(handle)

    def read_text(self, name: str) -> str:
        return (self.path / name).read_text()

    # -- chunks ---------------------------------------------------------------------------
    def chunk_path(self, index: int) -> Path:
        return self.path / CHUNK_DIR / f"{index:06d}.npz"

    def write_chunk(self, index: int, states: dict, proposals: dict) -> None:
        """Write chunk ``index`` atomically: ``state_<field>`` and ``proposal_<field>`` arrays."""
        arrays = {f"state_{k}": np.asarray(v) for k, v in states.items()}
        arrays.update({f"proposal_{k}": np.asarray(v) for k, v in proposals.items()})
        atomic_write_bytes(self.chunk_path(index), _npz_bytes(arrays))

    def chunk_indices(self) -> list[int]:
        return sorted(int(p.stem) for p in (self.path / CHUNK_DIR).glob("[0-9]*.npz"))

    def iter_chunks(self, upto: int | None = None):
        """Yield each chunk's arrays as a dict, in order, up to (not including) ``upto``."""
        for index in self.chunk_indices():
            if upto is not None and index >= upto:
                break
            with np.load(self.chunk_path(index)) as data:
                yield {k: data[k] for k in data.files}

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
        atomic_write_bytes(self.path / STATE_FILE, _npz_bytes(arrays))

    def read_state(self) -> dict | None:
        path = self.path / STATE_FILE
        if not path.exists():
            return None
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}

    def flow_path(self, cycle: int) -> Path:
        return self.path / f"flow-{cycle:06d}.pt"

    def prune_flows(self, keep: Path) -> None:
        """Remove flow checkpoints other than ``keep`` (the one the sampler state names)."""
        for path in self.path.glob("flow-*.pt"):
            if path != keep:
                path.unlink(missing_ok=True)

    # -- log ------------------------------------------------------------------------------
    def log(self, message: str) -> None:
        """Append one timestamped line to the progress log (durable, not atomic)."""
        line = f"{time.strftime('%Y-%m-%d %H:%M:%S')} {message}\n"
        with open(self.path / LOG_FILE, "a") as handle:
            handle.write(line)
            handle.flush()
            os.fsync(handle.fileno())
