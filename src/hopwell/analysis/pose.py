"""The population of a structure the user cares about (a bound pose) and its conformational cost.

A pose is matched by torsion wells, not by RMSD: the samples "near the pose" are those whose
state torsions fall in the same wells as the pose's (and, for saturated six-rings, the same
pucker with the same substituents axial), under the report's own state model. Why wells: they
are what the report's states are made of, so the pose's population is consistent with the
population table (the pose's state is one of its rows, or a sub-state of "other"), and it
needs no cutoff; a heavy-atom RMSD cutoff would change the answer with its value and with
the molecule's size, and counts a far-off end group as much as the core.

Matching is symmetry-aware: the pose's heavy atoms are mapped onto the run's molecule by
every graph match (RDKit substructure matches without uniquifying, so equivalent groups map
both ways), and a sample counts as near the pose if it matches the pose under any of them.

The conformational free-energy cost of holding the molecule in the pose's wells is
``dG = -kT ln p``, with the interval mapped from that of ``p`` (``-kT ln`` is monotone); a
state never sampled has ``p = 0`` and an unbounded cost, and its interval still has a finite
upper bound on ``p`` from the Jeffreys floor of :func:`hopwell.analysis.stats.population_estimate`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from rdkit import Chem

from hopwell.analysis import stats
from hopwell.analysis.states import StateModel
from hopwell.errors import InputError

MAX_MATCHES = 512  # graph matches enumerated (symmetric molecules have many; all are equivalent)


@dataclass(frozen=True)
class PoseResult:
    """The pose's population and cost.

    Attributes
    ----------
    states : tuple of str
        The report's states that hold the pose's wells (one per distinct symmetry image; empty
        when no sampled state does).
    population : float
    ci95 : tuple of float
    dG_kJ_per_mol : float
        ``-kT ln p``; ``inf`` when ``p = 0``.
    dG_ci95_kJ_per_mol : tuple of float
        From the upper and lower bounds of ``p``; ``inf`` where a bound is 0.
    """

    states: tuple
    population: float
    ci95: tuple
    dG_kJ_per_mol: float
    dG_ci95_kJ_per_mol: tuple

    def as_dict(self) -> dict:
        """JSON-ready: an unbounded cost is null."""
        def finite(x):
            return float(x) if math.isfinite(x) else None

        return {"states": list(self.states), "population": self.population, "ci95": list(self.ci95),
                "dG_kJ_per_mol": finite(self.dG_kJ_per_mol),
                "dG_ci95_kJ_per_mol": [finite(x) for x in self.dG_ci95_kJ_per_mol],
                "matched_by": "torsion wells"}


def read_pose(path: Path) -> Chem.Mol:
    """The pose's heavy atoms with its coordinates (Angstrom) from one SDF/MOL/MOL2 structure.

    Hydrogens are not needed (docking poses often have none); InputError if the file is not
    one readable structure.
    """
    from hopwell.systems.inputs import read_input

    path = Path(path)
    if path.suffix.lower() not in {".sdf", ".mol", ".mol2"}:
        raise InputError(f"{path}: a pose must be an .sdf, .mol or .mol2 file")
    mol = read_input(str(path), add_hydrogens=True).mol
    if mol.GetNumConformers() != 1:
        raise InputError(f"{path}: holds {mol.GetNumConformers()} structures; a pose file needs exactly one")
    return Chem.RemoveHs(mol)


def pose_images(pose: Chem.Mol, mol: Chem.Mol, model_torsions) -> np.ndarray:
    """The pose's coordinates placed on ``mol``'s atoms, once per graph match.

    Parameters
    ----------
    pose : rdkit.Chem.Mol
        Heavy atoms, one conformer (Angstrom).
    mol : rdkit.Chem.Mol
        The run's molecule (explicit hydrogens).
    model_torsions : sequence of (atoms, period)
        The state model's dihedrals; every atom they name must be a heavy atom of the pose.

    Returns
    -------
    numpy.ndarray, shape ``(n_matches, mol.GetNumAtoms(), 3)``
        Nanometres; atoms not in the pose (hydrogens) are NaN.
    """
    heavy = sum(a.GetAtomicNum() > 1 for a in mol.GetAtoms())
    if pose.GetNumAtoms() != heavy:
        raise InputError(f"the pose has {pose.GetNumAtoms()} heavy atoms and the run's molecule {heavy}:"
                         " not the same molecule")
    matches = mol.GetSubstructMatches(pose, uniquify=False, maxMatches=MAX_MATCHES, useChirality=False)
    if not matches:
        raise InputError("the pose is not the run's molecule (no match of its bond graph)")
    needed = {a for atoms, _ in model_torsions for a in atoms}
    xyz = pose.GetConformer().GetPositions() / 10.0
    images = np.full((len(matches), mol.GetNumAtoms(), 3), np.nan)
    for k, match in enumerate(matches):
        images[k, list(match)] = xyz
        if not needed <= set(match):
            raise InputError("the report's state torsions name atoms the pose lacks")
    return images


def _keys(model, dihedrals_rad: np.ndarray) -> np.ndarray:
    """What two samples must share to be in the same wells: every torsion's well and ring code
    under a torsion-well model, else the model's state."""
    if isinstance(model, StateModel) and model.kind == "torsions":
        return model.wells(dihedrals_rad)
    return np.asarray(model.assign(dihedrals_rad))[:, None]


def near_pose(model, pose_dihedrals_rad: np.ndarray, dihedrals_rad: np.ndarray) -> np.ndarray:
    """Whether each sample (``dihedrals_rad``, ``(n, n_torsions)``) lies in the wells of any of
    the pose's symmetry images (``pose_dihedrals_rad``, ``(n_images, n_torsions)``)."""
    images = {tuple(row) for row in _keys(model, pose_dihedrals_rad).tolist()}
    keys = _keys(model, dihedrals_rad)
    return np.array([tuple(row) in images for row in keys.tolist()], dtype=bool)


def pose_states(model, pose_dihedrals_rad: np.ndarray) -> tuple:
    """Names of the report's states holding the pose's images ("other" left out)."""
    labels = sorted(set(np.asarray(model.assign(pose_dihedrals_rad)).tolist()))
    return tuple(model.names[s] for s in labels if s != len(model.names) - 1)


def pose_population(near_series: np.ndarray, kT: float, rng: np.random.Generator,
                    n_boot: int = 1000) -> tuple[float, tuple, float, tuple]:
    """Population of the samples near the pose, its 95% interval, and the cost -kT ln p with
    its interval, from each walker's boolean series ``(n_walkers, n_samples)``."""
    result = stats.population_estimate(np.asarray(near_series, dtype=int), 2, rng, n_boot=n_boot)
    p, lo, hi = float(result.populations[1]), float(result.lower[1]), float(result.upper[1])

    def cost(x):
        return -kT * math.log(x) if x > 0 else math.inf

    return p, (lo, hi), cost(p), (cost(hi), cost(lo))
