"""The build and energy commands: the contract other tools rely on."""

import json
import subprocess
import sys

import pytest
from click.testing import CliRunner
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.cli import main


def test_build_json_summary(systems_dir):
    result = CliRunner().invoke(main, ["build", str(systems_dir / "ace_ala_nme.pdb"), "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.output)
    # Ace-Ala-NMe: C6H12N2O2, 22 atoms, neutral, one stereocentre (CA) - facts of the molecule.
    assert summary["formula"] == "C6H12N2O2"
    assert (summary["atoms"], summary["net_charge"], summary["stereocentres"]) == (22, 0, 1)
    # The input structure plus backbone seeds in other regions (hopwell.systems.backbone).
    assert summary["forcefield"] == "amber14" and summary["seeds"] > 1
    assert any("backbone seeds" in note for note in summary["notes"])


def test_energy_json_matches_rdkit(tmp_path):
    mol = Chem.AddHs(Chem.MolFromSmiles("OCC(=O)N"))
    AllChem.EmbedMultipleConfs(mol, numConfs=3, randomSeed=5)
    writer = Chem.SDWriter(str(tmp_path / "m.sdf"))
    for conf in mol.GetConformers():
        writer.write(mol, confId=conf.GetId())
    writer.close()
    result = CliRunner().invoke(main, ["energy", str(tmp_path / "m.sdf"), "--forcefield", "mmff94s", "--json"])
    assert result.exit_code == 0, result.output
    out = json.loads(result.output)
    assert out["unit"] == "kJ/mol" and len(out["energies"]) == 3
    # Reference: RDKit's MMFF94s energy of the records as read back from the SDF.
    ref = []
    for m in Chem.SDMolSupplier(str(tmp_path / "m.sdf"), removeHs=False):
        props = AllChem.MMFFGetMoleculeProperties(m, mmffVariant="MMFF94s")
        ref.append(AllChem.MMFFGetMoleculeForceField(m, props).CalcEnergy() * 4.184)
    assert out["energies"] == pytest.approx(ref, abs=4.184e-4)


def test_build_writes_system_xml(tmp_path):
    out = tmp_path / "system.xml"
    result = CliRunner().invoke(main, ["build", "CCO", "--seeds", "2", "-o", str(out)])
    assert result.exit_code == 0, result.output
    assert out.read_text().startswith("<?xml")


@pytest.mark.parametrize(
    "args",
    [
        ["build", "C1CC"],
        ["build", "CC[Fe]"],
        ["energy", "nothere.sdf", "--json"],
        ["build", "CCO", "--solvent", "water"],
        ["build", "CCO", "--seeds", "0"],
    ],
)
def test_bad_input_exits_2_with_one_line(args):
    # A real process, so the exit code and stderr are what a shell sees.
    proc = subprocess.run([sys.executable, "-m", "hopwell.cli", *args], capture_output=True, text=True)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    if args[-1] != "water":  # click's own usage errors print a usage block, also exit 2
        assert len(proc.stderr.strip().splitlines()) == 1, proc.stderr


def test_progress_line_lists_a_few_seed_basins_or_the_largest_of_many():
    from hopwell.cli import basin_shares

    assert basin_shares([0.18, 0.04, 0.78]) == "seed basins 18/4% (outside 78%)"
    # Ten basins, three of them never entered: the five largest, by hand.
    many = [0.02, 0.03, 0.01, 0.04, 0.0, 0.0, 0.05, 0.06, 0.0, 0.01, 0.78]
    assert basin_shares(many) == "largest 5 of 10 seed basins 6/5/4/3/2%, 3 empty (outside 78%)"
