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
from rdkit.Chem import AllChem, rdForceFieldHelpers, rdMolTransforms

from hopwell.bench.energy import custom_nonbonded_system, geometric_function_system
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.mmff import (
    KJ_PER_KCAL,
    MMFF_FORCE_GROUPS,
    add_mmff_forces,
    mmff_properties,
)
from hopwell.systems.solvent import GB_FORCE_GROUP

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


def _stretch_bend_only_kcal(mol, variant):
    props = mmff_properties(Chem.Mol(mol), variant)
    for switch in TERM_SWITCH.values():
        getattr(props, f"SetMMFF{switch}Term")(switch == "StretchBend")
    return rdForceFieldHelpers.MMFFGetMoleculeForceField(mol, props).CalcEnergy()


def test_straight_angle_gives_finite_stretch_bend():
    # The stretch-bend term is written on coordinates with acos of the bond-vector cosine,
    # clipped as RDKit's clipToOne does (Halgren 1996 form, RDKit StretchBend.cpp). A flat
    # drawing of N-methylacetamide puts sp3 carbons' hydrogens at exactly 180 degrees, where
    # an unclipped acos has no finite derivative.
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)NC"))
    AllChem.Compute2DCoords(mol)
    props = mmff_properties(mol, "MMFF94")
    context = _openmm_context(mol, props)
    group = MMFF_FORCE_GROUPS["stretch_bend"]
    state = context.getState(getEnergy=True, getForces=True, groups={group})
    conf = mol.GetConformer()
    straight = [
        (i, j, k) for j in range(mol.GetNumAtoms())
        for i in range(mol.GetNumAtoms()) for k in range(i + 1, mol.GetNumAtoms())
        if mol.GetBondBetweenAtoms(i, j) and mol.GetBondBetweenAtoms(k, j)
        and abs(rdMolTransforms.GetAngleRad(conf, i, j, k) - np.pi) < 1e-12
    ]
    assert straight, "the drawing should hold an exactly straight angle"
    assert np.isfinite(state.getForces(asNumpy=True)._value).all()
    ours = state.getPotentialEnergy()._value / KJ_PER_KCAL
    assert _close(ours, _stretch_bend_only_kcal(mol, "MMFF94"))


@pytest.mark.parametrize("dielectric", ["constant", "distance"])
def test_benchmark_constructions_match_rdkit(dielectric):
    # hopwell.bench.energy times two other ways of writing the same energy; its comparison is
    # only fair if each reproduces RDKit's MMFF94 total (reference as above). Charged and
    # zwitterionic molecules exercise the 1-4 scaling of the electrostatic exclusions.
    failures = []
    for k, smiles in enumerate(["CC(=O)NC", "[NH3+]CC(=O)[O-]", "NS(=O)(=O)c1ccc(C)cc1", "C#CC1CC1"]):
        mol = _molecule(smiles, seed=300 + k)
        props = mmff_properties(mol, "MMFF94", dielectric)
        system = openmm.System()
        for atom in mol.GetAtoms():
            system.addParticle(atom.GetMass())
        add_mmff_forces(system, mol, props)
        ref = rdForceFieldHelpers.MMFFGetMoleculeForceField(mol, props).CalcEnergy()
        for name, other in {
            "angle/dihedral functions": geometric_function_system(system),
            "CustomNonbondedForce": custom_nonbonded_system(system, mol, props),
        }.items():
            context = openmm.Context(other, openmm.VerletIntegrator(0.001),
                                     openmm.Platform.getPlatformByName("Reference"))
            context.setPositions(mol.GetConformer().GetPositions() * 0.1)
            ours = context.getState(getEnergy=True).getPotentialEnergy()._value / KJ_PER_KCAL
            if not _close(ours, ref):
                failures.append(f"{smiles} {name}: {ours} vs {ref}")
    assert not failures, failures


def test_obc2_adds_only_its_own_group():
    # OBC2 (GBSAOBCForce, group 7) composes with the MMFF forces: groups 0-6 of a built OBC2
    # system still give RDKit's vacuum MMFF94 energy (reference as above), and the GB group
    # carries the (negative, Onufriev et al. 2004) solvation of a polar molecule.
    molsys = build("NCC(=O)OC", BuildOptions(solvent="obc2", n_seeds=1))
    mol = Chem.Mol(molsys.mol)
    mol.RemoveAllConformers()
    conf = Chem.Conformer(mol.GetNumAtoms())
    for i, xyz in enumerate(molsys.seeds_nm[0] * 10.0):
        conf.SetAtomPosition(i, xyz.tolist())
    mol.AddConformer(conf)
    ref = rdForceFieldHelpers.MMFFGetMoleculeForceField(mol, mmff_properties(mol, "MMFF94")).CalcEnergy()
    context = openmm.Context(molsys.system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(molsys.seeds_nm[0])
    mmff_groups = set(MMFF_FORCE_GROUPS.values())
    ours = context.getState(getEnergy=True, groups=mmff_groups).getPotentialEnergy()._value
    assert GB_FORCE_GROUP not in mmff_groups
    assert _close(ours / KJ_PER_KCAL, ref)
    gb = context.getState(getEnergy=True, groups={GB_FORCE_GROUP}).getPotentialEnergy()._value
    assert gb < 0.0
