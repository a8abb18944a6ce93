"""Tests of hopwell.coords.guards against RDKit's stereo perception, periodic table and MMFF94."""

import math

import numpy as np
import pytest
import torch
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolDescriptors, rdMolTransforms

from hopwell.coords.guards import (
    BONDI_RADII_ANGSTROM,
    ClashGuard,
    ProposalGuard,
    StereoGuard,
)

KT_KCAL_300K = 0.0019872041 * 300.0


def _embedded(smiles: str, n_conformers: int = 1, seed: int = 5, minimise: bool = False):
    """RDKit molecule with hydrogens and ETKDG conformers; their positions in nm, (B, n, 3)."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    conf_ids = list(AllChem.EmbedMultipleConfs(mol, numConfs=n_conformers, randomSeed=seed))
    assert len(conf_ids) == n_conformers
    if minimise:
        AllChem.MMFFOptimizeMoleculeConfs(mol, maxIters=2000)
    return mol, 0.1 * np.array([mol.GetConformer(c).GetPositions() for c in conf_ids])


def _rdkit_stereo(mol, positions_nm):
    """RDKit's stereo read from 3D: CIP labels of centres and E/Z of double bonds."""
    probe = Chem.Mol(mol)
    probe.RemoveAllConformers()
    conf = Chem.Conformer(mol.GetNumAtoms())
    conf.SetPositions(10.0 * np.asarray(positions_nm, dtype=np.float64))
    conf.Set3D(True)
    probe.AddConformer(conf)
    for atom in probe.GetAtoms():
        atom.SetChiralTag(Chem.ChiralType.CHI_UNSPECIFIED)
    for bond in probe.GetBonds():
        bond.SetStereo(Chem.BondStereo.STEREONONE)
    Chem.AssignStereochemistryFrom3D(probe)
    centres = Chem.FindMolChiralCenters(
        probe, includeUnassigned=True, useLegacyImplementation=False
    )
    double = Chem.BondType.DOUBLE
    bonds = [str(b.GetStereo()) for b in probe.GetBonds() if b.GetBondType() == double]
    return centres, bonds


def _invert(positions_nm, mol, centre):
    """Walden inversion: reflect a centre and its H through the plane of its heavy neighbours."""
    atom = mol.GetAtomWithIdx(centre)
    heavy = [n.GetIdx() for n in atom.GetNeighbors() if n.GetAtomicNum() > 1]
    moved = [centre] + [n.GetIdx() for n in atom.GetNeighbors() if n.GetAtomicNum() == 1]
    assert len(heavy) == 3
    p0, p1, p2 = positions_nm[heavy]
    normal = np.cross(p1 - p0, p2 - p0)
    normal /= np.linalg.norm(normal)
    out = positions_nm.copy()
    out[moved] -= 2.0 * ((out[moved] - p0) @ normal)[:, None] * normal
    return out


def _metropolis_mmff(mol, n_steps=3000, every=150, step_angstrom=0.007, seed=3):
    """Boltzmann samples at 300 K of RDKit's MMFF94 (Metropolis Monte Carlo, all-atom moves)."""
    props = AllChem.MMFFGetMoleculeProperties(mol)
    rng = np.random.default_rng(seed)
    frames = []
    for conf in mol.GetConformers():
        ff = AllChem.MMFFGetMoleculeForceField(mol, props, confId=conf.GetId())
        x = conf.GetPositions().ravel()
        energy = ff.CalcEnergy(x.tolist())
        for step in range(n_steps):
            trial = x + rng.normal(0.0, step_angstrom, x.shape)
            trial_energy = ff.CalcEnergy(trial.tolist())
            if rng.random() < math.exp(min(0.0, -(trial_energy - energy) / KT_KCAL_300K)):
                x, energy = trial, trial_energy
            if step % every == every - 1:
                frames.append(0.1 * x.reshape(-1, 3))
    return np.array(frames)


