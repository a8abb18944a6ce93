"""The checkpoints of a run directory: the newest, the one before it, and which one is good.

A run directory keeps two sampler checkpoints::

    DIR/state.npz            the newest checkpoint
    DIR/state.previous.npz   the checkpoint state.npz replaced, kept as a fallback

each with the flow file it names (``flow-NNNNNN.pt``; flow files are pruned only when neither
checkpoint names them). Before state.npz is replaced, its bytes are copied atomically to
state.previous.npz (:func:`keep_previous`), so at every instant, ``kill -9`` included, both
names hold whole checkpoints, the previous one at most one chunk-write older.

A checkpoint is *good* when its arrays load without pickles, it holds every array a restore
needs, its counters parse, and the flow file it names (a plain ``flow-NNNNNN.pt`` of the same
directory) loads as a torch state dict with ``weights_only=True``. :func:`newest_good` takes
state.npz when it is good and otherwise falls back to state.previous.npz, saying why the newer
one was passed over; restoring from the previous checkpoint drops the chunks written after it
(numbered at or above its ``next_chunk``) and samples those cycles again, exactly as after a
crash, so nothing is counted twice. One fallback is kept, not more: a damaged checkpoint is a
rare event, and each extra one costs a state file and a flow file on disk.

A *missing* state.npz with chunks beside it is not a crash (the file never disappears once
written): that is refused, not guessed at, by the callers.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from pathlib import Path

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.files import DamagedFile, read_npz, read_weights

STATE_FILE = "state.npz"
PREVIOUS_STATE_FILE = "state.previous.npz"
# The arrays every restore reads (the sampler's own extras, such as dart centres, are optional).
STATE_ARRAYS = ("cycle", "next_chunk", "training_end_cycle", "elapsed_s", "production_samples",
                "positions_nm", "energies_kj", "flow_file", "rng", "torch_rng", "stats")
FLOW_NAME = re.compile(r"flow-\d{6}\.pt")
FLOW_KEYS = ("flow", "optimizer")


@dataclass(frozen=True)
class Checkpoint:
    """A good checkpoint: its arrays, its flow's state dict, and how it was chosen.

    Attributes
    ----------
    state : dict
        The arrays of the checkpoint file.
    flow : dict
        The flow checkpoint it names (``flow`` and ``optimizer`` state dicts).
    file : str
        Which file it is: ``state.npz`` or ``state.previous.npz``.
    passed_over : tuple of str
        Why a newer checkpoint was not used (one line each); empty for state.npz.
    """

    state: dict
    flow: dict
    file: str
    passed_over: tuple[str, ...] = ()

    @property
    def cycle(self) -> int:
        return int(self.state["cycle"])

    @property
    def next_chunk(self) -> int:
        return int(self.state["next_chunk"])


def read_checkpoint(run_dir: Path, name: str) -> Checkpoint:
    """Checkpoint file ``name`` of ``run_dir`` and its flow file, checked as described above.

    Raises
    ------
    DamagedFile
        The checkpoint or its flow file is missing, unreadable or incomplete.
    """
    path = Path(run_dir) / name
    state = read_npz(path, STATE_ARRAYS)
    flow_name = str(state["flow_file"])
    if not FLOW_NAME.fullmatch(flow_name):
        raise DamagedFile(path, f"names {flow_name!r}, not a flow file of this directory")
    try:
        json.loads(str(state["stats"]))
    except ValueError:
        raise DamagedFile(path, "its move counters do not parse") from None
    try:
        flow = read_weights(Path(run_dir) / flow_name, FLOW_KEYS)
    except DamagedFile as exc:
        raise DamagedFile(path, f"its flow file {flow_name} is {exc.reason}") from None
    return Checkpoint(state, flow, name)


class NoGoodCheckpoint(InputError):
    """Neither checkpoint of a run is good; the message has one part for each and the fix."""

    def __init__(self, run_dir: Path, damage: list[str]):
        super().__init__("; ".join(damage) + f"; no good checkpoint is left, so the run cannot continue"
                         f" (restore state.npz from a backup); 'hopwell report {run_dir}' still reads its chunks")


def newest_good(run_dir: Path) -> Checkpoint | None:
    """The checkpoint a resume continues from: state.npz if good, else the previous one.

    Returns
    -------
    Checkpoint or None
        None when there is no state.npz (a start killed before its first checkpoint).

    Raises
    ------
    NoGoodCheckpoint
        state.npz is damaged and no good previous checkpoint is kept.
    """
    run_dir = Path(run_dir)
    if not (run_dir / STATE_FILE).exists():
        return None
    try:
        return read_checkpoint(run_dir, STATE_FILE)
    except DamagedFile as exc:
        newest = str(exc)
    if not (run_dir / PREVIOUS_STATE_FILE).exists():
        raise NoGoodCheckpoint(run_dir, [newest, f"no {PREVIOUS_STATE_FILE} is kept"])
    try:
        previous = read_checkpoint(run_dir, PREVIOUS_STATE_FILE)
    except DamagedFile as exc:
        raise NoGoodCheckpoint(run_dir, [newest, str(exc)]) from None
    return Checkpoint(previous.state, previous.flow, PREVIOUS_STATE_FILE, (newest,))


def newest_readable(run_dir: Path) -> tuple[dict | None, list[str]]:
    """For readers that need a checkpoint's counters only (a report): the newest one whose arrays load.

    state.npz if its arrays load and hold the move counters, else state.previous.npz; the flow
    file is not needed here. A state.npz whose flow file is damaged is still read, as its
    counters agree with the chunks it counts.

    Returns
    -------
    state : dict or None
        None before the first checkpoint, or when neither file loads.
    passed_over : list of str
        One line for each checkpoint file that did not load.
    """
    run_dir, passed_over = Path(run_dir), []
    if not (run_dir / STATE_FILE).exists():
        return None, []
    for name in (STATE_FILE, PREVIOUS_STATE_FILE):
        try:
            return read_npz(run_dir / name, ("stats",)), passed_over
        except DamagedFile as exc:
            passed_over.append(str(exc))
    return None, passed_over


def keep_previous(run_dir: Path) -> None:
    """Copy state.npz to state.previous.npz (atomically), before state.npz is replaced."""
    current = Path(run_dir) / STATE_FILE
    if current.exists():
        atomic_write_bytes(Path(run_dir) / PREVIOUS_STATE_FILE, current.read_bytes())


def reinstate_previous(run_dir: Path) -> None:
    """Copy state.previous.npz over a damaged state.npz (atomically), so the next checkpoint keeps a good one."""
    atomic_write_bytes(Path(run_dir) / STATE_FILE, (Path(run_dir) / PREVIOUS_STATE_FILE).read_bytes())


def flow_files_named(run_dir: Path) -> set[str]:
    """The flow files the checkpoints of ``run_dir`` name (those that can be read)."""
    names = set()
    for name in (STATE_FILE, PREVIOUS_STATE_FILE):
        try:
            names.add(str(read_npz(Path(run_dir) / name, ("flow_file",))["flow_file"]))
        except DamagedFile:
            continue
    return names
