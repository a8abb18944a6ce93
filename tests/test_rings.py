"""Ring states (chair, twist-boat, axial/equatorial), ring seeds, and darts between chairs."""

import numpy as np
import pytest
import torch
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolTransforms

from hopwell.analysis import states as st
from hopwell.systems import rings as rg


def _embedded(smiles, n, seed):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    params = AllChem.ETKDGv3()
    params.randomSeed = seed
    AllChem.EmbedMultipleConfs(mol, numConfs=n, params=params)
    AllChem.MMFFOptimizeMoleculeConfs(mol, maxIters=2000)
    return mol


def _dihedrals(mol, torsions):
    return np.array([[rdMolTransforms.GetDihedralRad(c, *t) for t in torsions] for c in mol.GetConformers()])


def _cremer_pople_theta_deg(xyz):
    """Cremer-Pople puckering angle theta of a six-ring (Cremer & Pople, J. Am. Chem. Soc. 97,
    1354 (1975), eqs. 7-14): mean plane from the ring's own Fourier sums, then q2 and q3."""
    x = xyz - xyz.mean(axis=0)
    j = np.arange(6)
    r1 = (x * np.sin(2 * np.pi * j / 6)[:, None]).sum(axis=0)
    r2 = (x * np.cos(2 * np.pi * j / 6)[:, None]).sum(axis=0)
    normal = np.cross(r1, r2)
    z = x @ (normal / np.linalg.norm(normal))
    q2 = np.hypot(z @ np.cos(4 * np.pi * j / 6), z @ np.sin(4 * np.pi * j / 6)) * np.sqrt(1 / 3)
    q3 = (z @ (-1.0) ** j) / np.sqrt(6)
    return np.degrees(np.arctan2(q2, q3)), normal / np.linalg.norm(normal)


def test_perception_of_saturated_six_rings_only():
    # Benzene and cyclohexene are not saturated; piperidine and tetrahydropyran are.
    assert rg.saturated_six_rings(Chem.AddHs(Chem.MolFromSmiles("Cc1ccccc1"))) == []
    assert rg.saturated_six_rings(Chem.AddHs(Chem.MolFromSmiles("CC1CC=CCC1"))) == []
    (ring,) = rg.saturated_six_rings(Chem.AddHs(Chem.MolFromSmiles("CN1CCOCC1")))
    assert ring.substituents == ((1, 0),) and ring.substituent_name(0) == "C1"
    mol = Chem.AddHs(Chem.MolFromSmiles("CC1CCCCC1"))
    ring, = rg.saturated_six_rings(mol)
    assert ring.atoms == (1, 2, 3, 4, 5, 6) and ring.n_torsions == 7
    for a, b, c, d in ring.torsions:  # every torsion is a bonded chain
        assert all(mol.GetBondBetweenAtoms(p, q) is not None for p, q in ((a, b), (b, c), (c, d)))


def test_chair_matches_cremer_pople_on_embedded_rings():
    # Outside reference: the Cremer-Pople angle (chair within 45 degrees of a pole, boat family
    # near the equator), computed from Cartesian coordinates, against the torsion-only rule.
    mol = _embedded("CC1CCCCC1", 40, 7)
    ring, = rg.saturated_six_rings(mol)
    d = _dihedrals(mol, ring.torsions)
    ours = rg.is_chair(d[:, :6])
    theta = np.array([_cremer_pople_theta_deg(c.GetPositions()[list(ring.atoms)])[0] for c in mol.GetConformers()])
    reference = (theta < 45) | (theta > 135)
    assert ours.any() and (~ours).any()  # ETKDG gives both chairs and twist-boats here
    assert np.array_equal(ours, reference)


@pytest.mark.parametrize("smiles, expected", [
    # Facts of the trade: cis-1,4-disubstituted chairs have one substituent axial and one
    # equatorial; trans-1,4 chairs have both equatorial or both axial.
    ("C[C@H]1CC[C@@H](C)CC1", "one of each"),
    ("C[C@H]1CC[C@H](C)CC1", "same"),
    ("CC1CCCCC1", None),
])
def test_axial_equatorial_against_the_ring_normal(smiles, expected):
    # Outside reference: an axial bond is near-parallel to the normal of the ring's mean plane
    # (ideal chair: 0 degrees), an equatorial bond near-perpendicular (about 70 degrees).
    mol = _embedded(smiles, 30, 11)
    ring, = rg.saturated_six_rings(mol)
    codes = rg.ring_codes(ring, _dihedrals(mol, ring.torsions))
    seen = set()
    for conf, code in zip(mol.GetConformers(), codes):
        if code == rg.TWIST_BOAT:
            continue
        xyz = conf.GetPositions()
        _, normal = _cremer_pople_theta_deg(xyz[list(ring.atoms)])
        mask = code - 1
        axial = []
        for i, (centre, x) in enumerate(ring.substituents):
            bond = xyz[x] - xyz[centre]
            angle = np.degrees(np.arccos(abs(bond @ normal) / np.linalg.norm(bond)))
            assert (angle < 30) if mask >> i & 1 else (angle > 55), (code, angle)
            axial.append(bool(mask >> i & 1))
        seen.add(tuple(axial))
        if expected == "one of each":
            assert sum(axial) == 1
        elif expected == "same":
            assert len(set(axial)) == 1
    assert len(seen) >= 2  # both kinds were met among the embeddings


