"""Peptide backbone regions, and seeds: one minimized structure per region and residue.

The regions (phi, psi in degrees) are tabulated in :mod:`hopwell.analysis.states`.

A walker only samples basins it is shown or can reach (the method's known limit), and a peptide
PDB usually holds one structure. The backbone regions of the trade are known in advance, so each
residue's (phi, psi) is set in turn to the centre of each region, the structure is minimized with
the torsions restrained there and then without restraint, and every structure whose regions
(over all residues) differ from those already kept becomes a seed. A centre whose region has no
minimum relaxes into a neighbouring region and adds nothing.

Region centres (degrees) are typical minimum positions of alanine dipeptide, common practice
from memory; only their membership in the regions of :mod:`hopwell.analysis.states` matters here.
"""

from __future__ import annotations

import copy

import mdtraj as md
import numpy as np
import openmm
from openmm import app, unit

REGION_CENTRES_DEG = {
    "C7eq": (-83.0, 75.0),
    "C5/beta": (-155.0, 160.0),
    "PII": (-75.0, 145.0),
    "alphaR": (-65.0, -40.0),
    "C7ax": (75.0, -65.0),
    "alphaL": (60.0, 40.0),
}
BACKBONE_STATES = ("C7eq", "C5/beta", "PII", "alphaR", "C7ax", "alphaL")
RESTRAINT_KJ_RAD2 = 1000.0  # holds a torsion within a few degrees during the first minimization
MINIMIZE_TOLERANCE_KJ_NM = 1.0


def backbone_state(phi_deg: np.ndarray, psi_deg: np.ndarray) -> np.ndarray:
    """Backbone region index (into :data:`BACKBONE_STATES`) for each (phi, psi), degrees."""
    phi, psi = np.asarray(phi_deg), np.asarray(psi_deg)
    extended = (psi >= 120) | (psi < -120)
    out = np.full(phi.shape, BACKBONE_STATES.index("alphaR"))
    left = phi < 0
    out[left & (psi >= 0) & (psi < 120)] = BACKBONE_STATES.index("C7eq")
    out[left & extended & (phi < -120)] = BACKBONE_STATES.index("C5/beta")
    out[left & extended & (phi >= -120)] = BACKBONE_STATES.index("PII")
    out[~left & (psi >= 0) & (psi < 120)] = BACKBONE_STATES.index("alphaL")
    out[~left & ((psi >= 120) | (psi < 0))] = BACKBONE_STATES.index("C7ax")
    return out


def backbone_torsions(topology: app.Topology) -> list[tuple[np.ndarray, np.ndarray]]:
    """(phi atoms, psi atoms) of every residue that has both, in chain order (mdtraj's)."""
    traj = md.Trajectory(np.zeros((1, topology.getNumAtoms(), 3)), md.Topology.from_openmm(topology))
    phi, _ = md.compute_phi(traj)
    psi, _ = md.compute_psi(traj)
    psi_by_ca = {int(q[1]): q for q in psi}  # psi = N-CA-C-N(next): CA is its second atom
    return [(q, psi_by_ca[int(q[2])]) for q in phi if int(q[2]) in psi_by_ca]


def rotate_about_bond(positions_nm: np.ndarray, bonds: list[tuple[int, int]], quad: np.ndarray,
                      target_rad: float) -> np.ndarray:
    """Set the dihedral ``quad`` (i, j, k, l) to ``target_rad`` by turning the k side about j-k.

    Parameters
    ----------
    positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
    bonds : list of (int, int)
        The bond graph; the bond j-k must not be in a ring.
    quad : array of 4 ints
    target_rad : float

    Returns
    -------
    numpy.ndarray, shape ``(n_atoms, 3)``
    """
    i, j, k, l = (int(a) for a in quad)
    side = _side_of(bonds, j, k, len(positions_nm))
    current = float(md.compute_dihedrals(md.Trajectory(positions_nm[None].astype(np.float32), None),
                                         np.array([[i, j, k, l]]))[0, 0])
    axis = positions_nm[k] - positions_nm[j]
    axis /= np.linalg.norm(axis)
    angle = target_rad - current
    # Rodrigues' rotation formula about the axis through atom k.
    rel = positions_nm[side] - positions_nm[k]
    cos, sin = np.cos(angle), np.sin(angle)
    rotated = rel * cos + np.cross(axis, rel) * sin + np.outer(rel @ axis, axis) * (1 - cos)
    out = positions_nm.copy()
    out[side] = positions_nm[k] + rotated
    return out


