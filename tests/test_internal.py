"""Tests of hopwell.coords.internal against RDKit, mdtraj and torch autograd."""

import math

import mdtraj as md
import numpy as np
import pytest
import torch
from rdkit import Chem
from rdkit.Chem import AllChem, Lipinski

from hopwell.coords.internal import (
    ZMatrix,
    build_zmatrix,
    cartesian_to_internal,
    internal_to_cartesian,
)

SMILES = {
    "water": "O",
    "ethanol": "CCO",
    "butane": "CCCC",
    "methylcyclohexane": "CC1CCCCC1",
    "n_methylacetamide": "CNC(C)=O",
    "ibuprofen": "CC(C)Cc1ccc(cc1)C(C)C(=O)O",
}


def _molecule(smiles: str, n_conformers: int = 3, seed: int = 11):
    """RDKit molecule with hydrogens, its Z-matrix and conformers in nm, shape (B, n, 3)."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    conf_ids = list(AllChem.EmbedMultipleConfs(mol, numConfs=n_conformers, randomSeed=seed))
    assert len(conf_ids) == n_conformers
    positions_nm = 0.1 * np.array([mol.GetConformer(c).GetPositions() for c in conf_ids])
    bonds = [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    heavy = [a.GetAtomicNum() > 1 for a in mol.GetAtoms()]
    # Rotatable bonds from RDKit's own definition, on the hydrogen-free graph (AddHs appends
    # hydrogens, so heavy-atom indices are the same).
    pattern = Lipinski.RotatableBondSmarts
    rotatable = [tuple(m) for m in Chem.RemoveHs(mol).GetSubstructMatches(pattern)]
    zmat = build_zmatrix(mol.GetNumAtoms(), bonds, heavy=heavy, rotatable=rotatable)
    return mol, zmat, positions_nm, rotatable


def _trajectory(mol, positions_nm) -> md.Trajectory:
    top = md.Topology()
    residue = top.add_residue("MOL", top.add_chain())
    for atom in mol.GetAtoms():
        element = md.element.get_by_symbol(atom.GetSymbol())
        top.add_atom(f"{atom.GetSymbol()}{atom.GetIdx()}", element, residue)
    return md.Trajectory(np.asarray(positions_nm, dtype=np.float32), top)


def _full_torsions(zmat: ZMatrix, torsions_rad: np.ndarray) -> np.ndarray:
    """Principal dihedral plus offset for every torsion row."""
    principal = np.where(zmat.is_principal, np.arange(torsions_rad.shape[1]), zmat.principal_of)
    return np.where(zmat.is_principal, torsions_rad, torsions_rad + torsions_rad[:, principal])


def _quads(zmat: ZMatrix, torsion_rows: np.ndarray) -> np.ndarray:
    """(t, a, b, atom) quadruples of the given torsion rows, shape (len(torsion_rows), 4)."""
    rows = torsion_rows + 3
    return np.stack([zmat.torsion_ref[rows], zmat.angle_ref[rows], zmat.bond_ref[rows],
                     zmat.order[rows]], axis=1)


def _angle_diff(x, y):
    return np.abs(np.remainder(x - y + np.pi, 2 * np.pi) - np.pi)


def _kabsch_max_deviation(p: np.ndarray, q: np.ndarray) -> float:
    """Max deviation after optimal proper rotation (Kabsch, Acta Cryst. A32:922, 1976)."""
    p, q = p - p.mean(0), q - q.mean(0)
    u, _, vt = np.linalg.svd(p.T @ q)
    d = np.sign(np.linalg.det(u @ vt))
    rot = u @ np.diag([1.0, 1.0, d]) @ vt
    return float(np.abs(p @ rot - q).max())


@pytest.mark.parametrize("name", list(SMILES))
def test_zmatrix_references_follow_rdkit_bonds(name):
    mol, zmat, _, _ = _molecule(SMILES[name], n_conformers=1)
    # Source: RDKit bond table and topological distance matrix.
    bonded = {frozenset((b.GetBeginAtomIdx(), b.GetEndAtomIdx())) for b in mol.GetBonds()}
    n = mol.GetNumAtoms()
    assert sorted(zmat.order) == list(range(n))
    row_of = {int(atom): row for row, atom in enumerate(zmat.order)}
    for row in range(1, n):
        atom, b = int(zmat.order[row]), int(zmat.bond_ref[row])
        assert frozenset((atom, b)) in bonded and row_of[b] < row
        if row >= 2:
            a = int(zmat.angle_ref[row])
            assert frozenset((a, b)) in bonded and row_of[a] < row and a != atom
        if row >= 3:
            t = int(zmat.torsion_ref[row])
            assert row_of[t] < row and t not in (a, b)
            assert frozenset((t, a)) in bonded or frozenset((t, b)) in bonded
    # Heavy atoms first, each hydrogen on a heavy atom, root of minimal eccentricity.
    is_h = np.array([mol.GetAtomWithIdx(int(i)).GetAtomicNum() == 1 for i in zmat.order])
    assert not np.any(np.diff(is_h.astype(int)) < 0)
    for row in np.flatnonzero(is_h):
        assert mol.GetAtomWithIdx(int(zmat.bond_ref[row])).GetAtomicNum() > 1
    ecc = Chem.GetDistanceMatrix(mol).max(axis=1)
    heavy_idx = [a.GetIdx() for a in mol.GetAtoms() if a.GetAtomicNum() > 1]
    assert ecc[zmat.order[0]] == ecc[heavy_idx].min()
    # Principal bookkeeping: each (b, a) group starts with its principal row and shares t.
    first_row = {}
    for k in range(n - 3):
        key = (zmat.bond_ref[k + 3], zmat.angle_ref[k + 3])
        first_row.setdefault(key, k)
        assert zmat.principal_of[k] == (-1 if first_row[key] == k else first_row[key])
        assert zmat.torsion_ref[k + 3] == zmat.torsion_ref[first_row[key] + 3]
    assert np.array_equal(zmat.is_principal, zmat.principal_of < 0)


@pytest.mark.parametrize("name", list(SMILES))
def test_round_trip_up_to_rigid_motion(name):
    _, zmat, positions_nm, _ = _molecule(SMILES[name])
    ic = cartesian_to_internal(zmat, torch.from_numpy(positions_nm))
    assert ic.bonds_nm.shape == (3, zmat.n_atoms - 1)
    assert ic.angles_rad.shape == (3, zmat.n_atoms - 2)
    assert ic.torsions_rad.shape == (3, zmat.n_atoms - 3)
    assert torch.all(ic.torsions_rad >= -math.pi) and torch.all(ic.torsions_rad < math.pi)
    rebuilt, log_j = internal_to_cartesian(zmat, ic.bonds_nm, ic.angles_rad, ic.torsions_rad)
    # Source: geometric identity; compared after Kabsch superposition (proper rotation only,
    # so a mirror image would fail).
    for frame in range(3):
        assert _kabsch_max_deviation(rebuilt[frame].numpy(), positions_nm[frame]) < 1e-9
    # Canonical frame: first atom at origin, second on +x, third in the xy-plane with y > 0.
    first, second, third = (rebuilt[:, zmat.order[i]] for i in range(3))
    assert torch.all(first == 0) and torch.all(second[:, 1:] == 0) and torch.all(second[:, 0] > 0)
    assert torch.all(third[:, 2] == 0) and torch.all(third[:, 1] > 0)
    torch.testing.assert_close(log_j, ic.log_jacobian, rtol=0, atol=1e-10)


@pytest.mark.parametrize("name", ["butane", "methylcyclohexane", "n_methylacetamide", "ibuprofen"])
def test_angles_and_torsions_match_mdtraj(name):
    mol, zmat, positions_nm, _ = _molecule(SMILES[name])
    ic = cartesian_to_internal(zmat, positions_nm)
    traj = _trajectory(mol, positions_nm)
    # Source: mdtraj.compute_distances / compute_angles / compute_dihedrals (float32 inside,
    # hence the 1e-5 tolerance).
    pairs = np.stack([zmat.order[1:], zmat.bond_ref[1:]], axis=1)
    np.testing.assert_allclose(ic.bonds_nm.numpy(), md.compute_distances(traj, pairs), atol=1e-6)
    triples = np.stack([zmat.order[2:], zmat.bond_ref[2:], zmat.angle_ref[2:]], axis=1)
    np.testing.assert_allclose(ic.angles_rad.numpy(), md.compute_angles(traj, triples), atol=1e-5)
    quads = _quads(zmat, np.arange(zmat.n_atoms - 3))
    reference = md.compute_dihedrals(traj, quads)
    assert np.all(_angle_diff(_full_torsions(zmat, ic.torsions_rad.numpy()), reference) < 1e-5)
    # Enough dihedrals far from 0 and pi that a sign error would show.
    assert np.mean(np.abs(np.sin(reference)) > 0.5) > 0.2


def _euler_zyz(alpha, beta, gamma):
    """Rotation matrix Rz(alpha) Ry(beta) Rz(gamma), differentiable."""
    def matrix(angle, z_axis):
        c, s = torch.cos(angle), torch.sin(angle)
        zero, one = torch.zeros_like(angle), torch.ones_like(angle)
        if z_axis:
            entries = [c, -s, zero, s, c, zero, zero, zero, one]
        else:
            entries = [c, zero, s, zero, one, zero, -s, zero, c]
        return torch.stack(entries).reshape(3, 3)

    return matrix(alpha, True) @ matrix(beta, False) @ matrix(gamma, True)


@pytest.mark.parametrize("name", ["ethanol", "butane"])
def test_log_jacobian_matches_autograd(name):
    _, zmat, positions_nm, _ = _molecule(SMILES[name], n_conformers=1)
    n = zmat.n_atoms
    ic = cartesian_to_internal(zmat, positions_nm)
    q0 = torch.cat([ic.bonds_nm[0], ic.angles_rad[0], ic.torsions_rad[0]])
    rigid0 = torch.tensor([0.3, -0.2, 0.5, 0.7, 1.1, -2.0], dtype=torch.float64)

    def to_cartesian(v):
        q = v[6:]
        bonds, angles, torsions = torch.split(q[None], [n - 1, n - 2, n - 3], dim=1)
        x, _ = internal_to_cartesian(zmat, bonds, angles, torsions)
        return (x[0] @ _euler_zyz(v[3], v[4], v[5]).T + v[:3]).reshape(-1)

    v0 = torch.cat([rigid0, q0])
    jac = torch.autograd.functional.jacobian(to_cartesian, v0)
    assert jac.shape == (3 * n, 3 * n)
    _, logdet = torch.linalg.slogdet(jac)
    # Source: torch.autograd.functional.jacobian of x = R(alpha, beta, gamma) x0(q) + t.
    # Volume element: d^3n x = d^3t * dOmega_1 dphi_2 * J(q) dq, where dOmega_1 dphi_2 (the
    # direction of the first bond and the turn about it) is the Haar measure on SO(3). In ZYZ
    # Euler angles the Haar measure is sin(beta) dalpha dbeta dgamma (both total 8 pi^2), so
    # log|det| = log J(q) + log|sin(beta)|.
    expected = ic.log_jacobian[0] + math.log(abs(math.sin(rigid0[4].item())))
    assert abs(logdet.item() - expected.item()) < 1e-8


def test_principal_torsion_turns_whole_group():
    mol, zmat, positions_nm, rotatable = _molecule(SMILES["butane"], n_conformers=1)
    # Source: RDKit's rotatable-bond SMARTS finds only the central C1-C2 bond of butane.
    assert [frozenset(p) for p in rotatable] == [frozenset((1, 2))]
    (k,) = np.flatnonzero(zmat.rotatable_mask)
    assert {int(zmat.bond_ref[k + 3]), int(zmat.angle_ref[k + 3])} == {1, 2}
    group = [k] + list(np.flatnonzero(zmat.principal_of == k))
    moving_atoms = [int(zmat.order[j + 3]) for j in group]
    assert len(moving_atoms) == 3  # the far carbon and the two hydrogens of the near one
    ic = cartesian_to_internal(zmat, positions_nm)
    delta = 1.3
    torsions = ic.torsions_rad.clone()
    torsions[:, k] += delta
    moved, _ = internal_to_cartesian(zmat, ic.bonds_nm, ic.angles_rad, torsions)
    before, after = _trajectory(mol, positions_nm), _trajectory(mol, moved.numpy())
    quads = _quads(zmat, np.array(group))
    # Source: mdtraj.compute_dihedrals; every dihedral about the central bond turns by delta,
    # so the offsets (e.g. H-C-C-C minus C-C-C-C) are unchanged.
    turned = md.compute_dihedrals(after, quads) - md.compute_dihedrals(before, quads)
    assert np.all(_angle_diff(turned, delta) < 1e-5)
    # Source: mdtraj.compute_distances; each side of the central bond moves rigidly while
    # distances across it change.
    side = np.zeros(mol.GetNumAtoms(), dtype=bool)
    frag = Chem.FragmentOnBonds(mol, [mol.GetBondBetweenAtoms(1, 2).GetIdx()], addDummies=False)
    for atoms in Chem.GetMolFrags(frag):
        side[list(atoms)] = 2 in atoms
    assert all(side[moving_atoms])
    same = [(i, j) for i in range(len(side)) for j in range(i) if side[i] == side[j]]
    across = [(i, j) for i in range(len(side)) for j in range(i)
              if side[i] != side[j] and not {1, 2} & {i, j}]
    np.testing.assert_allclose(md.compute_distances(after, same),
                               md.compute_distances(before, same), atol=1e-6)
    changed = np.abs(md.compute_distances(after, across) - md.compute_distances(before, across))
    assert changed.min() > 1e-3


def test_bad_input_raises():
    with pytest.raises(ValueError, match="not connected"):
        build_zmatrix(4, [(0, 1), (2, 3)])
    with pytest.raises(ValueError, match="at least 3 atoms"):
        build_zmatrix(2, [(0, 1)])
    with pytest.raises(ValueError, match="outside"):
        build_zmatrix(3, [(0, 1), (1, 3)])
    with pytest.raises(ValueError, match="itself"):
        build_zmatrix(3, [(0, 1), (1, 1), (1, 2)])
    with pytest.raises(ValueError, match="heavy"):
        build_zmatrix(3, [(0, 1), (1, 2)], heavy=[True, False])
    with pytest.raises(ValueError, match="not a bond"):
        build_zmatrix(3, [(0, 1), (1, 2)], rotatable=[(0, 2)])
    zmat = build_zmatrix(4, [(0, 1), (1, 2), (2, 3)])
    with pytest.raises(ValueError, match="positions_nm"):
        cartesian_to_internal(zmat, np.zeros((4, 3)))
    with pytest.raises(ValueError, match="torsions_rad"):
        internal_to_cartesian(zmat, np.ones((2, 3)), np.ones((2, 2)), np.ones((2, 2)))
    with pytest.raises(ValueError, match="batch size"):
        internal_to_cartesian(zmat, np.ones((2, 3)), np.ones((2, 2)), np.ones((1, 1)))


@pytest.mark.parametrize("name", ["ethanol", "methylcyclohexane", "ibuprofen"])
def test_level_batched_nerf_matches_row_by_row_loop(name):
    from hopwell.bench.coords import row_by_row_nerf

    _, zmat, positions_nm, _ = _molecule(SMILES[name])
    ic = cartesian_to_internal(zmat, positions_nm)
    rng = np.random.default_rng(4)
    # Far from the input structures too: torsions anywhere, angles and bonds perturbed.
    q = [(ic.bonds_nm * torch.from_numpy(rng.uniform(0.8, 1.2, ic.bonds_nm.shape))).requires_grad_(),
         (ic.angles_rad + torch.from_numpy(rng.normal(0, 0.2, ic.angles_rad.shape))).requires_grad_(),
         torch.from_numpy(rng.uniform(-np.pi, np.pi, ic.torsions_rad.shape)).requires_grad_()]
    weights = torch.from_numpy(rng.normal(size=positions_nm.shape))
    fast, _ = internal_to_cartesian(zmat, *q)
    fast_grads = torch.autograd.grad((fast * weights).sum(), q)
    slow = row_by_row_nerf(zmat, *q)
    slow_grads = torch.autograd.grad((slow * weights).sum(), q)
    # Source: the previous one-row-at-a-time NeRF, kept in hopwell.bench.coords as the slow path.
    torch.testing.assert_close(fast, slow, rtol=0, atol=1e-12)
    for g_fast, g_slow in zip(fast_grads, slow_grads):
        torch.testing.assert_close(g_fast, g_slow, rtol=0, atol=1e-10)
    assert zmat.placement_levels.max() < zmat.n_atoms - 3  # fewer steps than rows


@pytest.mark.parametrize("name", ["butane", "ibuprofen"])
def test_placement_levels_follow_references(name):
    _, zmat, _, _ = _molecule(SMILES[name], n_conformers=1)
    levels = zmat.placement_levels
    assert levels is zmat.placement_levels  # computed once per Z-matrix
    level_of = {int(atom): int(levels[row]) for row, atom in enumerate(zmat.order)}
    assert list(levels[:3]) == [0, 0, 0]
    for row in range(3, zmat.n_atoms):
        refs = [int(r[row]) for r in (zmat.bond_ref, zmat.angle_ref, zmat.torsion_ref)]
        assert levels[row] == 1 + max(level_of[r] for r in refs)
    assert set(levels) == set(range(levels.max() + 1))


@pytest.mark.parametrize("smiles", ["CCCCCC", "COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1", "CC(=O)NC(C)C(=O)NC"])
def test_turning_a_moving_torsion_keeps_every_bond_angle(smiles):
    # Geometry: a rotation about a bond moves no bond angle (a fact of the trade); mdtraj
    # measures the angles. Hexane and the aryl ether are molecules whose root's hydrogens once
    # took their torsion reference across the first bond and bent by about 50 degrees.
    from hopwell.coords.torsions import moving_torsions

    mol, zmat, positions_nm, _ = _molecule(smiles, n_conformers=1)
    top = md.Topology()
    residue = top.add_residue("MOL", top.add_chain())
    for atom in mol.GetAtoms():
        top.add_atom(f"A{atom.GetIdx()}", md.element.get_by_symbol(atom.GetSymbol()), residue)
    triples = np.array([(n1.GetIdx(), atom.GetIdx(), n2.GetIdx()) for atom in mol.GetAtoms()
                        for i, n1 in enumerate(atom.GetNeighbors())
                        for n2 in list(atom.GetNeighbors())[i + 1:]])
    before = md.compute_angles(md.Trajectory(positions_nm.astype(np.float32), top), triples)
    ic = cartesian_to_internal(zmat, positions_nm)
    rows = moving_torsions(zmat, mol)
    assert len(rows) >= 3
    for k in rows:
        torsions = ic.torsions_rad.clone()
        torsions[:, k] += 1.0
        turned, _ = internal_to_cartesian(zmat, ic.bonds_nm, ic.angles_rad, torsions)
        after = md.compute_angles(md.Trajectory(turned.numpy().astype(np.float32), top), triples)
        assert np.degrees(np.abs(after - before).max()) < 1e-2, f"row {k}"
