"""Well names a chemist reads, checked on MMFF94 minima whose geometry RDKit measures.

The geometry of each structure comes from RDKit (ETKDG embedding, ``MMFFOptimizeMolecule``,
``rdMolTransforms.GetDihedralDeg``); the names are the trade's: N-methylacetamide's preferred
isomer is trans (C-N-methyl anti to the acetyl carbon; Jorgensen & Gao, J. Am. Chem. Soc. 110,
4212 (1988), from memory), methyl acetate's is the Z (syn) ester (methyl syn-periplanar to the
carbonyl oxygen; Wiberg & Laidig, J. Am. Chem. Soc. 109, 5935 (1987), from memory), and n-butane's
global minimum is anti (a textbook fact). Each is also named from the torsion written the other
way round (starting at the C=O oxygen), which turns the angle by 180 degrees but must not change
the name.
"""

from __future__ import annotations

import pytest
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolTransforms

from hopwell.analysis.labels import torsion_labels, well_name, well_word


def _minimum(smiles: str, seed: int = 11) -> Chem.Mol:
    """The lowest of twelve MMFF94-minimized ETKDG structures, alone in a copy of the molecule."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    ids = list(AllChem.EmbedMultipleConfs(mol, 12, randomSeed=seed))
    energies = [e for _, e in AllChem.MMFFOptimizeMoleculeConfs(mol, maxIters=5000)]
    return Chem.Mol(mol, confId=ids[min(range(len(ids)), key=energies.__getitem__)])


def _named(mol: Chem.Mol, atoms: tuple) -> tuple[str, str]:
    (label,) = torsion_labels(mol, [(atoms, 1)])
    return label.bond, well_word(label, rdMolTransforms.GetDihedralDeg(mol.GetConformer(), *atoms))


# (SMILES, heavy-atom torsion C-C-X-C, the same bond from the C=O oxygen O=C-X-C, bond, name)
CASES = [
    ("CC(=O)NC", (0, 1, 3, 4), (2, 1, 3, 4), "C(=O)-N amide", "trans"),
    ("CC(=O)OC", (0, 1, 3, 4), (2, 1, 3, 4), "C(=O)-O ester", "syn"),
]


@pytest.mark.parametrize("smiles, through_carbon, through_oxygen, bond, name", CASES)
def test_preferred_isomer_is_named_the_same_from_either_end(smiles, through_carbon, through_oxygen, bond, name):
    mol = _minimum(smiles)
    assert _named(mol, through_carbon) == (bond, name)
    assert _named(mol, through_oxygen) == (bond, name)


def test_ester_turned_to_e_is_anti():
    mol = _minimum("CC(=O)OC")
    conf = mol.GetConformer()
    rdMolTransforms.SetDihedralDeg(conf, 2, 1, 3, 4, 180.0)  # methyl anti to the carbonyl O
    assert _named(mol, (0, 1, 3, 4))[1] == "anti"
    assert _named(mol, (2, 1, 3, 4))[1] == "anti"


def test_butane_minimum_is_anti_and_its_gauche_wells_are_signed():
    mol = _minimum("CCCC")
    (label,) = torsion_labels(mol, [((0, 1, 2, 3), 1)])
    assert label.kind == "sp3"
    assert well_word(label, rdMolTransforms.GetDihedralDeg(mol.GetConformer(), 0, 1, 2, 3)) == "anti"
    assert [well_name(label, c) for c in (65.0, -65.0, 0.0)] == ["A:gauche+(+65)", "A:gauche-(-65)", "A:syn(0)"]
