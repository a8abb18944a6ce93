"""Rigid torsion rotations in Cartesian space, without a Z-matrix rebuild.

Turning the dihedral about an acyclic bond ``a-b`` by ``delta`` rotates the atoms on ``b``'s
side of the bond (those reachable from ``b`` without crossing ``a-b``) about the axis from
``a`` to ``b`` by ``delta``, right-handed (Rodrigues' formula)::

    x' = b + R(u, delta) (x - b),   u = (b - a) / |b - a|,
    R(u, delta) = I + sin(delta) K + (1 - cos(delta)) K^2,   K v = u x v.

Every dihedral ``(t, a, b, x)`` with ``t`` on ``a``'s side and ``x`` on ``b``'s side then grows
by ``delta`` (IUPAC sign), and every distance within one side is kept.

:func:`torsion_axes` maps Z-matrix torsion rows to such rotations. It accepts a principal row
``k`` only where the rotation changes no internal coordinate but row ``k``: the atoms of every
bond, angle and other torsion row must lie on one side of the bond (the axis atoms count for
both), except the rows of ``k``'s own group (same central bond), which turn with ``k`` and keep
their offsets. As the internal coordinates fix a structure up to a rigid-body motion, the
rotation then equals changing row ``k`` by ``delta`` and rebuilding with
:func:`hopwell.coords.internal.internal_to_cartesian`, up to such a motion. A refused example:
the row about the bond between the first two placed atoms when hydrogens on the first take
their torsion reference across that bond (as in ``COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1``); changing
that row in the Z-matrix swings those hydrogens too.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from hopwell.coords.internal import ZMatrix


class TorsionAxes(NamedTuple):
    """Bond rotations that turn Z-matrix torsion rows (see :func:`torsion_axes`).

    Attributes
    ----------
    rows : np.ndarray of int, shape (n_axes,)
        Torsion rows (row ``k`` places atom ``zmat.order[k + 3]``).
    axis_atoms : np.ndarray of int, shape (n_axes, 2)
        ``(a, b)``: the rotation axis runs from atom ``a`` to atom ``b``.
    moving : np.ndarray of bool, shape (n_axes, n_atoms)
        The atoms on ``b``'s side of the bond, ``b`` included.
    """

    rows: np.ndarray
    axis_atoms: np.ndarray
    moving: np.ndarray


def side_of_bond(n_atoms: int, bonds: Sequence[tuple[int, int]], a: int, b: int) -> np.ndarray:
    """Atoms reachable from ``b`` without crossing the bond ``a-b``.

    Parameters
    ----------
    n_atoms : int
    bonds : sequence of (int, int)
        Bonded atom pairs (order-free).
    a, b : int
        The bond's atoms.

    Returns
    -------
    np.ndarray of bool, shape (n_atoms,)
        True for ``b`` and the atoms on its side.

    Raises
    ------
    ValueError
        If ``a-b`` is no bond, or lies in a ring (``a`` is reachable from ``b`` another way).
    """
    neighbours: list[list[int]] = [[] for _ in range(n_atoms)]
    for i, j in bonds:
        neighbours[int(i)].append(int(j))
        neighbours[int(j)].append(int(i))
    if not (0 <= a < n_atoms and 0 <= b < n_atoms) or a not in neighbours[b]:
        raise ValueError(f"atoms {a} and {b} are not bonded")
    side = np.zeros(n_atoms, dtype=bool)
    side[b] = True
    queue = deque([b])
    while queue:
        i = queue.popleft()
        for j in neighbours[i]:
            if (i == b and j == a) or side[j]:
                continue
            if j == a:
                raise ValueError(f"bond {a}-{b} is in a ring; a rigid rotation about it would "
                                 "break the ring")
            side[j] = True
            queue.append(j)
    return side


def _row_atoms(zmat: ZMatrix) -> np.ndarray:
    """(t, a, b, atom) of every torsion row, shape (n_atoms - 3, 4)."""
    return np.stack([zmat.torsion_ref[3:], zmat.angle_ref[3:], zmat.bond_ref[3:], zmat.order[3:]],
                    axis=1)


def _refusal(zmat: ZMatrix, bonds: Sequence[tuple[int, int]], k: int) -> str | None:
    """Why torsion row ``k`` is no rigid rotation of one side of its bond; None if it is."""
    n_torsions = zmat.n_atoms - 3
    if not 0 <= k < n_torsions:
        return f"torsion row {k} is outside 0..{n_torsions - 1}"
    if not zmat.is_principal[k]:
        return (f"torsion row {k} is an offset from row {zmat.principal_of[k]}; turn that "
                "principal row instead")
    quads = _row_atoms(zmat)
    t, a, b, _ = (int(v) for v in quads[k])
    try:
        moving = side_of_bond(zmat.n_atoms, bonds, a, b)
    except ValueError as err:
        return f"torsion row {k}: {err}"
    if moving[t]:
        return (f"torsion row {k}: its reference atom {t} is on atom {b}'s side of bond {a}-{b}, "
                "so turning that side leaves the row unchanged")
    atoms = np.arange(zmat.n_atoms)
    strict_b, strict_a = moving & (atoms != b), ~moving & (atoms != a)
    straddles = strict_b[quads].any(1) & strict_a[quads].any(1)
    others = np.flatnonzero(straddles & ~((quads[:, 2] == b) & (quads[:, 1] == a)))
    if len(others):
        return (f"torsion row {k}: turning bond {a}-{b} rigidly would also change torsion rows "
                f"{others.tolist()}, whose atoms straddle the bond")
    return None


def torsion_axes(zmat: ZMatrix, bonds: Sequence[tuple[int, int]], rows: Sequence[int]) -> TorsionAxes:
    """The bond rotations that turn Z-matrix torsion ``rows`` (and nothing else).

    Row ``k`` places atom ``zmat.order[k + 3]`` about the bond from ``a = angle_ref[k + 3]`` to
    ``b = bond_ref[k + 3]``; its rotation turns ``b``'s side of that bond.

    Parameters
    ----------
    zmat : ZMatrix
    bonds : sequence of (int, int)
        The bond graph ``zmat`` was built from.
    rows : sequence of int, shape (n_axes,)
        Torsion rows, e.g. from :func:`rigid_rows`.

    Returns
    -------
    TorsionAxes

    Raises
    ------
    ValueError
        For a row out of range, or one whose change is no rigid rotation of one side of its
        bond: an offset (non-principal) row, a bond in a ring, a torsion reference on ``b``'s
        side, or another row whose atoms straddle the bond (an atom placed about ``b-a``
        with a reference on ``b``'s side).
    """
    rows = np.asarray(rows, dtype=np.int64).reshape(-1)
    for k in rows:
        reason = _refusal(zmat, bonds, int(k))
        if reason is not None:
            raise ValueError(reason)
    axis_atoms = np.stack([zmat.angle_ref[rows + 3], zmat.bond_ref[rows + 3]], axis=1)
    moving = np.array([side_of_bond(zmat.n_atoms, bonds, int(a), int(b)) for a, b in axis_atoms],
                      dtype=bool).reshape(len(rows), zmat.n_atoms)
    return TorsionAxes(rows, axis_atoms, moving)


def rigid_rows(zmat: ZMatrix, bonds: Sequence[tuple[int, int]], rows: Sequence[int]) -> np.ndarray:
    """The ``rows`` that :func:`torsion_axes` accepts, in their given order.

    Parameters
    ----------
    zmat : ZMatrix
    bonds : sequence of (int, int)
        The bond graph ``zmat`` was built from.
    rows : sequence of int
        Torsion rows, e.g. :func:`hopwell.coords.torsions.moving_torsions`.

    Returns
    -------
    np.ndarray of int, shape (n_rigid,)
    """
    rows = np.asarray(rows, dtype=np.int64).reshape(-1)
    return rows[np.array([_refusal(zmat, bonds, int(k)) is None for k in rows], dtype=bool)]


def rotation_matrices(axes: np.ndarray, angles_rad: np.ndarray) -> np.ndarray:
    """Right-handed rotations by ``angles_rad`` about unit ``axes`` (Rodrigues' formula).

    Parameters
    ----------
    axes : np.ndarray, shape (batch, 3)
        Unit vectors.
    angles_rad : np.ndarray, shape (batch,)

    Returns
    -------
    np.ndarray, shape (batch, 3, 3)
    """
    ux, uy, uz = axes[:, 0], axes[:, 1], axes[:, 2]
    zero = np.zeros_like(ux)
    k = np.stack([zero, -uz, uy, uz, zero, -ux, -uy, ux, zero], axis=-1).reshape(-1, 3, 3)
    sin, one_minus_cos = np.sin(angles_rad)[:, None, None], (1.0 - np.cos(angles_rad))[:, None, None]
    return np.eye(3) + sin * k + one_minus_cos * (k @ k)


def _checked(positions_nm, angles_rad) -> tuple[np.ndarray, np.ndarray]:
    positions = np.asarray(positions_nm, dtype=np.float64)
    if positions.ndim != 3 or positions.shape[2] != 3:
        raise ValueError(f"positions_nm must have shape (batch, n_atoms, 3), got {positions.shape}")
    angles = np.asarray(angles_rad, dtype=np.float64)
    if angles.shape != positions.shape[:1]:
        raise ValueError(f"angles_rad must have shape (batch,) = ({positions.shape[0]},), "
                         f"got {angles.shape}")
    return positions, angles


def _unit(vectors: np.ndarray) -> np.ndarray:
    return vectors / np.linalg.norm(vectors, axis=-1, keepdims=True)


def rotate_about_bond(positions_nm: np.ndarray, a: int, b: int, moving: np.ndarray,
                      angles_rad: np.ndarray) -> np.ndarray:
    """Turn the ``moving`` atoms about the axis from atom ``a`` to atom ``b``.

    Parameters
    ----------
    positions_nm : np.ndarray, shape (batch, n_atoms, 3)
        Positions in nm; not modified.
    a, b : int
        Axis atoms (normally a bond, with ``moving`` from :func:`side_of_bond`).
    moving : np.ndarray of bool, shape (n_atoms,), or of int, shape (n_moving,)
        The atoms to turn.
    angles_rad : np.ndarray, shape (batch,)
        Right-handed turn about ``b - a`` per batch row: the dihedral of any (t, a, b, x), t
        fixed and x moving, grows by this angle.

    Returns
    -------
    np.ndarray, shape (batch, n_atoms, 3)
        New positions in nm.

    Raises
    ------
    ValueError
        For positions or angles of the wrong shape.
    """
    positions, angles = _checked(positions_nm, angles_rad)
    origin = positions[:, b:b + 1]
    rotation = rotation_matrices(_unit(positions[:, b] - positions[:, a]), angles)
    out = positions.copy()
    out[:, moving] = (positions[:, moving] - origin) @ rotation.transpose(0, 2, 1) + origin
    return out


def rotate_torsions(positions_nm: np.ndarray, axes: TorsionAxes, which: np.ndarray,
                    angles_rad: np.ndarray) -> np.ndarray:
    """Turn a different bond in each batch row: row ``i`` turns ``axes`` entry ``which[i]``.

    Parameters
    ----------
    positions_nm : np.ndarray, shape (batch, n_atoms, 3)
        Positions in nm; not modified.
    axes : TorsionAxes
    which : np.ndarray of int, shape (batch,)
        Index into ``axes`` per batch row (not a torsion row number).
    angles_rad : np.ndarray, shape (batch,)
        Turn per batch row; the torsion row ``axes.rows[which[i]]`` grows by it.

    Returns
    -------
    np.ndarray, shape (batch, n_atoms, 3)
        New positions in nm.

    Raises
    ------
    ValueError
        For positions, ``which`` or angles of the wrong shape, or ``which`` out of range.
    """
    positions, angles = _checked(positions_nm, angles_rad)
    which = np.asarray(which)
    if which.shape != angles.shape or not np.issubdtype(which.dtype, np.integer):
        raise ValueError(f"which must be integers of shape ({len(angles)},), got {which.dtype} "
                         f"{which.shape}")
    if np.any((which < 0) | (which >= len(axes.rows))):
        raise ValueError(f"which must index the {len(axes.rows)} axes, got {which.tolist()}")
    batch = np.arange(len(which))
    a, b = axes.axis_atoms[which, 0], axes.axis_atoms[which, 1]
    origin = positions[batch, b][:, None]
    rotation = rotation_matrices(_unit(positions[batch, b] - positions[batch, a]), angles)
    turned = (positions - origin) @ rotation.transpose(0, 2, 1) + origin
    return np.where(axes.moving[which][..., None], turned, positions)
