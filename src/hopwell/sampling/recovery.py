"""What resume and report do with a damaged run directory: recover where that is safe, name the rest.

Each finding is written to the run's progress log and handed to the caller's ``notice``
callback (the command line prints it as a warning), so nothing is dropped silently.

- **Checkpoint.** A damaged state.npz (or a damaged flow file it names) falls back to
  state.previous.npz (:func:`~hopwell.sampling.checkpoint.newest_good`). Resume copies the
  previous checkpoint over state.npz, so the next checkpoint keeps a good previous one, and
  says what is dropped: the chunks written after the previous checkpoint, whose cycles are
  sampled again. With no good checkpoint left, resume stops with one line.
- **Chunks.** A chunk the checkpoint counts that is missing or does not open is left as it is
  (never deleted: a backup copy can take its place) and named; its records are lost to the
  report, which skips it and names it too. The run's sample counter still counts those
  records, so the budget is not stretched to replace them: the report shows fewer samples.
- **Topology.** A missing topology.pdb of a small molecule is rebuilt exactly as the run's start
  wrote it (one residue, atoms named by element and count, the first seed's coordinates from
  molecule.sdf). A peptide's topology comes from its input PDB and cannot be rebuilt here: one
  line names the file and the fix.
"""

from __future__ import annotations

import io

import openmm
from openmm import app

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.checkpoint import PREVIOUS_STATE_FILE, STATE_FILE, Checkpoint, newest_good, reinstate_previous
from hopwell.sampling.files import read_molecules
from hopwell.sampling.store import RunStore
from hopwell.systems.builder import _small_topology, conformer_positions_nm

TOPOLOGY_FILE = "topology.pdb"


def _tell(store: RunStore, notice, message: str) -> None:
    store.log(f"resume: {message}")
    if notice is not None:
        notice(message)


def _chunk_span(first: int, last: int) -> str:
    return f"chunk {first:06d}" if first == last else f"chunks {first:06d}-{last:06d}"


def checkpoint_for_resume(store: RunStore, notice=None) -> Checkpoint | None:
    """The checkpoint a resume continues from, after the recoveries described above.

    Parameters
    ----------
    store : RunStore
        A run directory this process holds the write lock of.
    notice : callable, optional
        Called with one line for each damage found and what was done about it.

    Returns
    -------
    Checkpoint or None
        None when the run has no checkpoint yet.

    Raises
    ------
    InputError
        No good checkpoint is left.
    """
    checkpoint = newest_good(store.path)
    if checkpoint is None:
        return None
    if checkpoint.file == PREVIOUS_STATE_FILE:
        dropped = [i for i in store.chunk_indices() if i >= checkpoint.next_chunk]
        _tell(store, notice, f"{checkpoint.passed_over[0]}; continuing from the previous checkpoint"
                             f" (cycle {checkpoint.cycle})" + (
                                 f"; dropped {_chunk_span(dropped[0], dropped[-1])}, written after it,"
                                 " and sampling those cycles again" if dropped else ""))
        with store.writing(f"the checkpoint ({STATE_FILE})"):  # logged first: a kill here is told too
            reinstate_previous(store.path)
    for damage in store.unreadable_chunks(checkpoint.next_chunk):
        _tell(store, notice, f"{damage}: its records are lost; it is kept as it is and the run samples on"
                             " ('hopwell report' skips it; restore it from a backup to count it again)")
    return checkpoint


def ensure_topology(store: RunStore) -> str | None:
    """Rebuild a small molecule's missing topology.pdb; return a line saying so, or None if present.

    Raises
    ------
    InputError
        A peptide run's topology.pdb is missing (it cannot be rebuilt without the input PDB).
    """
    path = store.path / TOPOLOGY_FILE
    if path.is_file():
        return None
    if store.config().get("kind") == "peptide":
        raise InputError(f"{path} is missing; a peptide's topology comes from its input PDB"
                         f" ({store.config().get('input', 'see run.toml')}): restore topology.pdb from a backup")
    mol = read_molecules(store.path / "molecule.sdf")[0]
    out = io.StringIO()
    app.PDBFile.writeFile(_small_topology(mol), conformer_positions_nm(mol)[0] * openmm.unit.nanometer, out)
    with store.writing(TOPOLOGY_FILE):
        atomic_write_bytes(path, out.getvalue().encode())
    message = f"{path} was missing; rebuilt from molecule.sdf"
    store.log(message)
    return message
