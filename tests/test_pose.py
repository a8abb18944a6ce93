"""The pose's population (:mod:`hopwell.analysis.pose`) against references outside hopwell.

Dihedrals of the placed pose are checked against RDKit's own (rdMolTransforms.GetDihedralDeg)
through mdtraj; the symmetry handling against the molecule's graph automorphisms as RDKit
enumerates them; the cost against -kT ln p computed directly (kT from the CODATA gas constant
in scipy.constants).
"""

from __future__ import annotations

import json
import math

import mdtraj
import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolTransforms
from scipy import constants

from hopwell.analysis import states as st
from hopwell.analysis.pose import (
    near_pose,
    pose_images,
    pose_population,
    pose_states,
    read_pose,
)
from hopwell.errors import InputError


def _embedded(smiles: str, seed: int = 7) -> Chem.Mol:
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    AllChem.EmbedMolecule(mol, randomSeed=seed)
    AllChem.MMFFOptimizeMolecule(mol)
    return mol


def _dihedrals(xyz_nm: np.ndarray, torsions) -> np.ndarray:
    traj = mdtraj.Trajectory(np.nan_to_num(np.asarray(xyz_nm, dtype=np.float32)), None)
    return mdtraj.compute_dihedrals(traj, np.array([a for a, _ in torsions]))


def _write_sdf(path, mol: Chem.Mol, conf_ids=None) -> None:
    writer = Chem.SDWriter(str(path))
    for conf_id in conf_ids or [mol.GetConformer().GetId()]:
        writer.write(mol, confId=conf_id)
    writer.close()


def test_pose_images_carry_the_pose_dihedrals(tmp_path):
    mol = _embedded("CCCC")
    _write_sdf(tmp_path / "pose.sdf", Chem.RemoveHs(mol))  # a pose without hydrogens, as docking writes
    pose = read_pose(tmp_path / "pose.sdf")
    torsions = st.state_torsions(mol)
    images = pose_images(pose, mol, torsions)
    # n-butane's heavy-atom graph has two automorphisms (identity and end-to-end reversal).
    assert len(images) == 2
    expected = rdMolTransforms.GetDihedralDeg(mol.GetConformer(), *torsions[0][0])
    # The reversed chain C3-C2-C1-C0 has the same dihedral as C0-C1-C2-C3.
    assert np.degrees(_dihedrals(images, torsions))[:, 0] == pytest.approx([expected] * 2, abs=1e-3)
    assert np.all(np.isnan(images[:, mol.GetNumHeavyAtoms():]))  # hydrogens not placed


def test_symmetry_images_count_the_equivalent_methyl_swap():
    # 2-methylbutane: the state torsion about C2-C3 names one of the two methyls on C2
    # (the lower-numbered one); swapping the methyls is the same conformer, 120 degrees away.
    mol = _embedded("CC(C)CC")
    torsions = st.state_torsions(mol)
    heavy = Chem.RemoveHs(mol)
    images = pose_images(heavy, mol, torsions)
    assert len(images) == len(mol.GetSubstructMatches(heavy, uniquify=False))
    pose_values = _dihedrals(images, torsions)[:, 0]
    assert len({round(float(np.degrees(v))) % 360 for v in pose_values}) == 2  # two distinct images
    # Samples: the pose, its methyl-swapped twin, and a third well 120 degrees from both.
    first = pose_values[0]
    samples = np.array([[first], [first + 2 * np.pi / 3], [first - 2 * np.pi / 3]])
    samples = (samples + np.pi) % (2 * np.pi) - np.pi
    twin_is_image = np.any(np.abs(np.angle(np.exp(1j * (pose_values - samples[1, 0])))) < 0.2)
    rng = np.random.default_rng(0)
    spread = (np.concatenate([first + np.radians([0, 120, -120])[k] + 0.1 * rng.standard_normal(200)
                              for k in range(3)]))[:, None]
    model = st.torsion_model(mol, (spread + np.pi) % (2 * np.pi) - np.pi)
    near = near_pose(model, pose_values[:, None], samples)
    assert near[0]
    assert near[1] == twin_is_image and near[2] != twin_is_image  # the swap lands on one of them
    assert near.sum() == 2
    # The pose's states are states of the model.
    assert set(pose_states(model, pose_values[:, None])) <= set(model.names[:-1])


