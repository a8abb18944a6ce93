"""The ring reflection: a saturated ring mirrored through its mean plane, substituents carried along.

For an isolated saturated ring of five to seven atoms, the ring atoms are reflected through
their least-squares mean plane and every branch hanging off a ring atom is carried rigidly in
that atom's right-handed local frame. The map is its own inverse, keeps volume and keeps every
atom's handedness; it takes one chair of a six-ring onto the other (axial <-> equatorial) and
an envelope of a five-ring onto its mirror envelope. Being a deterministic volume-preserving
involution, it is an exact Metropolis-Hastings proposal with acceptance ``min(1, exp(-du))``:
a deterministic move whose Jacobian factor is 1 (Green 1995, Biometrika 82:711).

Used by the ring-flip move (:mod:`hopwell.moves.ring_flip`) and by the RDKit Monte Carlo
reference (:mod:`hopwell.bench.mmff_mc`), which takes its energies from RDKit and its acceptance
rule from its own code.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np
from rdkit import Chem


@dataclass(frozen=True)
class RingReflection:
    """One ring to reflect: its atoms in bonded order and each ring atom's branch atoms.

    Attributes
    ----------
    ring : numpy.ndarray of int, shape ``(n_ring,)``
    branches : tuple of numpy.ndarray of int
        Per ring atom, in ring order, every atom reached from it without entering the ring.
    """

    ring: np.ndarray
    branches: tuple[np.ndarray, ...]


def _reachable(mol: Chem.Mol, start: int, blocked: int) -> set[int]:
    """Atoms reachable from ``start`` without stepping onto ``blocked`` (breadth first)."""
    seen, queue = {start, blocked}, deque([start])
    while queue:
        for nbr in mol.GetAtomWithIdx(queue.popleft()).GetNeighbors():
            if nbr.GetIdx() not in seen:
                seen.add(nbr.GetIdx())
                queue.append(nbr.GetIdx())
    return seen - {blocked}


def bonded_order(mol: Chem.Mol, ring: tuple[int, ...]) -> list[int]:
    """The ring's atoms in bonded order around the ring, starting at ``ring[0]``."""
    members, order = set(ring), [ring[0]]
    while len(order) < len(ring):
        last = mol.GetAtomWithIdx(order[-1])
        order.append(next(n.GetIdx() for n in last.GetNeighbors()
                          if n.GetIdx() in members and n.GetIdx() not in order))
    return order


def flippable_rings(mol: Chem.Mol) -> list[RingReflection]:
    """The rings :func:`reflect_ring` can flip: isolated, saturated, five to seven atoms.

    Isolated: no ring atom in a second ring and no branch reaching back into the ring, so every
    atom outside the ring hangs off exactly one ring atom.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Molecule with explicit hydrogens.

    Returns
    -------
    list of RingReflection
    """
    info, rings = mol.GetRingInfo(), []
    for atoms in info.AtomRings():
        order = bonded_order(mol, atoms)
        isolated = all(info.NumAtomRings(i) == 1 for i in order)
        saturated = all(mol.GetBondBetweenAtoms(i, j).GetBondType() == Chem.BondType.SINGLE
                        for i, j in zip(order, order[1:] + order[:1]))
        if not (isolated and saturated and 5 <= len(order) <= 7):
            continue
        branches = []
        for pos, idx in enumerate(order):
            ring_nbrs = {order[pos - 1], order[(pos + 1) % len(order)]}
            branch = set()
            for nbr in mol.GetAtomWithIdx(idx).GetNeighbors():
                if nbr.GetIdx() not in ring_nbrs:
                    branch |= _reachable(mol, nbr.GetIdx(), idx)
            branches.append(np.array(sorted(branch), dtype=int))
        covered = set(order).union(*map(set, branches))
        if len(covered) == mol.GetNumAtoms() and sum(map(len, branches)) + len(order) == len(covered):
            rings.append(RingReflection(np.array(order), tuple(branches)))
    return rings


def _local_frame(positions: np.ndarray, before: int, centre: int, after: int) -> np.ndarray:
    """Right-handed orthonormal frame (columns) at a ring atom from its two ring neighbours."""
    u = positions[before] - positions[centre]
    w = positions[after] - positions[centre]
    e1 = u / np.linalg.norm(u) + w / np.linalg.norm(w)
    e1 = e1 / np.linalg.norm(e1)
    e2 = w - u
    e2 = e2 - (e2 @ e1) * e1
    e2 = e2 / np.linalg.norm(e2)
    return np.column_stack([e1, e2, np.cross(e1, e2)])


def reflect_ring(positions: np.ndarray, move: RingReflection) -> np.ndarray:
    """Reflect a ring through its mean plane and carry each branch in its ring atom's frame.

    Ring atoms map to r' = c + (I - 2 n n^T)(r - c), with c their centroid and n the normal of
    their least-squares plane (smallest right singular vector). The reflected ring has the same
    centroid and covariance, hence the same plane, so applying the map twice gives back the
    ring. Each branch atom p of ring atom i keeps its coordinates in the right-handed frame F_i
    (bisector of the two ring bonds, the in-plane perpendicular, their cross product):
    p' = r_i' + F_i' F_i^T (p - r_i). F_i' is again right-handed, so every atom keeps its
    chirality, and the map is again its own inverse. Its Jacobian is block triangular (ring
    atoms first) with rotation blocks for the branches; the ring block has |det| = 1 because the
    map only changes the sign of the out-of-plane coordinates in the principal-axis frame,
    whose volume element depends on the singular values alone.

    Parameters
    ----------
    positions : numpy.ndarray, shape ``(n_atoms, 3)``
        Any length unit.
    move : RingReflection

    Returns
    -------
    numpy.ndarray, shape ``(n_atoms, 3)``
    """
    ring = move.ring
    centre = positions[ring].mean(axis=0)
    normal = np.linalg.svd(positions[ring] - centre)[2][2]
    out = positions.copy()
    out[ring] = positions[ring] - 2.0 * np.outer((positions[ring] - centre) @ normal, normal)
    n = len(ring)
    for pos, branch in enumerate(move.branches):
        if len(branch) == 0:
            continue
        before, atom, after = ring[pos - 1], ring[pos], ring[(pos + 1) % n]
        old = _local_frame(positions, before, atom, after)
        new = _local_frame(out, before, atom, after)
        out[branch] = out[atom] + (positions[branch] - positions[atom]) @ old @ new.T
    return out
