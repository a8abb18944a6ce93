"""The system builder: inputs, seeds, Amber and OBC2, against outside references."""

import numpy as np
import openmm
import pytest
from openmm import app
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolAlign

from hopwell.errors import InputError
from hopwell.systems import seeds
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator
from hopwell.systems.solvent import (
    GB_FORCE_GROUP,
    SOLVENT_DIELECTRIC,
    obc2_parameters,
)


def _write_sdf(path, mols):
    writer = Chem.SDWriter(str(path))
    for mol in mols:
        for conf in mol.GetConformers():
            writer.write(mol, confId=conf.GetId())
    writer.close()


def _embedded(smiles, n, seed=1):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    AllChem.EmbedMultipleConfs(mol, numConfs=n, randomSeed=seed)
    AllChem.MMFFOptimizeMoleculeConfs(mol)
    return mol


def _with_positions(mol, xyz_nm):
    """A copy of ``mol`` whose only conformer is ``xyz_nm`` (converted to Angstrom)."""
    out = Chem.Mol(mol)
    out.RemoveAllConformers()
    conf = Chem.Conformer(out.GetNumAtoms())
    for i, row in enumerate(xyz_nm * 10):
        conf.SetAtomPosition(i, row.tolist())
    out.AddConformer(conf)
    return out


def test_smiles_seeds_are_distinct():
    molsys = build("CCCCC", BuildOptions(n_seeds=20, random_seed=7))
    # Pentane has 4 symmetry-distinct backbone conformers in its anti/gauche manifold (tt, tg,
    # gg, gg'), a fact of the trade; ETKDG with 20 tries finds most, and de-duplication with
    # symmetry must not keep mirror-related or methyl-rotated copies of one.
    assert 2 <= len(molsys.seeds_nm) <= 4
    # Reference: RDKit GetBestRMS (symmetry-aware) on every pair, outside the builder's loop.
    mols = [Chem.RemoveHs(_with_positions(molsys.mol, xyz)) for xyz in molsys.seeds_nm]
    for a in range(len(mols)):
        for b in range(a + 1, len(mols)):
            assert rdMolAlign.GetBestRMS(Chem.Mol(mols[a]), mols[b]) >= 0.5


def test_default_seeding_grows_with_the_rotatable_bonds():
    # RDKit's strict rotatable-bond SMARTS (Descriptors' NumRotatableBonds) as the outside count.
    from rdkit.Chem import Descriptors

    for smiles in ("CCCC", "CCCCCC", "CCOC(=O)c1ccc(OCCOCC[NH+]2CCCCC2)cc1"):
        n_rot = Descriptors.NumRotatableBonds(Chem.MolFromSmiles(smiles))
        assert seeds.seed_count(n_rot) == min(300, 30 + 30 * n_rot)
    molsys = build("CCCCCC", BuildOptions(random_seed=7))  # hexane: 3 rotatable bonds
    assert "seeds from 120 ETKDG conformers, MMFF94-minimized" in molsys.notes
    assert build("CCCCCC", BuildOptions(n_seeds=5, random_seed=7)).notes[0].startswith("seeds from 5 ")


def test_unspecified_stereo_is_refused_unless_picked():
    with pytest.raises(InputError, match="stereo unspecified"):
        build("CC(N)C(=O)O")
    molsys = build("CC(N)C(=O)O", BuildOptions(pick_isomer=True, n_seeds=3))
    # The picked isomer is one stereoisomer, not a mixture: every seed has the same CIP label
    # (RDKit's perception from 3D is the reference).
    labels = set()
    for xyz in molsys.seeds_nm:
        m = _with_positions(molsys.mol, xyz)
        Chem.AssignStereochemistryFrom3D(m)
        labels.add(tuple(Chem.FindMolChiralCenters(m)))
    assert len(labels) == 1 and len(next(iter(labels))) == 1


def test_sdf_records_become_seeds_and_energies_match_rdkit(tmp_path):
    mol = _embedded("CC(=O)NCCc1ccccc1", 6)
    path = tmp_path / "confs.sdf"
    _write_sdf(path, [mol])
    molsys = build(str(path))
    assert molsys.input_positions_nm.shape == (6, mol.GetNumAtoms(), 3)
    energies = EnergyEvaluator(molsys.system, 300.0).energies_kj(molsys.input_positions_nm)
    # Reference: RDKit's MMFF94 energy of each record as written (kcal/mol -> kJ/mol).
    props = AllChem.MMFFGetMoleculeProperties(mol)
    ref = [AllChem.MMFFGetMoleculeForceField(mol, props, confId=c.GetId()).CalcEnergy() * 4.184
           for c in mol.GetConformers()]
    # SDF stores 4 decimals of Angstrom: the rounding moves energies by ~1e-3 kJ/mol.
    rounded = Chem.SDMolSupplier(str(path), removeHs=False)
    ref_rounded = [AllChem.MMFFGetMoleculeForceField(m, AllChem.MMFFGetMoleculeProperties(m)).CalcEnergy() * 4.184
                   for m in rounded]
    np.testing.assert_allclose(energies, ref_rounded, atol=4.184e-4)
    np.testing.assert_allclose(energies, ref, atol=0.05)