def _in_ring(bonds: list[tuple[int, int]], j: int, k: int) -> bool:
    """Whether the bond j-k lies in a ring (k reaches j without it)."""
    try:
        _side_of(bonds, int(j), int(k), 1 + max(max(b) for b in bonds))
    except ValueError:
        return True
    return False


def _side_of(bonds: list[tuple[int, int]], j: int, k: int, n_atoms: int) -> np.ndarray:
    """Atoms reached from k without crossing the bond j-k."""
    neighbours: list[list[int]] = [[] for _ in range(n_atoms)]
    for a, b in bonds:
        neighbours[a].append(b)
        neighbours[b].append(a)
    seen, stack = {k}, [k]
    while stack:
        atom = stack.pop()
        for other in neighbours[atom]:
            if other in seen or (atom == k and other == j):
                continue
            if other == j:
                raise ValueError(f"bond {j}-{k} is in a ring")
            seen.add(other)
            stack.append(other)
    return np.array(sorted(seen))


def backbone_seeds(topology: app.Topology, system: openmm.System,
                   positions_nm: np.ndarray) -> tuple[np.ndarray, list[tuple[str, ...]]]:
    """Seeds in every backbone region reachable by minimization, one residue changed at a time.

    Parameters
    ----------
    topology : openmm.app.Topology
    system : openmm.System
    positions_nm : numpy.ndarray, shape ``(n_structures, n_atoms, 3)``
        The input structures; all are kept, first.

    Returns
    -------
    seeds_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
    regions : list of tuple of str
        The regions of each seed, one name per residue.
    """
    bonds = [(b.atom1.index, b.atom2.index) for b in topology.bonds()]
    # Residues whose phi or psi turns a ring bond (proline's N-CA, a cyclic backbone) keep
    # their input torsions: a rigid rotation of one side would tear the ring.
    pairs = [(phi, psi) for phi, psi in backbone_torsions(topology)
             if not (_in_ring(bonds, phi[1], phi[2]) or _in_ring(bonds, psi[1], psi[2]))]
    if not pairs:
        return np.asarray(positions_nm), [() for _ in positions_nm]
    quads = np.array([q for pair in pairs for q in pair])

    def regions(x_nm):
        angles = np.degrees(md.compute_dihedrals(md.Trajectory(x_nm[None].astype(np.float32), None), quads)[0])
        return tuple(BACKBONE_STATES[s] for s in backbone_state(angles[0::2], angles[1::2]))

    free = _Minimizer(system)
    kept = [np.asarray(x) for x in positions_nm]
    seen = [regions(x) for x in kept]
    for start in list(kept):
        for residue, (phi, psi) in enumerate(pairs):
            for phi_deg, psi_deg in REGION_CENTRES_DEG.values():
                x = rotate_about_bond(start, bonds, phi, np.radians(phi_deg))
                x = rotate_about_bond(x, bonds, psi, np.radians(psi_deg))
                restrained = _Minimizer(system, [(phi, phi_deg), (psi, psi_deg)])
                x = free.minimize(restrained.minimize(x))
                label = regions(x)
                if label not in seen and np.isfinite(free.energy_kj(x)):
                    kept.append(x)
                    seen.append(label)
    return np.stack(kept), seen


class _Minimizer:
    """An OpenMM context for minimization, optionally with harmonic torsion restraints."""

    def __init__(self, system: openmm.System, restraints=()):
        system = copy.deepcopy(system)
        if restraints:
            force = openmm.CustomTorsionForce("0.5*k*min(d, 6.283185307179586-d)^2; d=abs(theta-theta0)")
            force.addGlobalParameter("k", RESTRAINT_KJ_RAD2)
            force.addPerTorsionParameter("theta0")
            for quad, target_deg in restraints:
                force.addTorsion(*(int(a) for a in quad), [np.radians(target_deg)])
            system.addForce(force)
        self.context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                                      openmm.Platform.getPlatformByName("Reference"))

    def minimize(self, positions_nm: np.ndarray) -> np.ndarray:
        self.context.setPositions(positions_nm)
        openmm.LocalEnergyMinimizer.minimize(self.context, MINIMIZE_TOLERANCE_KJ_NM, 0)
        state = self.context.getState(getPositions=True)
        return state.getPositions(asNumpy=True).value_in_unit(unit.nanometer)

    def energy_kj(self, positions_nm: np.ndarray) -> float:
        self.context.setPositions(positions_nm)
        return self.context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
