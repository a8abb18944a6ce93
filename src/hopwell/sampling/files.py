"""Reading single files of a run directory without trusting them.

Nothing read from a run directory can run code: arrays load with ``allow_pickle=False``, flow
checkpoints with ``torch.load(..., weights_only=True)`` (tensors and plain containers only),
configurations with :mod:`tomllib`. A file that cannot be read that way (cut short, overwritten
with zeros or random bytes, holding pickled objects) raises :class:`DamagedFile`, which names the
file and says what is wrong with it; the caller decides whether to skip it, fall back to an
older copy, or stop with that line.
"""

from __future__ import annotations

import pickle
import warnings
import zipfile
from pathlib import Path

import numpy as np

from hopwell.errors import InputError

# What numpy, zipfile and torch raise on a file that is not what it claims to be.
_UNREADABLE = (OSError, EOFError, ValueError, RuntimeError, KeyError, zipfile.BadZipFile,
               pickle.UnpicklingError)

RESTORE = "hopwell writes it once, when the run starts: restore it from a backup"


class DamagedFile(InputError):
    """A file of a run directory exists but cannot be read; ``path`` and ``reason`` say which and why."""

    def __init__(self, path: Path, reason: str, fix: str = ""):
        self.path, self.reason = Path(path), reason
        what = f"{path} is missing" if reason == "missing" else f"{path} is damaged ({reason})"
        super().__init__(what + (f"; {fix}" if fix else ""))


def damage_reason(exc: BaseException) -> str:
    """A short account of why a file did not load, from the exception its reader raised."""
    if isinstance(exc, FileNotFoundError):
        return "missing"
    if isinstance(exc, EOFError):
        return "empty or cut short"
    if isinstance(exc, zipfile.BadZipFile):
        return "not a whole archive: cut short or overwritten"
    if isinstance(exc, pickle.UnpicklingError):
        return "not plain tensors: refused unread (weights only)"
    if "pickle" in str(exc).lower():
        return "not plain arrays: unknown or pickled data, refused unread"
    first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return first if len(first) <= 100 else first[:97] + "..."


def read_npz(path: Path, required: tuple[str, ...] = ()) -> dict:
    """Every array of an ``.npz`` file, loaded eagerly (so a bad CRC shows here), no pickles.

    Parameters
    ----------
    path : Path
    required : tuple of str
        Array names the file must hold.

    Raises
    ------
    DamagedFile
        The file is missing, unreadable, or lacks a required array.
    """
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except _UNREADABLE as exc:
        raise DamagedFile(path, damage_reason(exc)) from None
    missing = [k for k in required if k not in arrays]
    if missing:
        raise DamagedFile(path, f"no {', '.join(missing)}")
    return arrays


def check_archive(path: Path) -> None:
    """Open an ``.npz`` archive's directory without reading its arrays (a quick look).

    Raises
    ------
    DamagedFile
        The file is missing, or is not a whole zip archive (cut short, zeroed, random bytes).
    """
    try:
        with np.load(path, allow_pickle=False) as data:
            names = data.files
    except _UNREADABLE as exc:
        raise DamagedFile(path, damage_reason(exc)) from None
    if not names:
        raise DamagedFile(path, "an archive of no arrays")


def read_weights(path: Path, required: tuple[str, ...] = ()) -> dict:
    """A torch state dict loaded with ``weights_only=True``: tensors and plain containers only.

    Raises
    ------
    DamagedFile
        The file is missing, unreadable, holds anything else (a pickle that would build other
        objects is refused before it runs), or lacks a required key.
    """
    import torch

    try:
        with warnings.catch_warnings():  # torch warns about pickle protocols it then refuses
            warnings.simplefilter("ignore")
            saved = torch.load(path, weights_only=True, map_location="cpu")
    except _UNREADABLE as exc:
        raise DamagedFile(path, damage_reason(exc)) from None
    if not isinstance(saved, dict) or any(k not in saved for k in required):
        raise DamagedFile(path, f"not a flow checkpoint (needs {', '.join(required)})")
    return saved


def read_molecules(path: Path) -> list:
    """The records of a run's molecule.sdf (RDKit molecules, hydrogens kept), at least one.

    Raises
    ------
    InputError
        The file is missing or a record does not parse.
    """
    from rdkit import Chem

    if not Path(path).is_file():
        raise InputError(f"{path} is missing; {RESTORE}")
    records = list(Chem.SDMolSupplier(str(path), removeHs=False))
    if not records or any(m is None for m in records):
        raise DamagedFile(path, "a record does not parse as a molecule", RESTORE)
    return records


def read_system(path: Path):
    """The OpenMM system of a run's system.xml.

    Raises
    ------
    InputError
        The file is missing or does not deserialize.
    """
    import openmm

    if not Path(path).is_file():
        raise InputError(f"{path} is missing; {RESTORE}")
    try:
        return openmm.XmlSerializer.deserialize(Path(path).read_text())
    except Exception as exc:  # OpenMM raises a bare Exception on any parse failure
        raise DamagedFile(path, damage_reason(exc), RESTORE) from None
