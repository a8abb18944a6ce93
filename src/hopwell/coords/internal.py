"""Internal coordinates (a Z-matrix built from the bond graph) for hopwell.

A :class:`ZMatrix` fixes, for every atom after the first, the earlier-placed atoms that define
its position: a bond reference ``b`` (a bonded neighbour), an angle reference ``a`` (bonded to
``b``) and a torsion reference ``t``. The atom's coordinates are the bond length ``|atom - b|``,
the angle ``atom-b-a`` and the dihedral of ``(t, a, b, atom)`` (IUPAC sign convention). The
first atom fixes the translation, the second is placed by a bond only and the third by a bond
and an angle, so a molecule of ``n`` atoms has ``3n - 6`` internal coordinates laid out as

* ``bonds_nm``: placement rows ``1 .. n-1`` (``n - 1`` values),
* ``angles_rad``: rows ``2 .. n-1`` (``n - 2`` values),
* ``torsions_rad``: rows ``3 .. n-1`` (``n - 3`` values).

Principal torsions: all atoms placed about the same central bond, i.e. with the same
``(bond_ref, angle_ref)`` pair, share one torsion reference. The first of them carries the
explicit ("principal") dihedral; every later one stores its dihedral as an offset from the
principal one, wrapped to ``[-pi, pi)``. Changing a principal torsion therefore turns the whole
group (e.g. a methyl group, or a branch with its hydrogens) rigidly about the central bond.

Rings: the Z-matrix follows a spanning tree of the bond graph, so ring-closure bonds are not
coordinates; their lengths and angles are implied by the others. Sampling the torsions of a ring
independently (as a flow proposal may) will usually give a broken ring; such proposals are left
to the clash guard and the energy to reject.

A torsion is undefined when its reference atoms ``t, a, b`` are collinear (e.g. along a triple
bond); such molecules need care from the caller.
"""

from __future__ import annotations

import heapq
import itertools
import math
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import NamedTuple

import numpy as np
import torch


@dataclass(frozen=True, eq=False)
class ZMatrix:
    """Placement order and references of a Z-matrix (read-only numpy arrays).

    Attributes
    ----------
    order : np.ndarray of int, shape (n_atoms,)
        Atom index placed at each placement row.
    bond_ref, angle_ref, torsion_ref : np.ndarray of int, shape (n_atoms,)
        Atom index of the bond / angle / torsion reference of each placement row, ``-1`` where
        the row has no such coordinate (rows 0; 0-1; 0-2 respectively).
    principal_of : np.ndarray of int, shape (n_atoms - 3,)
        For each torsion row ``k`` (placement row ``k + 3``): ``-1`` if the torsion is principal,
        else the torsion row whose dihedral it is an offset of.
    is_principal : np.ndarray of bool, shape (n_atoms - 3,)
        ``principal_of == -1``.
    rotatable_mask : np.ndarray of bool, shape (n_atoms - 3,)
        Principal torsions whose central bond ``(bond_ref, angle_ref)`` is a rotatable bond.
    """

    order: np.ndarray
    bond_ref: np.ndarray
    angle_ref: np.ndarray
    torsion_ref: np.ndarray
    principal_of: np.ndarray
    is_principal: np.ndarray
    rotatable_mask: np.ndarray

    @property
    def n_atoms(self) -> int:
        """Number of atoms."""
        return int(self.order.shape[0])

    @cached_property
    def placement_levels(self) -> np.ndarray:
        """Dependency depth of each placement row, shape (n_atoms,) (read-only, computed once).

        Rows 0, 1 and 2 are level 0; a later row is one level above the highest of its bond,
        angle and torsion references, so all rows of one level can be placed at once.
        """
        return _placement_levels(self)

    @cached_property
    def _plan(self) -> _Plan:
        return _plan_placement(self)


