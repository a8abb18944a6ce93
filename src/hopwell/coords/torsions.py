"""Which Z-matrix torsion rows the non-local moves turn, and which coordinates condition them."""

from __future__ import annotations

import numpy as np
from rdkit import Chem

from hopwell.coords.internal import ZMatrix, build_zmatrix
from hopwell.errors import InputError
from hopwell.systems.builder import STIFF_BOND, rotatable_bonds


def molecule_zmatrix(mol: Chem.Mol) -> ZMatrix:
    """The Z-matrix of ``mol`` (explicit hydrogens) from its bond graph, rotatable bonds preferred."""
    return build_zmatrix(
        mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
        heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))


def refuse_rigid(zmat: ZMatrix, mol: Chem.Mol) -> np.ndarray:
    """:func:`moving_torsions`, refused with one line when there is none (nothing to sample)."""
    rows = moving_torsions(zmat, mol)
    if len(rows) == 0:
        raise InputError("the molecule has no torsion about an acyclic bond, so no conformers to"
                         " sample; hopwell energy gives the energy of its one structure")
    return rows


def moving_torsions(zmat: ZMatrix, mol: Chem.Mol) -> np.ndarray:
    """Indices of the torsion rows the flow proposes: proper principal torsions, acyclic bonds.

    A row qualifies when its torsion is a proper dihedral (its reference atom bonded to the
    angle reference, t-a-b-atom), it is principal (offsets follow it), the bond a-b is not in
    a ring, and every other neighbour of b is placed about the same bond a-b (so the move is a
    rigid rotation of b's substituents). Improper-style rows (reference bonded to b) place an atom around its own centre and
    behave like angles; moving them was measured to raise energies by hundreds of kJ/mol.

    Returns
    -------
    numpy.ndarray of int, shape ``(n_moving,)``
        Positions in the Z-matrix torsion array (row ``k`` places atom ``order[k + 3]``).
    """
    placed_about = {}  # atom -> (bond_ref, angle_ref) of its row; None for the first three
    for row, atom in enumerate(zmat.order):
        placed_about[int(atom)] = None if row < 3 else (int(zmat.bond_ref[row]), int(zmat.angle_ref[row]))
    rows = []
    for k in np.flatnonzero(zmat.is_principal):
        row = k + 3
        b, a, t = (int(zmat.bond_ref[row]), int(zmat.angle_ref[row]), int(zmat.torsion_ref[row]))
        proper = mol.GetBondBetweenAtoms(t, a) is not None
        # A rigid rotation about a-b turns every other neighbour of b with it; a neighbour
        # placed otherwise (one of the first three atoms) would be left behind, and the
        # "torsion" would bend the angles at b instead.
        rigid = all(placed_about[n.GetIdx()] == (b, a)
                    for n in mol.GetAtomWithIdx(b).GetNeighbors() if n.GetIdx() != a)
        if proper and rigid and not mol.GetBondBetweenAtoms(b, a).IsInRing():
            rows.append(int(k))
    return np.array(rows, dtype=int)


def stiff_rows(zmat: ZMatrix, mol: Chem.Mol, rows: np.ndarray) -> np.ndarray:
    """Which torsion ``rows`` turn about a partial double bond (:data:`STIFF_BOND`), ``(len(rows),)``."""
    stiff = {frozenset(match[0::2]) for match in mol.GetSubstructMatches(STIFF_BOND)}
    return np.array([frozenset((int(zmat.bond_ref[k + 3]), int(zmat.angle_ref[k + 3]))) in stiff
                     for k in rows], dtype=bool)


def context_angles(zmat: ZMatrix, rows: np.ndarray) -> np.ndarray:
    """Bond angles a flow over torsion ``rows`` is conditioned on: those whose vertex is an atom
    of one of the rows' central bonds (the backbone angle N-CA-C of a peptide, for one).

    Returns
    -------
    numpy.ndarray of int
        Columns of the Z-matrix angle array (column ``j`` is placement row ``j + 2``).
    """
    central = {int(a) for k in rows for a in (zmat.bond_ref[k + 3], zmat.angle_ref[k + 3])}
    return np.array([r - 2 for r in range(2, zmat.n_atoms) if int(zmat.bond_ref[r]) in central], dtype=int)


def rotatable_rows(zmat: ZMatrix, moving: np.ndarray) -> np.ndarray:
    """The moving torsion rows whose axis is a rotatable bond (no methyl or hydroxyl rotors)."""
    moving = np.asarray(moving, dtype=int)
    return moving[zmat.rotatable_mask[moving]]