def _turn_by_pi(conf, quad):
    """Turn dihedral ``quad`` of an RDKit conformer by 180 degrees (moves the last atom's side)."""
    turned_rad = rdMolTransforms.GetDihedralRad(conf, *quad) + math.pi
    rdMolTransforms.SetDihedralRad(conf, *quad, turned_rad)


def test_bondi_radii_agree_with_rdkit_periodic_table():
    # RDKit's periodic table Rvdw (from memory: a Bondi-derived table rounded to 0.05 A for these
    # elements) is the outside reference; for P and I RDKit carries other values (1.95, 2.1 A).
    table = Chem.GetPeriodicTable()
    for z in (1, 6, 7, 8, 9, 16, 17, 35):
        difference = abs(BONDI_RADII_ANGSTROM[z] - table.GetRvdw(z))
        assert difference <= 0.05 + 1e-9, table.GetElementSymbol(z)


def test_pair_selection_of_ethane_by_hand():
    # Ethane: of 28 pairs, 7 are bonded, 12 are 1-3 and the 9 H...H across the C-C bond are 1-4.
    mol = Chem.AddHs(Chem.MolFromSmiles("CC"))
    guard = ClashGuard.from_mol(mol, scale=0.5)
    assert len(guard.pairs) == 9
    assert all(mol.GetAtomWithIdx(int(i)).GetAtomicNum() == 1 for i in guard.pairs.ravel())
    np.testing.assert_allclose(guard.threshold_nm, 0.5 * 0.24)
    assert len(ClashGuard.from_mol(mol, min_bond_separation=4).pairs) == 0


def test_overlapping_and_non_finite_atoms_are_flagged():
    mol, positions_nm = _embedded("CCCCCCO", n_conformers=4)
    guard = ClashGuard.from_mol(mol)
    assert not guard(positions_nm).any()
    bad = positions_nm.copy()
    bad[0, 6] = bad[0, 0] + 0.005  # the O onto the far methyl carbon
    bad[2, 3, 1] = np.nan
    np.testing.assert_array_equal(guard(bad), [True, False, True, False])


@pytest.mark.parametrize(
    "smiles",
    [
        "CC(C)NCC(O)COc1ccccc1",  # propranolol-like amino alcohol, 7 rotatable bonds
        "[NH3+]CCCC(=O)[O-]",  # zwitterion: gas-phase salt bridge, the shortest H...O contacts
    ],
)
def test_thermal_mmff_structures_pass_the_clash_guard(smiles):
    mol, raw_nm = _embedded(smiles, n_conformers=30, seed=7)
    guard = ClashGuard.from_mol(mol)
    assert not guard(raw_nm).any()
    AllChem.MMFFOptimizeMoleculeConfs(mol, maxIters=2000)
    minimised_nm = 0.1 * np.array([c.GetPositions() for c in mol.GetConformers()])
    for conf_id in range(4, mol.GetNumConformers()):
        mol.RemoveConformer(conf_id)
    thermal_nm = _metropolis_mmff(mol)
    assert not guard(minimised_nm).any() and not guard(thermal_nm).any()
    # The ensembles do hold close contacts: a guard far above the defaults trips on them.
    assert ClashGuard.from_mol(mol, scale=0.8, hbond_scale=0.8)(thermal_nm).any()


def test_flexible_etkdg_ensemble_passes_and_unspecified_centre_is_held():
    # The amine's centre is unspecified, so ETKDG embeds both configurations; the guard holds
    # the reference's (conformer 0), and RDKit's CIP labels from 3D say which conformers differ.
    mol, positions_nm = _embedded("CCOC(=O)CCCC(N)CCc1ccccc1", n_conformers=50, seed=13)
    assert rdMolDescriptors.CalcNumRotatableBonds(mol) >= 6
    result = ProposalGuard.from_mol(mol, reference_positions_nm=positions_nm[0])(positions_nm)
    assert not result.clash.any()
    labels = [_rdkit_stereo(mol, p)[0] for p in positions_nm]
    changed = [label != labels[0] for label in labels]
    assert 0 < sum(changed) < len(changed)
    np.testing.assert_array_equal(result.stereo, changed)