class InternalCoords(NamedTuple):
    """Batched internal coordinates (float64); see the module docstring for the layout.

    Attributes
    ----------
    bonds_nm : torch.Tensor, shape (batch, n_atoms - 1)
    angles_rad : torch.Tensor, shape (batch, n_atoms - 2)
        In [0, pi].
    torsions_rad : torch.Tensor, shape (batch, n_atoms - 3)
        In [-pi, pi); offsets from the principal dihedral where not principal.
    log_jacobian : torch.Tensor, shape (batch,)
        See :func:`internal_to_cartesian`.
    """

    bonds_nm: torch.Tensor
    angles_rad: torch.Tensor
    torsions_rad: torch.Tensor
    log_jacobian: torch.Tensor


def _neighbour_lists(n_atoms: int, bonds: Sequence[tuple[int, int]]) -> list[list[int]]:
    neighbours: list[set[int]] = [set() for _ in range(n_atoms)]
    for bond in bonds:
        if len(bond) != 2:
            raise ValueError(f"each bond must be a pair of atom indices, got {bond!r}")
        i, j = int(bond[0]), int(bond[1])
        if not (0 <= i < n_atoms and 0 <= j < n_atoms):
            raise ValueError(f"bond {bond!r} refers to an atom outside 0..{n_atoms - 1}")
        if i == j:
            raise ValueError(f"bond {bond!r} joins an atom to itself")
        neighbours[i].add(j)
        neighbours[j].add(i)
    return [sorted(s) for s in neighbours]


def _graph_distances(neighbours: list[list[int]], source: int) -> np.ndarray:
    """Bond-count distances from ``source`` (breadth-first search), -1 where unreachable."""
    dist = np.full(len(neighbours), -1, dtype=np.int64)
    dist[source] = 0
    queue = deque([source])
    while queue:
        i = queue.popleft()
        for j in neighbours[i]:
            if dist[j] < 0:
                dist[j] = dist[i] + 1
                queue.append(j)
    return dist


def _torsion_reference(neighbours: list[list[int]], parent: np.ndarray, row_of: np.ndarray,
                       row: int, b: int, a: int) -> int:
    """Torsion reference for central bond (b, a) at placement ``row``.

    A placed neighbour of ``a`` other than ``b`` (``a``'s own bond reference first, then by
    placement row); failing that, a placed neighbour of ``b`` other than ``a``. One of the two
    exists because the placed atoms form a connected tree of at least three atoms.

    The root's own substituents (``b`` the root, ``a`` the second placed atom, whose parent is
    ``b``) take a placed neighbour of ``b`` first: a reference across the bond would be one of
    ``a``'s children, so turning ``a``'s side would drag the root's hydrogens along while the
    root's other placed neighbour stays put, bending the angles at the root.
    """
    def placed(atoms: list[int], exclude: int) -> list[int]:
        chosen = [j for j in atoms if j != exclude and row_of[j] < row]
        return sorted(chosen, key=row_of.__getitem__)

    if parent[a] == b:
        return (placed(neighbours[b], a) + placed(neighbours[a], b))[0]
    if parent[a] >= 0:
        return int(parent[a])
    return (placed(neighbours[a], b) + placed(neighbours[b], a))[0]