def test_pose_population_and_cost():
    kT = constants.R * 300.0 / 1000.0  # kJ/mol, CODATA gas constant
    rng = np.random.default_rng(3)
    near = rng.random((4, 5000)) < 0.2
    p, (lo, hi), dg, (dg_lo, dg_hi) = pose_population(near, kT, np.random.default_rng(1), n_boot=300)
    assert p == pytest.approx(near.mean())
    assert lo < p < hi and lo < 0.2 < hi
    assert dg == pytest.approx(-kT * math.log(near.mean()))
    assert dg_lo == pytest.approx(-kT * math.log(hi)) and dg_hi == pytest.approx(-kT * math.log(lo))
    # Never near the pose: p = 0, unbounded cost, but a finite upper bound on p.
    p0, (lo0, hi0), dg0, (dg0_lo, dg0_hi) = pose_population(np.zeros((2, 3000), bool), kT,
                                                            np.random.default_rng(1), n_boot=300)
    assert p0 == 0.0 and lo0 == 0.0 and 0 < hi0 < 0.01
    assert math.isinf(dg0) and math.isinf(dg0_hi) and math.isfinite(dg0_lo)


def test_bad_pose_files_are_refused_in_one_line(tmp_path):
    mol = _embedded("CCCC")
    other = _embedded("CCCO")
    _write_sdf(tmp_path / "other.sdf", other)
    with pytest.raises(InputError, match="not the run's molecule"):
        pose_images(read_pose(tmp_path / "other.sdf"), mol, st.state_torsions(mol))
    _write_sdf(tmp_path / "small.sdf", _embedded("CCC"))
    with pytest.raises(InputError, match="heavy atoms"):
        pose_images(read_pose(tmp_path / "small.sdf"), mol, st.state_torsions(mol))
    two = Chem.Mol(mol)
    AllChem.EmbedMultipleConfs(two, 2, randomSeed=1)
    _write_sdf(tmp_path / "two.sdf", two, [c.GetId() for c in two.GetConformers()])
    with pytest.raises(InputError, match="exactly one"):
        read_pose(tmp_path / "two.sdf")
    (tmp_path / "pose.pdb").write_text("END\n")
    with pytest.raises(InputError, match=".sdf, .mol or .mol2"):
        read_pose(tmp_path / "pose.pdb")


def test_report_gives_the_pose_population_of_a_run(tmp_path):
    """``hopwell report --pose`` on a short n-butane run: the pose (an anti structure embedded by
    RDKit, its C-C-C-C dihedral read by RDKit) lies in the report's anti state, whose row of the
    population table it must repeat, with cost -kT ln p."""
    from run_checks import hopwell, make_run

    run_dir = make_run(tmp_path / "run")
    mol = _embedded("CCCC")
    AllChem.SetDihedralDeg(mol.GetConformer(), 0, 1, 2, 3, 180.0)
    assert abs(rdMolTransforms.GetDihedralDeg(mol.GetConformer(), 0, 1, 2, 3)) == pytest.approx(180.0)
    _write_sdf(tmp_path / "anti.sdf", mol)
    result = hopwell("report", run_dir, "--pose", tmp_path / "anti.sdf", "--json")
    assert result.exit_code == 0, result.stderr
    summary = json.loads(result.stdout)
    pose = summary["pose"]
    assert pose["file"] == "anti.sdf" and len(pose["states"]) == 1 and "anti" in pose["states"][0]
    row = next(s for s in summary["states"] if s["name"] == pose["states"][0])
    assert pose["population"] == pytest.approx(row["population"])
    kT = constants.R * summary["temperature_K"] / 1000.0
    assert pose["dG_kJ_per_mol"] == pytest.approx(-kT * math.log(pose["population"]))
    assert pose["ci95"][0] <= pose["population"] <= pose["ci95"][1]
    assert 'id="pose"' in (run_dir / "report.html").read_text()
    # A pose of another molecule: one line, exit 2.
    _write_sdf(tmp_path / "propanol.sdf", _embedded("CCCO"))
    bad = hopwell("report", run_dir, "--pose", tmp_path / "propanol.sdf")
    assert bad.exit_code == 2 and "not the run's molecule" in bad.stderr and "Traceback" not in bad.stderr
