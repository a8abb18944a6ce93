"""Conformer states and the report, checked against known angles and mdtraj geometry."""

import json

import mdtraj as md
import numpy as np
import pytest
from click.testing import CliRunner
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.analysis import states as st
from hopwell.cli import main


@pytest.mark.parametrize(
    "phi, psi, name",
    # Centres of the backbone basins (REFERENCES.md, from memory; conventions vary).
    [(-80, 75, "C7eq"), (-150, 155, "C5/beta"), (-75, 145, "PII"), (-70, -40, "alphaR"),
     (70, -70, "C7ax"), (60, 45, "alphaL")],
)
def test_backbone_regions_at_known_basin_centres(phi, psi, name):
    assert st.BACKBONE_STATES[int(st.backbone_state(np.array([phi]), np.array([psi]))[0])] == name


def test_wells_found_where_the_density_has_them():
    # Samples of a known three-well torsion density (von Mises components at -60, 60, 180
    # degrees, numpy's sampler): the well boundaries must separate the generating components.
    rng = np.random.default_rng(4)
    centres = np.deg2rad([-60.0, 60.0, 180.0])
    labels = rng.choice(3, size=20000, p=[0.2, 0.3, 0.5])
    x = rng.vonmises(centres[labels], 12.0)
    edges = st.well_edges(x)
    assert len(edges) == 3
    wells = st.assign_wells(x, edges)
    # Map found wells to generating components by majority; misassignment only in the tails.
    agreement = max(np.mean(wells == np.roll(np.arange(3), k)[labels]) for k in range(3))
    assert agreement > 0.99


def _two_well_samples(rng, n, rare_fraction, rare_deg, common_deg=180.0):
    """Torsions (rad) from von Mises wells (numpy's sampler), ``rare_fraction`` near ``rare_deg``."""
    rare = rng.random(n) < rare_fraction
    return rng.vonmises(np.deg2rad(np.where(rare, rare_deg, common_deg)), 40.0), rare


@pytest.mark.parametrize("rare_fraction", [0.004, 0.0005])
def test_amide_keeps_a_rare_cis_state(rare_fraction):
    # N-methylacetamide: one state torsion, about the amide C-N bond. Its cis isomer at 0.4%
    # (the fraction measured in a short run) or 0.05% of the samples is below the wells' mass
    # floor (1%) and the states' population floor (0.5%), yet must be a state of its own.
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)NC"))
    (atoms, period), = st.state_torsions(mol)
    assert atoms[1:3] == (1, 3) and period == 1  # the carbonyl C and the N
    x, cis = _two_well_samples(np.random.default_rng(5), 20000, rare_fraction, 0.0)
    model = st.torsion_model(mol, x[:, None])
    # Wells named as the trade does (C-C(=O)-N-C at 180 is the trans amide: fact of the trade).
    assert model.names == ("A:trans(180)", "A:cis(0)", "other")
    np.testing.assert_allclose(model.edges[0], np.deg2rad([-90.0, 90.0]))
    assert np.array_equal(model.assign(x[:, None]), cis.astype(int))


def test_cis_trans_wells_only_for_amide_like_bonds():
    # The same rare well on n-butane's C-C-C-C torsion is merged into its neighbour (data
    # wells), while an amide with no cis sample still has both wells (no cis state: a later
    # cis sample is "other").
    rng = np.random.default_rng(6)
    x, _ = _two_well_samples(rng, 20000, 0.004, 0.0)
    butane = st.torsion_model(Chem.AddHs(Chem.MolFromSmiles("CCCC")), x[:, None])
    assert butane.names == ("A:anti(180)", "other") and len(butane.edges[0]) == 0
    amide = Chem.AddHs(Chem.MolFromSmiles("CC(=O)NC"))
    trans_only = rng.vonmises(np.pi, 40.0, 5000)[:, None]
    model = st.torsion_model(amide, trans_only)
    assert model.names == ("A:trans(180)", "other") and len(model.edges[0]) == 2
    assert model.assign(np.array([[0.1], [np.pi]])).tolist() == [1, 0]
    # Ester and thioamide bonds are amide-like (STIFF_BOND); N,N-dimethylacetamide's cis and
    # trans are one conformer (period 2), so its wells come from the data.
    for smiles, expected in (("CC(=O)OC", [True]), ("CC(=S)NC", [True]), ("CC(=O)N(C)C", [False]),
                             ("CCCC", [False])):
        mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
        assert st.cis_trans_torsions(mol, st.state_torsions(mol)) == expected, smiles


def test_rare_amide_isomer_joins_the_most_populated_combination():
    # Two torsions: the amide C-N and the N-CH2 of N-benzyl-N-methylacetamide (the demo
    # molecule). The cis samples (0.3%) spread over two N-CH2 wells; the state added for cis is
    # the more populated of those two combinations, the other stays "other".
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)N(C)Cc1ccccc1"))
    torsions = st.state_torsions(mol)
    assert st.cis_trans_torsions(mol, torsions) == [True, False, False]
    rng = np.random.default_rng(7)
    n = 40000
    amide, cis = _two_well_samples(rng, n, 0.003, 0.0)
    side = rng.vonmises(np.deg2rad(np.where(rng.random(n) < 0.7, 90.0, -90.0)), 20.0)
    ring = rng.vonmises(0.0, 20.0, n)
    model = st.torsion_model(mol, np.stack([amide, side, ring], axis=1))
    labels = model.assign(np.stack([amide, side, ring], axis=1))
    cis_names = [name for name in model.names if name.split()[0] == "A:cis(0)"]
    assert len(cis_names) == 1 and cis_names[0].split()[1] == "B:+90"
    assert np.all(labels[cis & (side > 0)] == model.names.index(cis_names[0]))
    assert np.all(labels[cis & (side < 0)] == len(model.names) - 1)