def test_sdf_of_two_molecules_names_the_record(tmp_path):
    path = tmp_path / "mixed.sdf"
    _write_sdf(path, [_embedded("CCO", 2), _embedded("CCN", 1)])
    with pytest.raises(InputError, match="record 3"):
        build(str(path))


def test_sdf_without_hydrogens(tmp_path):
    mol = Chem.RemoveHs(_embedded("CC(=O)NC", 1))
    path = tmp_path / "noh.sdf"
    _write_sdf(path, [mol])
    with pytest.raises(InputError, match="lacks"):
        build(str(path))
    molsys = build(str(path), BuildOptions(add_hydrogens=True))
    assert molsys.n_atoms == 12


def test_mol2_reads_like_sdf(tmp_path):
    mol = _embedded("CCOC(=O)C", 1)
    lines = ["@<TRIPOS>MOLECULE", "ester", f"{mol.GetNumAtoms()} {mol.GetNumBonds()} 0 0 0",
             "SMALL", "NO_CHARGES", "", "@<TRIPOS>ATOM"]
    types = {1: "H", 6: "C.3", 8: "O.3"}
    xyz = mol.GetConformer().GetPositions()
    for a in mol.GetAtoms():
        t = types[a.GetAtomicNum()]
        if a.GetAtomicNum() == 6 and a.GetHybridization() == Chem.HybridizationType.SP2:
            t = "C.2"
        if a.GetAtomicNum() == 8 and a.GetDegree() == 1:
            t = "O.2"
        x, y, z = xyz[a.GetIdx()]
        lines.append(f"{a.GetIdx() + 1} {a.GetSymbol()}{a.GetIdx() + 1} {x:.4f} {y:.4f} {z:.4f} {t} 1 UNL 0.0")
    lines.append("@<TRIPOS>BOND")
    for b in mol.GetBonds():
        order = "2" if b.GetBondType() == Chem.BondType.DOUBLE else "1"
        lines.append(f"{b.GetIdx() + 1} {b.GetBeginAtomIdx() + 1} {b.GetEndAtomIdx() + 1} {order}")
    path = tmp_path / "ester.mol2"
    path.write_text("\n".join(lines) + "\n")
    molsys = build(str(path))
    assert Chem.MolToSmiles(Chem.RemoveHs(molsys.mol)) == Chem.CanonSmiles("CCOC(C)=O")


def test_peptide_hydrogens_and_stereo(systems_dir):
    molsys = build(str(systems_dir / "ace_ala_nme.pdb"))
    assert molsys.forcefield == "amber14" and molsys.n_atoms == 22
    # L-alanine's CA is S by CIP rules (fact of the trade); RDKit perceives it from 3D.
    assert [label for _, label in Chem.FindMolChiralCenters(molsys.mol)] == ["S"]


def test_backbone_seeds_are_minima_in_distinct_regions(systems_dir):
    import mdtraj as md

    from hopwell.systems.backbone import BACKBONE_STATES, backbone_state

    plain = build(str(systems_dir / "ace_ala_nme.pdb"), BuildOptions(backbone_seeds=False))
    molsys = build(str(systems_dir / "ace_ala_nme.pdb"))
    assert len(plain.seeds_nm) == 1 and len(molsys.seeds_nm) > 2
    # The input comes first (heavy atoms: Modeller's hydrogen placement varies between builds).
    heavy = [a.GetIdx() for a in molsys.mol.GetAtoms() if a.GetAtomicNum() > 1]
    np.testing.assert_allclose(molsys.seeds_nm[0, heavy], plain.seeds_nm[0, heavy], atol=1e-6)
    # Regions from mdtraj's phi/psi (an outside geometry), not from the builder's own numbers.
    traj = md.Trajectory(molsys.seeds_nm.astype(np.float32), md.Topology.from_openmm(molsys.topology))
    phi, psi = (np.degrees(f(traj)[1][:, 0]) for f in (md.compute_phi, md.compute_psi))
    regions = [BACKBONE_STATES[k] for k in backbone_state(phi, psi)]
    assert len(set(regions)) == len(regions), regions
    # Vacuum Ace-Ala-NMe has a C7ax minimum at phi > 0 (a fact of the trade for this peptide).
    assert "C7ax" in regions
    # Minimized seeds: every added seed sits where the force nearly vanishes (OpenMM's forces).
    forces = EnergyEvaluator(molsys.system, 300.0).forces_kj_nm(molsys.seeds_nm[1:])
    assert np.abs(forces).max() < 20.0


