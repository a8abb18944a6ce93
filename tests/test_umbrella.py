"""Umbrella sampling with MBAR (hopwell.bench.umbrella) against exact torsion populations."""

import numpy as np
import openmm
import pytest
from rdkit import Chem
from scipy.integrate import quad

from hopwell.bench.umbrella import (
    bond_torsions,
    dihedral_rad,
    restrained_copy,
    restraint_energies_kj,
    state_ranges_rad,
    umbrella_populations,
)
from hopwell.systems.energy import EnergyEvaluator, kT_kj

TEMPERATURE_K = 300.0
# Three unequal wells near -60, 60 and 180 degrees, with barriers of about 10 kJ/mol (4 kT)
# between them near -120, 0 and 120 degrees.
TORSION_KJ = "5*(1 + cos(3*theta)) + 2*cos(theta) + 1.5*sin(theta)"
CHAIN_TORSION = (0, 1, 2, 3)
BOUNDARIES_DEG = (-120.0, 0.0, 120.0)


def torsion_kj(phi_rad):
    """The chain's torsion potential, the same expression as :data:`TORSION_KJ`."""
    return 5.0 * (1.0 + np.cos(3.0 * phi_rad)) + 2.0 * np.cos(phi_rad) + 1.5 * np.sin(phi_rad)


def four_atom_chain() -> tuple[openmm.System, np.ndarray]:
    """Four particles joined by harmonic bonds and angles, with one torsion term and nothing else.

    In Cartesian coordinates the volume element of a four-atom chain is
    ``r1^2 r2^2 r3^2 sin(a1) sin(a2) dr da dphi`` (times the rigid-body part), with no factor that
    depends on the dihedral ``phi``; bonds and angles have potentials that do not depend on it
    either, so the marginal density of ``phi`` is exactly proportional to ``exp(-V(phi) / kT)``.
    """
    system = openmm.System()
    for _ in range(4):
        system.addParticle(12.0)
    bonds = openmm.HarmonicBondForce()
    angles = openmm.HarmonicAngleForce()
    for i in range(3):
        bonds.addBond(i, i + 1, 0.15, 2.0e5)
    for i in range(2):
        angles.addAngle(i, i + 1, i + 2, np.radians(109.5), 400.0)
    torsion = openmm.CustomTorsionForce(TORSION_KJ)
    torsion.addTorsion(*CHAIN_TORSION, [])
    for force in (bonds, angles, torsion):
        system.addForce(force)
    positions_nm = np.array([[0.05, 0.141, 0.0], [0.0, 0.0, 0.0], [0.15, 0.0, 0.0], [0.2, 0.141, 0.0]])
    return system, positions_nm


def exact_populations() -> np.ndarray:
    """Well populations by numerical quadrature of ``exp(-V / kT)`` (scipy.integrate.quad)."""
    kT = kT_kj(TEMPERATURE_K)

    def weight(phi):
        return np.exp(-torsion_kj(phi) / kT)

    total = quad(weight, -np.pi, np.pi)[0]
    ranges = state_ranges_rad(np.radians(BOUNDARIES_DEG))
    return np.array([quad(weight, lo, hi)[0] / total for lo, hi in ranges])


@pytest.mark.parametrize("torsions, offsets_deg", [([(0, 1, 2, 3)], [0.0]),
                                                   ([(0, 1, 2, 3), (0, 1, 2, 4)], [0.0, 120.0])])
def test_restraint_energy_matches_openmm(torsions, offsets_deg):
    # The restraint hopwell hands MBAR (computed from its own dihedrals) against the energy OpenMM
    # computes for the force it adds, for one torsion and for two about one bond with an offset,
    # at centres on both sides of +-180 degrees. Five particles, no other forces.
    system = openmm.System()
    for _ in range(5):
        system.addParticle(12.0)
    offsets_rad = np.radians(offsets_deg)
    evaluator = EnergyEvaluator(restrained_copy(system, torsions, offsets_rad), TEMPERATURE_K)
    k = 50.0
    evaluator.context.setParameter("umbrella_k", k)
    rng = np.random.default_rng(3)
    _, x0 = four_atom_chain()
    branch = np.array([[0.2, -0.07, 0.12]])
    frames = np.concatenate([x0, branch]) + rng.normal(0.0, 0.04, size=(20, 5, 3))
    theta = np.stack([dihedral_rad(frames, atoms) for atoms in torsions])
    for centre_deg in (-170.0, 0.0, 95.0, 175.0):
        evaluator.context.setParameter("umbrella_theta0", np.radians(centre_deg))
        openmm_kj = evaluator.energies_kj(frames)
        ours_kj = restraint_energies_kj(theta, np.radians([centre_deg]), k, offsets_rad)[0]
        np.testing.assert_allclose(ours_kj, openmm_kj, rtol=1e-6, atol=1e-6)


def test_bond_torsions_match_substructure_search():
    # Reference: RDKit's substructure search for every a-C-N-b path about N-methylacetamide's C-N.
    mol = Chem.AddHs(Chem.MolFromSmiles("CC(=O)NC"))
    omega = (0, 1, 3, 4)
    paths = mol.GetSubstructMatches(Chem.MolFromSmarts("*~[CX3]~[NX3]~*"), uniquify=False)
    expected = {m for m in paths if m[1:3] == omega[1:3]}
    found = bond_torsions(mol, omega)
    assert found[0] == omega
    assert len(found) == len(expected) == 4 and set(found) == expected


@pytest.fixture(scope="module")
def chain_result():
    system, x0 = four_atom_chain()
    # 12 windows with a restraint of 60 kJ/mol/rad^2, above the largest negative curvature of the
    # torsion potential (about 45 at the barriers), so no window straddles a barrier. Friction 20/ps
    # brings the light chain's torsion near critical damping, so samples 0.1 ps apart are nearly
    # independent. Neighbouring windows exchange every 1 ps (the default).
    return umbrella_populations(
        system, x0, CHAIN_TORSION, np.radians(BOUNDARIES_DEG), temperature_K=TEMPERATURE_K,
        n_windows=12, k_kj_mol_rad2=60.0, ns_per_window=0.8, timestep_ps=0.002,
        friction_per_ps=20.0, sample_interval_ps=0.1, seed=2,
    )


def test_populations_match_quadrature(chain_result):
    # Reference: the exact marginal exp(-V/kT) integrated by scipy.integrate.quad.
    exact = exact_populations()
    lo, hi = chain_result.ci95.T
    assert np.all(chain_result.populations_sigma < 0.01)  # the interval is tight enough to mean something
    assert np.all((lo <= exact) & (exact <= hi)), (chain_result.populations, chain_result.ci95, exact)
    np.testing.assert_allclose(chain_result.populations, exact, atol=0.02)


def test_profile_matches_potential(chain_result):
    # Reference: the potential itself. For 15-degree bins the exact bin free energy is
    # -kT ln(mean of exp(-V/kT) over the bin), from scipy.integrate.quad, zeroed at its minimum.
    kT = kT_kj(TEMPERATURE_K)
    half = 0.5 * (chain_result.profile_centres_rad[1] - chain_result.profile_centres_rad[0])
    exact = np.array([
        -kT * np.log(quad(lambda p: np.exp(-torsion_kj(p) / kT), c - half, c + half)[0] / (2 * half))
        for c in chain_result.profile_centres_rad
    ])
    exact -= exact.min()
    np.testing.assert_allclose(chain_result.profile_kj_mol, exact, atol=0.5)