def build_zmatrix(
    n_atoms: int,
    bonds: Sequence[tuple[int, int]],
    heavy: Sequence[bool] | None = None,
    rotatable: Sequence[tuple[int, int]] | None = None,
) -> ZMatrix:
    """Build a Z-matrix from a connected bond graph.

    Placement starts at the heavy atom of smallest graph eccentricity (lowest index on ties)
    and grows over bonds, always taking a heavy atom when one is adjacent to the placed set
    (first discovered first), so hydrogens hang off already-placed heavy atoms. Each atom's
    bond reference is the placed neighbour that discovered it; its angle reference is the bond
    reference's own bond reference (the second placed atom when the bond reference is the
    first placed atom). The torsion reference
    is chosen once per central bond ``(b, a)``: a placed neighbour of ``a`` (a proper chain
    ``t-a-b-atom``), preferring ``a``'s bond reference, else a placed neighbour of ``b`` (an
    improper-style reference); the root's own substituents prefer a placed neighbour of the
    root, so that no torsion turns atoms on both sides of a bond.

    Parameters
    ----------
    n_atoms : int
        Number of atoms, at least 3.
    bonds : sequence of (int, int)
        Bonded atom pairs (order-free); the graph must be connected.
    heavy : sequence of bool, shape (n_atoms,), optional
        True for non-hydrogen atoms. Default: all atoms count as heavy.
    rotatable : sequence of (int, int), optional
        Bonds (order-free) whose principal torsions are flagged in ``rotatable_mask``. Each must
        be one of ``bonds``. A bond that is no central bond of the Z-matrix (a ring closure, or
        a bond to a terminal atom) gets no flag; one that is central in both directions gets two.

    Returns
    -------
    ZMatrix

    Raises
    ------
    ValueError
        Fewer than 3 atoms, a malformed or out-of-range bond, a disconnected graph, a ``heavy``
        of the wrong length, or a ``rotatable`` pair that is not a bond.
    """
    n_atoms = int(n_atoms)
    if n_atoms < 3:
        raise ValueError(f"a Z-matrix needs at least 3 atoms, got {n_atoms}")
    neighbours = _neighbour_lists(n_atoms, bonds)
    if np.any(_graph_distances(neighbours, 0) < 0):
        raise ValueError("the bond graph is not connected; internal coordinates need one molecule")
    heavy_mask = np.ones(n_atoms, dtype=bool) if heavy is None else np.asarray(heavy, dtype=bool)
    if heavy_mask.shape != (n_atoms,):
        raise ValueError(f"heavy must have one entry per atom ({n_atoms}), got {heavy_mask.shape}")

    candidates = np.flatnonzero(heavy_mask) if heavy_mask.any() else np.arange(n_atoms)
    eccentricity = [int(_graph_distances(neighbours, int(i)).max()) for i in candidates]
    root = int(candidates[int(np.argmin(eccentricity))])

    # Heavy-first traversal: heap keyed by (is hydrogen, discovery count).
    parent = np.full(n_atoms, -1, dtype=np.int64)
    discovered = np.zeros(n_atoms, dtype=bool)
    discovered[root] = True
    heap = [(False, 0, root)]
    n_discovered = 1
    order: list[int] = []
    while heap:
        _, _, atom = heapq.heappop(heap)
        order.append(atom)
        for j in neighbours[atom]:
            if not discovered[j]:
                discovered[j] = True
                parent[j] = atom
                heapq.heappush(heap, (not heavy_mask[j], n_discovered, j))
                n_discovered += 1
    row_of = np.empty(n_atoms, dtype=np.int64)
    row_of[order] = np.arange(n_atoms)

    bond_ref = np.full(n_atoms, -1, dtype=np.int64)
    angle_ref = np.full(n_atoms, -1, dtype=np.int64)
    torsion_ref = np.full(n_atoms, -1, dtype=np.int64)
    principal_of = np.full(n_atoms - 3, -1, dtype=np.int64)
    central: list[tuple[int, int]] = []
    groups: dict[tuple[int, int], tuple[int, int]] = {}  # (b, a) -> (torsion ref, principal row)
    for row in range(1, n_atoms):
        b = int(parent[order[row]])
        bond_ref[row] = b
        if row < 2:
            continue
        a = int(parent[b]) if b != root else order[1]
        angle_ref[row] = a
        if row < 3:
            continue
        central.append((b, a))
        if (b, a) in groups:
            principal_of[row - 3] = groups[(b, a)][1]
        else:
            groups[(b, a)] = (_torsion_reference(neighbours, parent, row_of, row, b, a), row - 3)
        torsion_ref[row] = groups[(b, a)][0]

    rotatable_set = set()
    for pair in rotatable or ():
        i, j = (int(k) for k in pair)
        if not (0 <= i < n_atoms and 0 <= j < n_atoms) or j not in neighbours[i]:
            raise ValueError(f"rotatable pair {pair!r} is not a bond of the molecule")
        rotatable_set.add(frozenset((i, j)))
    is_principal = principal_of < 0
    rotatable_mask = np.array([frozenset(p) in rotatable_set for p in central], dtype=bool)
    rotatable_mask &= is_principal

    arrays = [np.asarray(order, dtype=np.int64), bond_ref, angle_ref, torsion_ref, principal_of,
              is_principal, rotatable_mask]
    for arr in arrays:
        arr.setflags(write=False)
    return ZMatrix(*arrays)