@pytest.mark.parametrize(
    "smiles",
    ["C[C@@H](O)[C@H](N)C(=O)O", "C[C@H](NC)[C@@H](O)c1ccccc1", "C[S@](=O)c1ccccc1CC"],
)
def test_stereo_flags_exactly_where_rdkit_cip_labels_change(smiles):
    mol, positions_nm = _embedded(smiles, n_conformers=6, seed=2)
    reference_labels, _ = _rdkit_stereo(mol, positions_nm[0])
    centres = [c for c, _ in reference_labels]
    guard = StereoGuard.from_mol(mol)
    assert sorted(guard.centres[:, 0]) == sorted(centres)
    mirrored = positions_nm * np.array([-1.0, 1.0, 1.0])
    for c, label in _rdkit_stereo(mol, mirrored[0])[0]:
        assert label != dict(reference_labels)[c]
    assert guard(mirrored).all()
    rng = np.random.default_rng(17)
    samples, changed = [], []
    for k in range(24):
        noise_nm = rng.normal(0.0, 0.002, positions_nm.shape[1:])
        sample = positions_nm[k % len(positions_nm)] + noise_nm
        for c in centres:
            if rng.random() < 0.4:
                sample = _invert(sample, mol, c)
        samples.append(sample)
        changed.append(_rdkit_stereo(mol, sample)[0] != reference_labels)
    assert 0 < sum(changed) < len(changed)
    np.testing.assert_array_equal(guard(np.array(samples)), changed)


@pytest.mark.parametrize("smiles", ["C/C=C/C", "C/C=N/O", "C/C(F)=C(/C)c1ccccc1"])
def test_double_bond_twists_flagged_where_rdkit_e_z_changes(smiles):
    mol, positions_nm = _embedded(smiles)
    bond = next(
        b for b in mol.GetBonds() if b.GetBondType() == Chem.BondType.DOUBLE and not b.IsInRing()
    )
    a, b = bond.GetBeginAtom(), bond.GetEndAtom()
    i = next(n.GetIdx() for n in a.GetNeighbors() if n.GetIdx() != b.GetIdx())
    k = next(n.GetIdx() for n in b.GetNeighbors() if n.GetIdx() != a.GetIdx())
    guard = StereoGuard.from_mol(mol)
    assert len(guard.double_bonds) == 1
    reference = _rdkit_stereo(mol, positions_nm[0])[1]
    rng = np.random.default_rng(23)
    angles = [a_ for a_ in rng.uniform(-math.pi, math.pi, 40) if abs(math.cos(a_)) > 0.26][:16]
    samples, changed = [], []
    for angle in angles:
        conf = mol.GetConformer()
        rdMolTransforms.SetDihedralRad(conf, i, a.GetIdx(), b.GetIdx(), k, float(angle))
        samples.append(0.1 * conf.GetPositions())
        changed.append(_rdkit_stereo(mol, samples[-1])[1] != reference)
    assert 0 < sum(changed) < len(changed)
    np.testing.assert_array_equal(guard(np.array(samples)), changed)


def test_amide_cis_trans_stays_allowed():
    # RDKit's stereo perception is the reference: amide C-N bonds are single, not stereo bonds.
    nma, nma_nm = _embedded("CNC(C)=O", minimise=True)  # N-methylacetamide, trans (Z) amide
    assert len(Chem.FindPotentialStereo(nma)) == 0
    conf = nma.GetConformer()
    _turn_by_pi(conf, (0, 1, 2, 3))
    assert abs(rdMolTransforms.GetDihedralDeg(conf, 0, 1, 2, 3)) < 20.0  # now the cis amide
    guard = ProposalGuard.from_mol(nma, reference_positions_nm=nma_nm[0])
    result = guard(0.1 * conf.GetPositions()[None])
    assert not result.clash.any() and not result.stereo.any()
    # Alanine dipeptide: each amide turned by 180 degrees keeps its stereocentre (RDKit CIP).
    mol, positions_nm = _embedded("CC(=O)N[C@@H](C)C(=O)NC", minimise=True)
    guard = StereoGuard.from_mol(mol)
    samples = []
    for quad in [(4, 3, 1, 0), (4, 6, 8, 9)]:  # C-alpha, N, C, C: moves the acetyl / N-methyl end
        conf = Chem.Conformer(mol.GetConformer())
        _turn_by_pi(conf, quad)
        samples.append(0.1 * conf.GetPositions())
        assert _rdkit_stereo(mol, samples[-1]) == _rdkit_stereo(mol, positions_nm[0])
    assert not guard(np.array(samples)).any()
    assert guard(-np.array(samples)).all()


