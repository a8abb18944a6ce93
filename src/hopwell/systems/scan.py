"""Relaxed torsion scans: the energy profile along one dihedral, everything else minimized."""

from __future__ import annotations

import copy

import numpy as np
import openmm

from hopwell.systems.energy import EnergyEvaluator

RESTRAINT_GROUP = 31
# Stiff enough that the minimized dihedral sits within ~0.1 degree of its target for the
# barriers of organic torsions (tens of kJ/mol); the restraint energy is excluded from the
# reported profile.
RESTRAINT_K_KJ_RAD2 = 1.0e5


def relaxed_torsion_scan(
    system: openmm.System,
    positions_nm: np.ndarray,
    atoms: tuple[int, int, int, int],
    angles_rad: np.ndarray,
    platform: str | None = None,
) -> np.ndarray:
    """Minimized energy with one dihedral held at each of ``angles_rad``.

    Parameters
    ----------
    system : openmm.System
        Not modified (a copy carries the restraint).
    positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
        Starting structure; each scan point starts from the previous minimum.
    atoms : tuple of 4 int
        The dihedral's atoms.
    angles_rad : numpy.ndarray, shape ``(n_points,)``
    platform : str, optional

    Returns
    -------
    numpy.ndarray, shape ``(n_points,)``
        Potential energy (kJ/mol) without the restraint.
    """
    restrained = copy.deepcopy(system)
    restraint = openmm.CustomTorsionForce("0.5*k*d^2; d = atan2(sin(theta - t0), cos(theta - t0))")
    restraint.addGlobalParameter("t0", 0.0)
    restraint.addGlobalParameter("k", RESTRAINT_K_KJ_RAD2)
    restraint.addTorsion(*atoms, [])
    restraint.setForceGroup(RESTRAINT_GROUP)
    restrained.addForce(restraint)
    evaluator = EnergyEvaluator(restrained, 300.0, platform=platform)
    physical = set(range(32)) - {RESTRAINT_GROUP}
    x = np.asarray(positions_nm, dtype=float)
    out = np.empty(len(angles_rad))
    for k, angle in enumerate(angles_rad):
        evaluator.context.setParameter("t0", float(angle))
        x = evaluator.minimize(x, tolerance_kj_nm=0.01)[0]
        out[k] = evaluator.energies_kj(x, groups=physical)[0]
    return out