def _placement_levels(zmat: ZMatrix) -> np.ndarray:
    """Dependency depth of each placement row; see :attr:`ZMatrix.placement_levels`."""
    level_of_atom = np.zeros(zmat.n_atoms, dtype=np.int64)
    for row in range(3, zmat.n_atoms):
        refs = (zmat.bond_ref[row], zmat.angle_ref[row], zmat.torsion_ref[row])
        level_of_atom[zmat.order[row]] = 1 + level_of_atom[list(refs)].max()
    levels = level_of_atom[zmat.order]
    levels.setflags(write=False)
    return levels


class _Level(NamedTuple):
    """One batch of NeRF placements: buffer slots ``start:stop`` from references ``refs``."""

    start: int
    stop: int
    refs: torch.Tensor  # (3 * (stop - start),): slots of bond, then angle, then torsion refs


class _Plan(NamedTuple):
    """Index tensors for the conversions, built once per Z-matrix by :func:`_plan_placement`.

    The NeRF buffer holds the atoms sorted by the level of their placement row (rows 0, 1, 2
    first, then by row within a level); a "slot" is a position in it.
    """

    atom_slot: torch.Tensor  # (n_atoms,) slot of each atom
    bond_cols: torch.Tensor  # (n_atoms - 3,) bonds_nm column of slots 3..n-1
    angle_cols: torch.Tensor  # (n_atoms - 3,) angles_rad column of slots 3..n-1
    torsion_cols: torch.Tensor  # (n_atoms - 3,) torsions_rad column of slots 3..n-1
    levels: tuple[_Level, ...]
    principal_cols: torch.Tensor  # (n_atoms - 3,) torsion row each row is measured from
    is_principal: torch.Tensor  # (n_atoms - 3,) bool
    atom_refs: torch.Tensor  # order, bond_ref[1:], angle_ref[2:], torsion_ref[3:] concatenated


def _plan_placement(zmat: ZMatrix) -> _Plan:
    n = zmat.n_atoms
    levels = zmat.placement_levels
    rows_by_slot = np.argsort(levels, kind="stable")
    slot_of_row = np.empty(n, dtype=np.int64)
    slot_of_row[rows_by_slot] = np.arange(n)
    slot_of_atom = np.empty(n, dtype=np.int64)
    slot_of_atom[zmat.order] = slot_of_row
    later = rows_by_slot[3:]
    bounds = np.searchsorted(levels[rows_by_slot], np.arange(1, levels.max() + 2))
    plan_levels = tuple(
        _Level(int(start), int(stop), torch.as_tensor(np.concatenate(
            [slot_of_atom[ref[rows_by_slot[start:stop]]]
             for ref in (zmat.bond_ref, zmat.angle_ref, zmat.torsion_ref)])))
        for start, stop in itertools.pairwise(bounds))
    own = np.arange(n - 3)
    return _Plan(
        atom_slot=torch.as_tensor(slot_of_atom),
        bond_cols=torch.as_tensor(later - 1),
        angle_cols=torch.as_tensor(later - 2),
        torsion_cols=torch.as_tensor(later - 3),
        levels=plan_levels,
        principal_cols=torch.as_tensor(np.where(zmat.is_principal, own, zmat.principal_of)),
        is_principal=torch.as_tensor(zmat.is_principal.copy()),
        atom_refs=torch.as_tensor(np.concatenate(
            [zmat.order, zmat.bond_ref[1:], zmat.angle_ref[2:], zmat.torsion_ref[3:]])),
    )


def _wrap(angle_rad: torch.Tensor) -> torch.Tensor:
    """Wrap angles to [-pi, pi)."""
    wrapped = torch.remainder(angle_rad + math.pi, 2.0 * math.pi) - math.pi
    return torch.where(wrapped >= math.pi, wrapped - 2.0 * math.pi, wrapped)