def test_rigid_nitrogen_rule():
    # N-methyl-2-methylpiperidine: RDKit does not perceive the N; its ring neighbours differ.
    mol, positions_nm = _embedded("CN1CCCCC1C")
    assert Chem.FindPotentialStereo(mol)[0].centeredOn != 1
    free, rigid = StereoGuard.from_mol(mol), StereoGuard.from_mol(mol, rigid_nitrogens=True)
    assert 1 not in free.centres[:, 0] and 1 in rigid.centres[:, 0]
    inverted = _invert(positions_nm[0], mol, 1)[None]
    assert not free(inverted).any() and rigid(inverted).all()
    # Symmetric (RDKit symmetry classes) or conjugated (RDKit sp2) nitrogens are never held.
    for smiles in ("CN1CCCCC1", "CC1CCCCN1c1ccccc1", "CC1CCCC(=O)N1C"):
        other, _ = _embedded(smiles)
        held = StereoGuard.from_mol(other, rigid_nitrogens=True).centres[:, 0]
        assert not any(other.GetAtomWithIdx(int(i)).GetAtomicNum() == 7 for i in held)


def test_batch_single_torch_and_numpy_agree():
    mol, positions_nm = _embedded("C[C@H](NC)[C@@H](O)c1ccccc1", n_conformers=4)
    positions_nm[1] *= np.array([-1.0, 1.0, 1.0])
    positions_nm[2, 5] = positions_nm[2, 11]
    guard = ProposalGuard.from_mol(mol)
    batched = guard(positions_nm)
    assert isinstance(batched.clash, np.ndarray) and batched.clash.dtype == bool
    singles = [guard(positions_nm[b : b + 1]) for b in range(4)]
    np.testing.assert_array_equal(batched.clash, [s.clash[0] for s in singles])
    np.testing.assert_array_equal(batched.stereo, [s.stereo[0] for s in singles])
    tensor = guard(torch.tensor(positions_nm, requires_grad=True))
    assert tensor.clash.dtype == torch.bool
    np.testing.assert_array_equal(tensor.rejected.numpy(), batched.rejected)
    np.testing.assert_array_equal(batched.rejected, [False, True, True, False])


def test_bad_input_raises():
    mol, positions_nm = _embedded("C[C@H](N)C(=O)O")
    guard = ProposalGuard.from_mol(mol)
    for bad in (positions_nm[0], positions_nm[:, :-1], positions_nm[..., :2]):
        with pytest.raises(ValueError):
            guard.clash(bad)
        with pytest.raises(ValueError):
            guard.stereo(bad)
    with pytest.raises(ValueError):
        ClashGuard.from_mol(Chem.MolFromSmiles("CCO"))
    with pytest.raises(ValueError):
        ClashGuard.from_mol(Chem.AddHs(Chem.MolFromSmiles("C[Si](C)(C)C")))
    with pytest.raises(ValueError):
        ClashGuard.from_mol(mol, scale=0.0)
    with pytest.raises(ValueError):
        StereoGuard.from_mol(Chem.AddHs(Chem.MolFromSmiles("C[C@H](N)C(=O)O")))
    with pytest.raises(ValueError):
        StereoGuard.from_mol(mol, reference_positions_nm=positions_nm[0, :-1])
