"""Tests of hopwell.coords.rotate against RDKit, scipy, mdtraj and the Z-matrix rebuild."""

import mdtraj as md
import numpy as np
import pytest
import torch
from rdkit import Chem
from rdkit.Chem import AllChem
from scipy.spatial.transform import Rotation

from hopwell.coords import internal
from hopwell.coords.internal import (
    build_zmatrix,
    cartesian_to_internal,
    internal_to_cartesian,
)
from hopwell.coords.rotate import (
    rigid_rows,
    rotate_about_bond,
    rotate_torsions,
    rotation_matrices,
    side_of_bond,
    torsion_axes,
)
from hopwell.coords.torsions import moving_torsions

SMILES = {
    "butane": "CCCC",
    "methylcyclohexane": "CC1CCCCC1",
    "ibuprofen": "CC(C)Cc1ccc(cc1)C(C)C(=O)O",
    "ace_ala_nme": "CC(=O)NC(C)C(=O)NC",
    "aryloxy_acetamide": "COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1",
}


def _molecule(smiles: str, n_conformers: int = 3, seed: int = 7):
    """Molecule with hydrogens, its bonds, Z-matrix and conformers in nm, shape (B, n, 3)."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    conf_ids = list(AllChem.EmbedMultipleConfs(mol, numConfs=n_conformers, randomSeed=seed))
    assert len(conf_ids) == n_conformers
    positions_nm = 0.1 * np.array([mol.GetConformer(c).GetPositions() for c in conf_ids])
    bonds = [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    zmat = build_zmatrix(mol.GetNumAtoms(), bonds, heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()])
    return mol, bonds, zmat, positions_nm


def _trajectory(mol, positions_nm) -> md.Trajectory:
    top = md.Topology()
    residue = top.add_residue("MOL", top.add_chain())
    for atom in mol.GetAtoms():
        top.add_atom(f"{atom.GetSymbol()}{atom.GetIdx()}", md.element.get_by_symbol(atom.GetSymbol()), residue)
    return md.Trajectory(np.asarray(positions_nm, dtype=np.float32), top)


def _angle_diff(x, y):
    return np.abs(np.remainder(x - y + np.pi, 2 * np.pi) - np.pi)


def _kabsch_max_deviation(p: np.ndarray, q: np.ndarray) -> float:
    """Max deviation after optimal proper rotation (Kabsch, Acta Cryst. A32:922, 1976)."""
    p, q = p - p.mean(0), q - q.mean(0)
    u, _, vt = np.linalg.svd(p.T @ q)
    rot = u @ np.diag([1.0, 1.0, np.sign(np.linalg.det(u @ vt))]) @ vt
    return float(np.abs(p @ rot - q).max())


@pytest.mark.parametrize("name", ["ibuprofen", "ace_ala_nme"])
def test_side_of_bond_matches_rdkit_fragments(name):
    mol, bonds, _, _ = _molecule(SMILES[name], n_conformers=1)
    n_checked = 0
    for bond in mol.GetBonds():
        a, b = bond.GetBeginAtomIdx(), bond.GetEndAtomIdx()
        if bond.IsInRing():
            with pytest.raises(ValueError, match="ring"):
                side_of_bond(mol.GetNumAtoms(), bonds, a, b)
            continue
        # Source: RDKit FragmentOnBonds + GetMolFrags, the fragment holding b.
        frags = Chem.GetMolFrags(Chem.FragmentOnBonds(mol, [bond.GetIdx()], addDummies=False))
        expected = np.zeros(mol.GetNumAtoms(), dtype=bool)
        expected[list(next(f for f in frags if b in f))] = True
        np.testing.assert_array_equal(side_of_bond(mol.GetNumAtoms(), bonds, a, b), expected)
        np.testing.assert_array_equal(side_of_bond(mol.GetNumAtoms(), bonds, b, a), ~expected)
        n_checked += 1
    assert n_checked > 10


def test_rotation_matrices_match_scipy():
    rng = np.random.default_rng(3)
    axes = rng.normal(size=(20, 3))
    axes /= np.linalg.norm(axes, axis=1, keepdims=True)
    angles = rng.uniform(-np.pi, np.pi, 20)
    # Source: scipy.spatial.transform.Rotation.from_rotvec (right-handed, angle = |rotvec|).
    expected = Rotation.from_rotvec(axes * angles[:, None]).as_matrix()
    np.testing.assert_allclose(rotation_matrices(axes, angles), expected, rtol=0, atol=1e-14)


@pytest.mark.parametrize("name", ["butane", "ibuprofen", "ace_ala_nme", "aryloxy_acetamide"])
def test_rotation_turns_exactly_one_torsion_row(name):
    mol, bonds, zmat, positions_nm = _molecule(SMILES[name])
    rows = rigid_rows(zmat, bonds, moving_torsions(zmat, mol))
    assert len(rows) >= 2
    axes = torsion_axes(zmat, bonds, rows)
    before = cartesian_to_internal(zmat, positions_nm)
    rng = np.random.default_rng(5)
    for i, k in enumerate(rows):
        delta = rng.uniform(-np.pi, np.pi, len(positions_nm))
        (a, b), moving = axes.axis_atoms[i], axes.moving[i]
        turned = rotate_about_bond(positions_nm, a, b, moving, delta)
        after = cartesian_to_internal(zmat, turned)
        # Source: geometric identity; hopwell's own conversion, checked against mdtraj in
        # tests/test_internal.py, and mdtraj.compute_dihedrals below.
        torch.testing.assert_close(after.bonds_nm, before.bonds_nm, rtol=0, atol=1e-12)
        torch.testing.assert_close(after.angles_rad, before.angles_rad, rtol=0, atol=1e-12)
        change = (after.torsions_rad - before.torsions_rad).numpy()
        assert np.all(_angle_diff(change[:, k], delta) < 1e-10)
        assert np.all(_angle_diff(np.delete(change, k, axis=1), 0.0) < 1e-10)
        quad = [[int(zmat.torsion_ref[k + 3]), int(a), int(b), int(zmat.order[k + 3])]]
        turned_md = md.compute_dihedrals(_trajectory(mol, turned), quad)[:, 0]
        before_md = md.compute_dihedrals(_trajectory(mol, positions_nm), quad)[:, 0]
        assert np.all(_angle_diff(turned_md - before_md, delta) < 1e-5)


@pytest.mark.parametrize("name", ["butane", "ibuprofen", "ace_ala_nme", "aryloxy_acetamide"])
def test_rotation_equals_rebuild_up_to_rigid_motion(name):
    mol, bonds, zmat, positions_nm = _molecule(SMILES[name])
    rows = rigid_rows(zmat, bonds, moving_torsions(zmat, mol))
    axes = torsion_axes(zmat, bonds, rows)
    ic = cartesian_to_internal(zmat, positions_nm)
    rng = np.random.default_rng(9)
    for i, k in enumerate(rows):
        delta = rng.uniform(-np.pi, np.pi, len(positions_nm))
        torsions = ic.torsions_rad.clone()
        torsions[:, k] += torch.from_numpy(delta)
        rebuilt, _ = internal_to_cartesian(zmat, ic.bonds_nm, ic.angles_rad, torsions)
        turned = rotate_torsions(positions_nm, axes, np.full(len(delta), i), delta)
        # Source: geometric identity, compared after Kabsch superposition (proper rotations
        # only, so a mirror image or a turn the wrong way would fail).
        for frame in range(len(delta)):
            assert _kabsch_max_deviation(rebuilt[frame].numpy(), turned[frame]) < 1e-9


def _turnable_rows(mol, bonds, zmat) -> list[int]:
    """Principal rows about acyclic bonds whose torsion reference is on the fixed side."""
    rows = []
    for k in np.flatnonzero(zmat.is_principal):
        t, a, b = (int(zmat.torsion_ref[k + 3]), int(zmat.angle_ref[k + 3]), int(zmat.bond_ref[k + 3]))
        if not mol.GetBondBetweenAtoms(a, b).IsInRing() and not side_of_bond(zmat.n_atoms, bonds, a, b)[t]:
            rows.append(int(k))
    return rows


def _cross_bond_reference(neighbours, parent, row_of, row, b, a):
    """The torsion-reference rule hopwell used before: the root's substituents took a placed
    neighbour of ``a`` across the bond, so turning that bond dragged the root's hydrogens.
    Kept here only as a Z-matrix that torsion_axes must refuse."""
    def placed(atoms, exclude):
        return sorted((j for j in atoms if j != exclude and row_of[j] < row), key=row_of.__getitem__)

    if parent[a] >= 0 and parent[a] != b:
        return int(parent[a])
    return (placed(neighbours[a], b) + placed(neighbours[b], a))[0]


def _cross_bond_molecule(monkeypatch, smiles):
    monkeypatch.setattr(internal, "_torsion_reference", _cross_bond_reference)
    molecule = _molecule(smiles, n_conformers=1)
    monkeypatch.undo()
    return molecule


@pytest.mark.parametrize("rule", ["current", "cross_bond"])
def test_refused_rows_are_exactly_those_the_rebuild_does_not_turn_rigidly(monkeypatch, rule):
    """Among principal rows about acyclic bonds with the torsion reference on the fixed side,
    torsion_axes refuses a row exactly when changing it in the Z-matrix and rebuilding is no
    rigid rotation of one side. With the current reference rule no such row is refused; with
    the earlier rule the root carbon's hydrogens took their torsion reference across the bond
    to the second placed atom, so one row must be refused."""
    if rule == "current":
        mol, bonds, zmat, positions_nm = _molecule(SMILES["aryloxy_acetamide"], n_conformers=1)
    else:
        mol, bonds, zmat, positions_nm = _cross_bond_molecule(monkeypatch, SMILES["aryloxy_acetamide"])
    ic = cartesian_to_internal(zmat, positions_nm)
    accepted = set(rigid_rows(zmat, bonds, np.arange(zmat.n_atoms - 3)).tolist())
    verdicts = []
    for k in _turnable_rows(mol, bonds, zmat):
        a, b = int(zmat.angle_ref[k + 3]), int(zmat.bond_ref[k + 3])
        moving = side_of_bond(zmat.n_atoms, bonds, a, b)
        torsions = ic.torsions_rad.clone()
        torsions[:, k] += 1.1
        rebuilt, _ = internal_to_cartesian(zmat, ic.bonds_nm, ic.angles_rad, torsions)
        turned = rotate_about_bond(positions_nm, a, b, moving, np.array([1.1]))
        rigid = _kabsch_max_deviation(rebuilt[0].numpy(), turned[0]) < 1e-9
        verdicts.append((k, rigid, k in accepted))
    assert all(rigid == ok for _, rigid, ok in verdicts), verdicts
    assert {ok for _, _, ok in verdicts} == ({True} if rule == "current" else {True, False})


def test_batched_rotation_matches_one_bond_at_a_time():
    mol, bonds, zmat, positions_nm = _molecule(SMILES["ibuprofen"], n_conformers=6)
    axes = torsion_axes(zmat, bonds, rigid_rows(zmat, bonds, moving_torsions(zmat, mol)))
    which = np.array([0, 3, 1, 3, 2, 0])
    delta = np.linspace(-3.0, 3.0, 6)
    batched = rotate_torsions(positions_nm, axes, which, delta)
    # Source: the one-bond path, entry by entry (the same formula on the moving atoms only).
    for i, j in enumerate(which):
        (a, b), moving = axes.axis_atoms[j], np.flatnonzero(axes.moving[j])
        single = rotate_about_bond(positions_nm[i:i + 1], a, b, moving, delta[i:i + 1])
        np.testing.assert_allclose(batched[i], single[0], rtol=0, atol=1e-14)
    assert not np.allclose(batched[0], positions_nm[0])


def test_bad_input_raises(monkeypatch):
    mol, bonds, zmat, positions_nm = _molecule(SMILES["methylcyclohexane"], n_conformers=1)
    offset_row = int(np.flatnonzero(~zmat.is_principal)[0])
    with pytest.raises(ValueError, match="offset from row"):
        torsion_axes(zmat, bonds, [offset_row])
    ring_row = next(int(k) for k in np.flatnonzero(zmat.is_principal) if mol.GetBondBetweenAtoms(
        int(zmat.angle_ref[k + 3]), int(zmat.bond_ref[k + 3])).IsInRing())
    with pytest.raises(ValueError, match="ring"):
        torsion_axes(zmat, bonds, [ring_row])
    with pytest.raises(ValueError, match="outside"):
        torsion_axes(zmat, bonds, [zmat.n_atoms - 3])
    with pytest.raises(ValueError, match="not bonded"):
        side_of_bond(zmat.n_atoms, bonds, 0, 5)
    _, bonds4, zmat4, _ = _molecule(SMILES["butane"], n_conformers=1)
    improper = next(int(k) for k in np.flatnonzero(zmat4.is_principal) if side_of_bond(
        zmat4.n_atoms, bonds4, int(zmat4.angle_ref[k + 3]), int(zmat4.bond_ref[k + 3]))[zmat4.torsion_ref[k + 3]])
    with pytest.raises(ValueError, match="reference atom"):
        torsion_axes(zmat4, bonds4, [improper])
    mol6, bonds6, zmat6, _ = _cross_bond_molecule(monkeypatch, SMILES["aryloxy_acetamide"])
    with pytest.raises(ValueError, match="straddle"):
        torsion_axes(zmat6, bonds6, _turnable_rows(mol6, bonds6, zmat6))
    moving = side_of_bond(zmat.n_atoms, bonds, 0, 1)
    with pytest.raises(ValueError, match="positions_nm"):
        rotate_about_bond(positions_nm[0], 0, 1, moving, np.zeros(1))
    with pytest.raises(ValueError, match="angles_rad"):
        rotate_about_bond(positions_nm, 0, 1, moving, np.zeros(2))
    axes = torsion_axes(zmat, bonds, rigid_rows(zmat, bonds, moving_torsions(zmat, mol)))
    with pytest.raises(ValueError, match="which"):
        rotate_torsions(positions_nm, axes, np.array([len(axes.rows)]), np.zeros(1))
    with pytest.raises(ValueError, match="which"):
        rotate_torsions(positions_nm, axes, np.array([0.0]), np.zeros(1))