def test_peptide_obc2_matches_openmm_route(systems_dir):
    molsys = build(str(systems_dir / "ace_ala_nme.pdb"), BuildOptions(solvent="obc2"))
    # Reference: OpenMM's own implicit-solvent route (CustomGBForce from implicit/obc2.xml).
    forcefield = app.ForceField("amber14-all.xml", "implicit/obc2.xml")
    reference = forcefield.createSystem(molsys.topology, nonbondedMethod=app.NoCutoff, constraints=None)
    rng = np.random.default_rng(3)
    frames = molsys.seeds_nm[0] + rng.normal(0.0, 0.005, size=(5, *molsys.seeds_nm[0].shape))
    ours = EnergyEvaluator(molsys.system, 300.0).energies_kj(frames)
    theirs = EnergyEvaluator(reference, 300.0).energies_kj(frames)
    np.testing.assert_allclose(ours, theirs, atol=1e-4, rtol=0)


def test_small_molecule_gb_parameters_are_published_values():
    molsys = build("NCC(=O)OCF", BuildOptions(solvent="obc2", n_seeds=2))
    params = obc2_parameters(molsys.topology)
    # mbondi2 radii (Angstrom) and OBC screening factors: Onufriev, Bashford & Case 2004 and
    # Amber's mbondi2 set, as listed in the project's REFERENCES.md (H 1.2, 1.3 on N; C 1.7;
    # N 1.55; O 1.5; F 1.5 / screening H 0.85, C 0.72, N 0.79, O 0.85, F 0.88).
    published = {"C": (1.7, 0.72), "N": (1.55, 0.79), "O": (1.5, 0.85), "F": (1.5, 0.88)}
    for atom, (radius_nm, scale) in zip(molsys.mol.GetAtoms(), params):
        symbol = atom.GetSymbol()
        if symbol == "H":
            on_n = atom.GetNeighbors()[0].GetSymbol() == "N"
            assert (radius_nm * 10, scale) == pytest.approx((1.3 if on_n else 1.2, 0.85))
        else:
            assert (radius_nm * 10, scale) == pytest.approx(published[symbol])
    gb = next(f for f in molsys.system.getForces() if isinstance(f, openmm.GBSAOBCForce))
    assert gb.getSolventDielectric() == SOLVENT_DIELECTRIC == 78.5
    assert gb.getForceGroup() == GB_FORCE_GROUP


@pytest.mark.parametrize("smiles", ["CC(=O)NC", "OCCO", "C[NH3+]", "CC(=O)[O-]"])
def test_gb_solvation_energy_is_negative_for_polar_molecules(smiles):
    # Fact of the trade: polar and charged solutes are stabilized by water, so the OBC2
    # solvation free energy (water minus vacuum at the same geometry) is negative.
    vac = build(smiles, BuildOptions(n_seeds=1))
    wat = build(smiles, BuildOptions(solvent="obc2", n_seeds=1))
    x = vac.seeds_nm[:1]
    dg = EnergyEvaluator(wat.system, 300.0).energies_kj(x) - EnergyEvaluator(vac.system, 300.0).energies_kj(x)
    assert dg[0] < -5.0


@pytest.mark.parametrize(
    "spec, message",
    [
        ("C1CC", "cannot parse SMILES"),
        ("CC.O", "disconnected"),
        ("C[CH2]", "radical"),
        ("[Fe+2]", "atoms"),
        ("CC[Fe]", "cannot type"),
        ("C" * 110, "exceeds the limit"),
        ("missing.sdf", "no such file"),
    ],
)
def test_bad_input_is_one_clear_error(spec, message):
    with pytest.raises(InputError, match=message):
        build(spec, BuildOptions(n_seeds=1))


def test_bad_pdb_residue_and_overlapping_atoms(tmp_path, systems_dir):
    text = (systems_dir / "ace_ala_nme.pdb").read_text().replace("ALA", "XYZ")
    (tmp_path / "odd.pdb").write_text(text)
    with pytest.raises(InputError, match="XYZ is not a standard peptide residue"):
        build(str(tmp_path / "odd.pdb"))
    mol = _embedded("CCO", 1)
    conf = mol.GetConformer()
    conf.SetAtomPosition(1, conf.GetAtomPosition(0))
    _write_sdf(tmp_path / "overlap.sdf", [mol])
    with pytest.raises(InputError, match="overlapping"):
        build(str(tmp_path / "overlap.sdf"))


def test_small_molecule_pdb_needs_template(tmp_path):
    mol = _embedded("CC(=O)O", 1)
    Chem.MolToPDBFile(mol, str(tmp_path / "acid.pdb"))
    with pytest.raises(InputError, match="--template"):
        build(str(tmp_path / "acid.pdb"))
    molsys = build(str(tmp_path / "acid.pdb"), BuildOptions(template="CC(=O)O"))
    assert Chem.MolToSmiles(Chem.RemoveHs(molsys.mol)) == "CC(=O)O"