def test_names_and_state_model_on_methylcyclohexane():
    mol = _embedded("CC1CCCCC1", 40, 7)
    ring, = rg.saturated_six_rings(mol)
    assert rg.ring_state_name(ring, 1) == "ring 1 chair, C1 equatorial"
    assert rg.ring_state_name(ring, 2) == "ring 1 chair, C1 axial"
    assert rg.ring_state_name(ring, rg.TWIST_BOAT) == "ring 1 twist-boat"
    torsions = st.state_torsions(mol)
    assert [atoms for atoms, _ in torsions] == list(ring.torsions)
    d = _dihedrals(mol, [atoms for atoms, _ in torsions])
    model = st.torsion_model(mol, d)
    labels = model.assign(d)
    codes = rg.ring_codes(ring, d)
    # every observed ring state is named (the twist-boats too: a rare ring state keeps its name)
    assert set(model.names[:-1]) == {rg.ring_state_name(ring, c) for c in set(codes)}
    for label, code in zip(labels, codes):
        assert model.names[label] == rg.ring_state_name(ring, code)


def test_ring_states_join_bond_torsion_states():
    # A rotatable bond and a ring: names read "A:..., ring 1 chair, C1 ...".
    mol = _embedded("CCCC1CCCCC1", 20, 3)
    torsions = st.state_torsions(mol)
    assert len(torsions) == len(st.bond_torsions(mol)) + 7
    d = _dihedrals(mol, [atoms for atoms, _ in torsions])
    model = st.torsion_model(mol, d)
    assert all(", ring 1 " in name for name in model.names[:-1])
    assert model.names[0].startswith("A:")


def test_builder_seeds_hold_both_chairs_and_no_twist_boat():
    from hopwell.systems.builder import build

    molsys = build("CC1CCCCC1")
    ring, = rg.saturated_six_rings(molsys.mol)
    d = np.array([[rdMolTransforms.GetDihedralRad(_conformer(molsys.mol, x), *t) for t in ring.torsions]
                  for x in molsys.seeds_nm])
    assert sorted(rg.ring_codes(ring, d)) == [1, 2]  # equatorial chair and axial chair
    # trans-4-methylcyclohexyl amide (VLT-205 of systems/ligands): diequatorial and diaxial seeds
    molsys = build("C[C@H]1CC[C@@H](CC1)NC(=O)COc1ccccc1")
    ring, = rg.saturated_six_rings(molsys.mol)
    d = np.array([[rdMolTransforms.GetDihedralRad(_conformer(molsys.mol, x), *t) for t in ring.torsions]
                  for x in molsys.seeds_nm])
    assert {1, 4} <= set(rg.ring_codes(ring, d).tolist()) and rg.TWIST_BOAT not in rg.ring_codes(ring, d)


def _conformer(mol, xyz_nm):
    conf = Chem.Conformer(mol.GetNumAtoms())
    for i, p in enumerate(np.asarray(xyz_nm) * 10.0):
        conf.SetAtomPosition(i, p.tolist())
    return conf


def test_chair_darts_reverse_exactly():
    # A thermal equatorial chair darts into the axial chair's region and back to the same
    # state; log alpha(q -> q') = -log alpha(q' -> q) (smart darting, Andricioaei et al. 2001).
    from hopwell.coords.guards import ProposalGuard
    from hopwell.coords.internal import build_zmatrix, cartesian_to_internal
    from hopwell.moves.darts import SeedDarts, build_darts, rows_placing, rows_within
    from hopwell.systems.builder import build, rotatable_bonds
    from hopwell.systems.energy import EnergyEvaluator

    molsys = build("CC1CCCCC1")
    mol = molsys.mol
    zmat = build_zmatrix(mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
                         heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))
    ring, = rg.saturated_six_rings(mol)
    evaluator = EnergyEvaluator(molsys.system, 298.0, seed=5, platform="Reference")
    centres = evaluator.minimize(molsys.seeds_nm)
    assert build_darts(zmat, np.zeros(0, dtype=int), centres) is None  # no rotatable bond
    darts = build_darts(zmat, np.zeros(0, dtype=int), centres, rows_placing(zmat, ring.atoms + (0,)),
                        rows_within(zmat, ring.atoms))
    assert darts is not None and darts.n_centres == 2
    assert darts.mirrored[0, 1] and darts.mirrored[1, 0]  # the two chairs: torsions carried mirrored
    move = SeedDarts(darts, zmat, ProposalGuard.from_mol(mol, molsys.seeds_nm[0]), evaluator, 1)
    x = centres[0]
    checked = 0
    for _ in range(40):
        x, energy, _ = evaluator.langevin(x, 100)
        energy = float(evaluator.energies_kj(x[None])[0])
        with torch.no_grad():
            q = cartesian_to_internal(zmat, torch.as_tensor(x[None]))
        source = int(darts.region(q.torsions_rad.numpy())[0])
        if source < 0:
            continue
        forward = move.propose(q, energy, source, 1 - source)
        if not np.isfinite(forward.log_alpha):
            continue
        back = move.propose(forward.landed, forward.energy_kj, 1 - source, source)
        assert back.log_alpha == pytest.approx(-forward.log_alpha, abs=1e-6)
        np.testing.assert_allclose(back.landed.torsions_rad.numpy(), q.torsions_rad.numpy(), atol=1e-6)
        checked += 1
    assert checked >= 10