def _log_jacobian(bonds_nm: torch.Tensor, angles_rad: torch.Tensor) -> torch.Tensor:
    return 2.0 * torch.log(bonds_nm).sum(-1) + torch.log(torch.sin(angles_rad)).sum(-1)


def _as_batch(name: str, value, shape: tuple[int, ...]) -> torch.Tensor:
    tensor = torch.as_tensor(value).to(torch.float64)
    if tensor.ndim != len(shape) + 1 or tuple(tensor.shape[1:]) != shape:
        raise ValueError(f"{name} must have shape (batch, {', '.join(map(str, shape))}), "
                         f"got {tuple(tensor.shape)}")
    return tensor


def cartesian_to_internal(zmat: ZMatrix, positions_nm: torch.Tensor | np.ndarray) -> InternalCoords:
    """Internal coordinates of batched Cartesian positions.

    Parameters
    ----------
    zmat : ZMatrix
    positions_nm : torch.Tensor or np.ndarray, shape (batch, n_atoms, 3)
        Positions in nm; converted to float64 (differentiable for tensors).

    Returns
    -------
    InternalCoords
        ``bonds_nm`` (batch, n_atoms - 1); ``angles_rad`` (batch, n_atoms - 2) in [0, pi];
        ``torsions_rad`` (batch, n_atoms - 3) in [-pi, pi), dihedral of (t, a, b, atom) with
        the IUPAC sign for principal rows and the offset from the principal dihedral otherwise;
        ``log_jacobian`` (batch,), as in :func:`internal_to_cartesian`.
    """
    n, plan = zmat.n_atoms, zmat._plan
    x = _as_batch("positions_nm", positions_nm, (n, 3))
    atom, b, a, t = x[:, plan.atom_refs].split([n, n - 1, n - 2, n - 3], dim=1)
    bond_vec = atom[:, 1:] - b
    bonds_nm = torch.linalg.norm(bond_vec, dim=-1)
    u, v = bond_vec[:, 1:], a - b[:, 1:]
    angles_rad = torch.atan2(torch.linalg.norm(torch.cross(u, v, dim=-1), dim=-1), (u * v).sum(-1))
    # Dihedral of (t, a, b, atom): atan2(|b1| b0.(b1 x b2), (b0 x b1).(b1 x b2)).
    b0, b1, b2 = a[:, 1:] - t, b[:, 2:] - a[:, 1:], atom[:, 3:] - b[:, 2:]
    n2 = torch.cross(b1, b2, dim=-1)
    dihedral = torch.atan2(torch.linalg.norm(b1, dim=-1) * (b0 * n2).sum(-1),
                           (torch.cross(b0, b1, dim=-1) * n2).sum(-1))
    reference = dihedral[:, plan.principal_cols]
    torsions_rad = _wrap(torch.where(plan.is_principal, dihedral, dihedral - reference))
    return InternalCoords(bonds_nm, angles_rad, torsions_rad, _log_jacobian(bonds_nm, angles_rad))