def test_state_torsions_match_mdtraj_and_fold_symmetric_rings():
    mol = Chem.AddHs(Chem.MolFromSmiles("CCc1ccc(C)cc1"))
    AllChem.EmbedMultipleConfs(mol, numConfs=3, randomSeed=2)
    torsions = st.state_torsions(mol)
    # The ethyl-ring bond: the ring's two ortho carbons are equivalent (a ring flip by 180
    # degrees gives the same conformer, fact of the trade), so that torsion has period 2.
    periods = sorted(p for _, p in torsions)
    assert periods == [2]
    xyz = np.stack([c.GetPositions() for c in mol.GetConformers()]) * 0.1
    top = md.Topology()
    chain = top.add_chain()
    res = top.add_residue("MOL", chain)
    for a in mol.GetAtoms():
        top.add_atom(a.GetSymbol() + str(a.GetIdx()), md.element.get_by_symbol(a.GetSymbol()), res)
    ours = st.dihedrals(xyz, top, torsions)
    # Reference: RDKit's own dihedral measurement (degrees) on the same atoms.
    from rdkit.Chem import rdMolTransforms
    ref = [[rdMolTransforms.GetDihedralRad(c, *atoms) for atoms, _ in torsions] for c in mol.GetConformers()]
    np.testing.assert_allclose(ours, ref, atol=1e-5)
    folded = st.fold(np.array([0.3, 0.3 + np.pi]), 2)
    assert folded[0] == pytest.approx(folded[1])


def test_report_on_a_short_butane_run(tmp_path):
    run_dir = tmp_path / "butane"
    result = CliRunner().invoke(main, ["run", "CCCC", "-o", str(run_dir), "--samples", "400",
                                       "--training-cycles", "20", "--langevin-steps", "100",
                                       "--proposals", "8", "--seeds", "5"])
    assert result.exit_code == 0, result.output
    result = CliRunner().invoke(main, ["report", str(run_dir), "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.output)
    assert summary["verdict"] in ("converged", "not converged")
    assert sum(s["population"] for s in summary["states"]) == pytest.approx(1.0)
    for s in summary["states"]:
        assert s["ci95"][0] <= s["population"] <= s["ci95"][1]
    names = [s["name"] for s in summary["states"]]
    # n-butane's C-C-C-C torsion has anti (180) and two gauche (+-60) wells: fact of the trade.
    assert "A:anti(180)" in names
    assert any(n.startswith(("A:gauche+(+6", "A:gauche-(-6", "A:gauche+(+5", "A:gauche-(-5",
                             "A:gauche+(+7", "A:gauche-(-7")) for n in names), names
    for name in ("summary.json", "populations.csv", "report.html"):
        assert (run_dir / name).is_file()


def test_demo_runs_end_to_end_shortened(tmp_path):
    # The README's first command, shortened: builds the shipped SDF, trains, samples, reports.
    result = CliRunner().invoke(main, ["demo", "-o", str(tmp_path / "demo"), "--minutes", "0.5"])
    assert result.exit_code == 0, result.output
    assert "verdict:" in result.output and "report:" in result.output
    page = (tmp_path / "demo" / "report.html").read_text()
    assert 'id="populations"' in page and 'id="population-plot"' in page
    summary = json.loads((tmp_path / "demo" / "summary.json").read_text())
    # Both amide rotamers are known structures (one walker starts in each), so both states of
    # the shipped states file are populated; "other" covers nothing (the two ranges tile the circle).
    populations = {s["name"]: s["population"] for s in summary["states"]}
    assert populations["benzyl cis to O"] > 0 and populations["methyl cis to O"] > 0
    assert populations["other"] == 0


def test_user_states_file_assigns_by_torsion_range(tmp_path):
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)N(C)Cc1ccccc1"))
    path = tmp_path / "s.toml"
    path.write_text('[[state]]\nname = "a"\ncombine = "any"\n[[state.torsion]]\nsmarts = "O=C-N-[CH2]"\n'
                    'range = [-30, 30]\n[[state.torsion]]\natoms = [1, 2, 4, 5]\nrange = [170, -170]\n')
    model = st.read_user_states(path, mol)
    assert model.names == ("a", "other")
    # Ranges on the circle: 175 and -178 degrees lie in [170, -170] (wrapping through 180).
    d = np.deg2rad(np.array([[10.0, 0.0], [100.0, 175.0], [100.0, -178.0], [100.0, 0.0]]))
    assert model.assign(d).tolist() == [0, 0, 0, 1]
    bad = tmp_path / "bad.toml"
    bad.write_text('[[state]]\nname = "x"\n[[state.torsion]]\nsmarts = "[Cl]CC[Br]"\nrange = [0, 1]\n')
    from hopwell.errors import InputError
    with pytest.raises(InputError, match="does not match"):
        st.read_user_states(bad, mol)


def test_status_and_reweighting_refusal(tmp_path):
    run_dir = tmp_path / "b"
    result = CliRunner().invoke(main, ["run", "CCCC", "-o", str(run_dir), "--samples", "200",
                                       "--training-cycles", "10", "--langevin-steps", "50",
                                       "--proposals", "4", "--seeds", "3"])
    assert result.exit_code == 0, result.output
    status = json.loads(CliRunner().invoke(main, ["status", str(run_dir), "--json"]).output)
    assert status["phase"] == "production" and status["production_samples"] >= 200
    assert status["sampling_pid"] is None  # the run has ended, so nothing holds run.lock
    # 300 K -> 500 K is outside the reweighting window: refused with exit code 2.
    result = CliRunner().invoke(main, ["report", str(run_dir), "--reweight-temperature", "500"])
    assert result.exit_code == 2 and "window" in result.output
