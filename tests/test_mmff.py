"""The MMFF94/MMFF94s port against RDKit's own MMFF implementation.

Reference: RDKit ``MMFFGetMoleculeForceField(...).CalcEnergy()`` and ``CalcGrad()`` (RDKit is a
general-purpose library; its MMFF code is the reference implementation of Halgren 1996 that
the port copies parameters from). Per-term energies come from RDKit with all but one term
family switched off (``SetMMFF<Term>Term``).
"""

import numpy as np
import openmm
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem, rdForceFieldHelpers

from hopwell.systems.mmff import KJ_PER_KCAL, MMFF_FORCE_GROUPS, add_mmff_forces, mmff_properties

# 32 molecules covering the chemistry the issue names: aromatic heterocycles, amides,
# sulfonamides, halogens, nitro, carboxylate and ammonium, conjugated and strained rings,
# linear centres (nitrile, alkyne, azide), phosphate and thioether.
MOLECULES = [
    "CCCC", "CC(=O)NC", "c1ccncc1", "c1cc[nH]c1", "c1ccoc1", "c1ccsc1", "c1cnc[nH]1",
    "NS(=O)(=O)c1ccc(C)cc1", "CS(=O)(=O)NC", "FC(F)(F)c1ccccc1Cl", "Brc1ccc(I)cc1",
    "O=[N+]([O-])c1ccccc1", "CC(=O)[O-]", "C[NH3+]", "[NH3+]CC(=O)[O-]", "C1CC1", "C1CCC1",
    "C1=CC=CC=C1C=C", "C=CC=CC=O", "CC#N", "C#CC1CC1", "CN=[N+]=[N-]", "COP(=O)(O)OC",
    "CSC", "OC1CCCCC1", "CC(=O)Oc1ccccc1C(=O)O", "CN1CCN(C)CC1", "O=C1CCCN1",
    "c1ccc2[nH]ccc2c1", "CC(C)Cc1ccc(C(C)C(=O)O)cc1", "NC(=O)c1cccnc1", "OC(=O)C(F)(F)F",
]
TERM_SWITCH = {
    "bond": "Bond", "angle": "Angle", "stretch_bend": "StretchBend", "out_of_plane": "Oop",
    "torsion": "Torsion", "vdw": "VdW", "electrostatic": "Ele",
}
# The acceptance: 1e-4 kcal/mol absolute or 1e-6 relative.
ABS_TOL_KCAL = 1e-4
REL_TOL = 1e-6


def _molecule(smiles: str, seed: int) -> Chem.Mol:
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    assert AllChem.EmbedMolecule(mol, randomSeed=seed) == 0
    return mol  # unminimized: every term family is away from its minimum


def _openmm_context(mol, props):
    system = openmm.System()
    for atom in mol.GetAtoms():
        system.addParticle(atom.GetMass())
    add_mmff_forces(system, mol, props)
    platform = openmm.Platform.getPlatformByName("Reference")
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), platform)
    context.setPositions(mol.GetConformer().GetPositions() * 0.1)
    return context


def _close(ours_kcal, ref_kcal):
    return abs(ours_kcal - ref_kcal) <= max(ABS_TOL_KCAL, REL_TOL * abs(ref_kcal))


@pytest.mark.parametrize("variant", ["MMFF94", "MMFF94s"])
@pytest.mark.parametrize("dielectric", ["constant", "distance"])
def test_total_energy_and_gradient_match_rdkit(variant, dielectric):
    failures = []
    for k, smiles in enumerate(MOLECULES):
        mol = _molecule(smiles, seed=100 + k)
        props = mmff_properties(mol, variant, dielectric)
        context = _openmm_context(mol, props)
        state = context.getState(getEnergy=True, getForces=True)
        ours = state.getPotentialEnergy()._value / KJ_PER_KCAL
        ff = rdForceFieldHelpers.MMFFGetMoleculeForceField(mol, props)
        ref = ff.CalcEnergy()
        # RDKit's gradient is kcal/mol/A; OpenMM's force is -gradient in kJ/mol/nm.
        grad_ref = np.array(ff.CalcGrad()).reshape(-1, 3)
        grad_ours = -state.getForces(asNumpy=True)._value / KJ_PER_KCAL / 10.0
        if not _close(ours, ref):
            failures.append(f"{smiles}: energy {ours} vs {ref}")
        if np.abs(grad_ours - grad_ref).max() > max(ABS_TOL_KCAL, REL_TOL * np.abs(grad_ref).max()):
            failures.append(f"{smiles}: gradient differs by {np.abs(grad_ours - grad_ref).max()}")
    assert not failures, failures


@pytest.mark.parametrize("variant", ["MMFF94", "MMFF94s"])
def test_each_term_family_matches_rdkit(variant):
    failures = []
    for k, smiles in enumerate(MOLECULES):
        mol = _molecule(smiles, seed=200 + k)
        context = _openmm_context(mol, mmff_properties(mol, variant))
        for name, group in MMFF_FORCE_GROUPS.items():
            ours = context.getState(getEnergy=True, groups={group}).getPotentialEnergy()._value
            props = mmff_properties(Chem.Mol(mol), variant)
            for switch in TERM_SWITCH.values():
                getattr(props, f"SetMMFF{switch}Term")(switch == TERM_SWITCH[name])
            ref = rdForceFieldHelpers.MMFFGetMoleculeForceField(mol, props).CalcEnergy()
            if not _close(ours / KJ_PER_KCAL, ref):
                failures.append(f"{smiles} {name}: {ours / KJ_PER_KCAL} vs {ref}")
    assert not failures, failures


def test_variants_and_dielectrics_differ():
    # Guards against a switch that is silently ignored: MMFF94s changes out-of-plane and
    # torsion parameters at delocalized nitrogens (Halgren 1999), so an anilide differs; the
    # distance-dependent dielectric changes the electrostatics of any polar molecule.
    mol = _molecule("CC(=O)Nc1ccccc1", seed=3)
    energies = {}
    for variant in ("MMFF94", "MMFF94s"):
        for dielectric in ("constant", "distance"):
            context = _openmm_context(mol, mmff_properties(mol, variant, dielectric))
            energies[variant, dielectric] = context.getState(getEnergy=True).getPotentialEnergy()._value
    assert abs(energies["MMFF94", "constant"] - energies["MMFF94s", "constant"]) > 1e-3
    assert abs(energies["MMFF94", "constant"] - energies["MMFF94", "distance"]) > 1e-3