def internal_to_cartesian(
    zmat: ZMatrix,
    bonds_nm: torch.Tensor | np.ndarray,
    angles_rad: torch.Tensor | np.ndarray,
    torsions_rad: torch.Tensor | np.ndarray,
) -> tuple[torch.Tensor, torch.Tensor]:
    """Cartesian positions from batched internal coordinates (differentiable).

    The first placed atom goes to the origin, the second on +x, the third in the xy-plane with
    y > 0; the rest follow by the natural extension reference frame (NeRF) construction
    (Parsons et al., J. Comput. Chem. 26:1063, 2005), applied to all rows of one
    :attr:`ZMatrix.placement_levels` level at once.

    The log-Jacobian is that of Cartesian volume with respect to internal coordinates, the six
    rigid-body coordinates integrated out as constants:
    ``log J = sum_{i>=1} 2 log r_i + sum_{i>=2} log sin(theta_i)``.
    In spherical coordinates about its bond reference each atom ``i >= 3`` contributes
    ``r^2 sin(theta) dr dtheta dphi``. Atom 1 contributes ``r_1^2 dr_1 dOmega``, whose solid
    angle ``dOmega`` (the direction of the first bond) is two of the three rotations; atom 2
    contributes ``r_2^2 sin(theta_2) dr_2 dtheta_2 dphi_2``, where ``phi_2`` (about the first
    bond) is the third rotation. ``d^3 x_0`` is the translation. Integrating out translation
    and rotation leaves the factor ``J``; torsion offsets are a unit-determinant shear. Hence
    the density in internal coordinates is ``exp(-u(x(q))) * J(q)``.

    Parameters
    ----------
    zmat : ZMatrix
    bonds_nm : torch.Tensor or np.ndarray, shape (batch, n_atoms - 1)
    angles_rad : torch.Tensor or np.ndarray, shape (batch, n_atoms - 2)
    torsions_rad : torch.Tensor or np.ndarray, shape (batch, n_atoms - 3)
        Principal dihedrals and offsets, as returned by :func:`cartesian_to_internal`.

    Returns
    -------
    positions_nm : torch.Tensor, shape (batch, n_atoms, 3)
        float64, indexed by atom (not by placement row).
    log_jacobian : torch.Tensor, shape (batch,)
    """
    n, plan = zmat.n_atoms, zmat._plan
    bonds = _as_batch("bonds_nm", bonds_nm, (n - 1,))
    angles = _as_batch("angles_rad", angles_rad, (n - 2,))
    torsions = _as_batch("torsions_rad", torsions_rad, (n - 3,))
    if not bonds.shape[0] == angles.shape[0] == torsions.shape[0]:
        raise ValueError("bonds_nm, angles_rad and torsions_rad must share the batch size")
    phi = torch.where(plan.is_principal, torsions, torsions + torsions[:, plan.principal_cols])
    zero = torch.zeros_like(bonds[:, 0])
    first = torch.stack([zero, zero, zero], dim=-1)
    second = torch.stack([bonds[:, 0], zero, zero], dim=-1)
    # Third atom: direction to its angle reference is +x from atom 0, -x from atom 1.
    from_first = zmat.bond_ref[2] == zmat.order[0]
    r, theta = bonds[:, 1], angles[:, 0]
    offset = torch.stack([(1.0 if from_first else -1.0) * r * torch.cos(theta), r * torch.sin(theta),
                          zero], dim=-1)
    placed = torch.stack([first, second, (first if from_first else second) + offset], dim=1)
    # Every later atom, in slot order: its offset from the bond reference in the local frame
    # (bc, in_plane, normal) of its references, then one batched frame construction per level.
    r, theta, tau = bonds[:, plan.bond_cols], angles[:, plan.angle_cols], phi[:, plan.torsion_cols]
    r_sin = r * torch.sin(theta)
    local = torch.stack([-r * torch.cos(theta), r_sin * torch.cos(tau), r_sin * torch.sin(tau)])
    local = local.unsqueeze(-1)  # (3, batch, n_atoms - 3, 1)
    batch = placed.shape[0]
    for level in plan.levels:
        c, b, a = placed.index_select(1, level.refs).view(batch, 3, -1, 3).unbind(1)
        bc = _normalize(c - b)
        normal = _normalize(torch.linalg.cross(b - a, bc))
        along, in_plane, out_of_plane = local[:, :, level.start - 3:level.stop - 3].unbind(0)
        offset = torch.addcmul(torch.addcmul(along * bc, in_plane, torch.linalg.cross(normal, bc)),
                               out_of_plane, normal)
        placed = torch.cat([placed, c + offset], dim=1)
    return placed[:, plan.atom_slot], _log_jacobian(bonds, angles)


def _normalize(vectors: torch.Tensor) -> torch.Tensor:
    """Unit vectors along the last axis; zero vectors stay zero (as torch.nn.functional.normalize)."""
    return vectors / torch.linalg.vector_norm(vectors, dim=-1, keepdim=True).clamp_min(1e-12)
