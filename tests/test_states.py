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
    assert "180" in names and any(n.startswith(("+6", "-6", "+5", "-5", "+7", "-7")) for n in names)
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
