"""Seed darts (hopwell.moves.darts): exact jumps between seed basins.

* The dart is an involution pair: the reverse dart returns to the starting internal coordinates.
* Darts alone (no flow or one-torsion moves) on the four-atom chain reproduce the scipy
  quadrature populations, with the three wells separated by barriers Langevin does not cross
  (tests/test_sampler_exact.py measures that).
* The J(q')/J(q) term: with centres whose bonds and angles differ, each dart's log ratio equals
  -du + log J(q') - log J(q) with J computed here from mdtraj's distances and angles, the
  reverse dart's log ratio is its negative, and darts with GHMC reproduce quadrature.
"""

from __future__ import annotations

import mdtraj
import numpy as np
import openmm
import torch
from chain_systems import (
    ANGLE_RAD,
    BOND_NM,
    TEMPERATURE_K,
    WELL_CENTRES_DEG,
    assign_wells,
    chain_mol,
    chain_positions_nm,
    chain_system,
    dihedrals_rad,
    exact_populations,
    family_covers,
    new_store,
    production_positions,
)

from hopwell.analysis.stats import population_estimate
from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import (
    build_zmatrix,
    cartesian_to_internal,
    internal_to_cartesian,
)
from hopwell.coords.torsions import moving_torsions
from hopwell.moves.base import RandomStreams, Walkers
from hopwell.moves.darts import SeedDarts, build_darts, torsion_distance
from hopwell.moves.langevin import LangevinSegment
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.systems.builder import BuildOptions, build, rotatable_bonds
from hopwell.systems.energy import EnergyEvaluator

torch.set_num_threads(1)


def test_reverse_dart_returns_to_the_start():
    molsys = build("CCCCC", BuildOptions(n_seeds=10))  # pentane: anti/gauche combinations
    mol = molsys.mol
    zmat = build_zmatrix(mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
                         heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))
    darts = build_darts(zmat, moving_torsions(zmat, mol), molsys.seeds_nm)
    assert darts is not None and darts.n_centres >= 2
    assert len(darts.rows) == 2  # pentane's two C-C-C-C torsions; methyl rotors excluded
    # Regions do not overlap: the radius is at most half the closest pair of centres.
    rotatable = darts.torsions_rad[:, darts.rows]
    closest = min(torsion_distance(rotatable[i], rotatable[j]) for i in range(len(rotatable)) for j in range(i))
    assert darts.radius_rad <= 0.5 * closest + 1e-12
    start = cartesian_to_internal(zmat, torch.as_tensor(molsys.seeds_nm[:1]))
    source = int(darts.region(start.torsions_rad.numpy())[0])
    assert source >= 0
    target = (source + 1) % darts.n_centres
    bonds, angles, torsions = darts.displace(start, source, target)
    moved = start._replace(bonds_nm=bonds, angles_rad=angles, torsions_rad=torsions)
    assert int(darts.region(torsions.numpy())[0]) == target
    back = darts.displace(moved, target, source)
    assert torch.allclose(back[0], start.bonds_nm, atol=1e-12)
    assert torch.allclose(back[1], start.angles_rad, atol=1e-12)
    diff = torch.remainder(back[2] - start.torsions_rad + np.pi, 2 * np.pi) - np.pi
    assert float(diff.abs().max()) < 1e-12


def test_darts_alone_match_quadrature(tmp_path):
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=0, single_moves_per_cycle=0,
        darts_per_cycle=4, training_cycles=0, flow_layers=2, flow_hidden=16, cycles_per_chunk=100, seed=11,
    )
    seeds = np.stack([chain_positions_nm(p) for p in (-60.0, 60.0, 180.0)])
    store = new_store(tmp_path / "run", settings)
    sampler = Sampler(chain_mol(), chain_system(), seeds, settings, store, n_walkers=3, platform="Reference")
    assert sampler.basins.darts.darts.n_centres == 3
    sampler.run(Budget(samples=6000))
    assert sampler.stats["dart"].accepted > 100
    series = [assign_wells(dihedrals_rad(x)) for x in production_positions(store, 3)]
    result = population_estimate(series, 3, np.random.default_rng(1))
    exact = exact_populations()  # scipy.integrate.quad of exp(-V/kT) per well (chain_systems.py)
    # Three wells checked at once, family-wise (chain_systems.FAMILY_STRETCH). Measured over seeds
    # 11-16 (with the basin probes drawing from the same stream): z-scores of the 18 well
    # estimates against the quadrature spread as N(0, 1), largest |z| 2.91, no sign common to a well.
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, result.lower, result.upper, exact)
    assert np.all(result.upper - result.lower < 0.04), result.upper - result.lower


# A softer chain for the Jacobian tests: the same V(phi), bonds and angles of spread
# sqrt(kT/k) ~ 0.35 A and 13 degrees, so that centres whose bonds differ by 0.1 A and angles by
# 12 degrees are a few kT apart while J differs between them by a factor of about 1.7. The
# torsion marginal is exp(-V/kT) for any bond and angle constants (chain_systems.exact_populations).
SOFT_BOND_K = 2.0e3  # kJ/mol/nm^2
SOFT_ANGLE_K = 50.0  # kJ/mol/rad^2
BOND_SHIFT_NM = np.array([0.005, -0.005, 0.0])  # per centre (-60, 60, 180), added to every bond
ANGLE_SHIFT_RAD = np.radians([-6.0, 6.0, 0.0])  # per centre, added to both angles


def soft_chain_system() -> openmm.System:
    system = chain_system()
    for force in system.getForces():
        if isinstance(force, openmm.CustomBondForce):
            force.setEnergyFunction(f"0.5*{SOFT_BOND_K}*(r-{BOND_NM})^2")
        elif isinstance(force, openmm.CustomAngleForce):
            force.setEnergyFunction(f"0.5*{SOFT_ANGLE_K}*(theta-{ANGLE_RAD})^2")
    return system


def chain_zmatrix():
    mol = chain_mol()
    return build_zmatrix(4, [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
                         heavy=[True] * 4, rotatable=rotatable_bonds(mol))


def log_volume_element(positions_nm: np.ndarray) -> np.ndarray:
    """log(r01^2 r12^2 r23^2 sin(a012) sin(a123)) per frame, from mdtraj's geometry.

    The Cartesian volume element of a chain in bond lengths, bond angles and the torsion, up to
    the rigid-body factor: each atom placed from earlier ones in spherical coordinates
    contributes r^2 sin(theta) (a fact of the trade).
    """
    traj = mdtraj.Trajectory(np.asarray(positions_nm, dtype=np.float32), None)
    r = mdtraj.compute_distances(traj, np.array([[0, 1], [1, 2], [2, 3]])).astype(float)
    a = mdtraj.compute_angles(traj, np.array([[0, 1, 2], [1, 2, 3]])).astype(float)
    return 2.0 * np.log(r).sum(axis=1) + np.log(np.sin(a)).sum(axis=1)


def shifted_centres_nm(zmat) -> np.ndarray:
    """The three well minima with bonds and angles shifted per centre, shape (3, 4, 3)."""
    minima = np.stack([chain_positions_nm(p) for p in WELL_CENTRES_DEG])
    ic = cartesian_to_internal(zmat, torch.as_tensor(minima))
    bonds = ic.bonds_nm + torch.as_tensor(BOND_SHIFT_NM)[:, None]
    angles = ic.angles_rad + torch.as_tensor(ANGLE_SHIFT_RAD)[:, None]
    return internal_to_cartesian(zmat, bonds, angles, ic.torsions_rad)[0].numpy()


def shifted_darts(seed: int):
    """Seed darts between the shifted centres on the soft chain, with a GHMC evaluator."""
    zmat = chain_zmatrix()
    centres = shifted_centres_nm(zmat)
    darts = build_darts(zmat, moving_torsions(zmat, chain_mol()), centres)
    evaluator = EnergyEvaluator(soft_chain_system(), TEMPERATURE_K, platform="Reference", local_move="ghmc",
                                seed=seed)
    guard = ProposalGuard.from_mol(chain_mol(), centres[2])
    return SeedDarts(darts, zmat, guard, evaluator, per_walker=4), centres


def test_shifted_centres_differ_in_bonds_angles_and_volume():
    move, centres = shifted_darts(seed=3)
    assert move.darts.n_centres == 3
    traj = mdtraj.Trajectory(centres.astype(np.float32), None)
    bonds_a = 10 * mdtraj.compute_distances(traj, np.array([[0, 1], [1, 2], [2, 3]]))
    angles_deg = np.degrees(mdtraj.compute_angles(traj, np.array([[0, 1, 2], [1, 2, 3]])))
    np.testing.assert_allclose(bonds_a - 10 * BOND_NM, 10 * BOND_SHIFT_NM[:, None] * np.ones(3), atol=1e-5)
    np.testing.assert_allclose(angles_deg - np.degrees(ANGLE_RAD), np.degrees(ANGLE_SHIFT_RAD)[:, None] * np.ones(2),
                               atol=1e-3)
    # J(centre -60) / J(centre 60) is far from 1, so a dropped or inverted J term matters.
    log_j = log_volume_element(centres)
    assert abs(log_j[0] - log_j[1]) > 0.5, log_j


def test_dart_log_ratio_has_the_jacobian_and_reverses_exactly():
    """log alpha(q -> q') = -du + log J(q') - log J(q) and log alpha(q' -> q) = -log alpha(q -> q')."""
    move, centres = shifted_darts(seed=3)
    kT = move.evaluator.kT
    rng = np.random.default_rng(4)
    checked = 0
    for source in range(3):
        # Thermal-sized displacements from the source centre, in Cartesian space.
        for x in centres[source] + 0.01 * rng.standard_normal((4, 4, 3)):
            current = cartesian_to_internal(move.zmat, torch.as_tensor(x[None]))
            assert int(move.darts.region(current.torsions_rad.numpy())[0]) == source
            energy = float(move.evaluator.energies_kj(x)[0])
            for target in {0, 1, 2} - {source}:
                forward = move.propose(current, energy, source, target)
                assert np.isfinite(forward.log_alpha)
                # The ratio from energies and mdtraj's geometry, not hopwell's internal coordinates.
                expected = (-(forward.energy_kj - energy) / kT
                            + log_volume_element(forward.positions_nm)[0] - log_volume_element(x[None])[0])
                assert abs(forward.log_alpha - expected) < 1e-4, (forward.log_alpha, expected)
                back = move.propose(forward.landed, forward.energy_kj, target, source)
                # Back to q (up to a rigid motion: the Z-matrix places the root in its own frame).
                for name in ("bonds_nm", "angles_rad", "torsions_rad"):
                    np.testing.assert_allclose(getattr(back.landed, name).numpy(),
                                               getattr(current, name).numpy(), atol=1e-9)
                assert abs(forward.log_alpha + back.log_alpha) < 1e-8, (forward.log_alpha, back.log_alpha)
                checked += 1
    assert checked == 24


def test_darts_between_shifted_centres_match_quadrature():
    """Darts and GHMC only; the J(q')/J(q) term is what keeps the wells' populations exact."""
    move, _ = shifted_darts(seed=5)
    local = LangevinSegment([move.evaluator], 20, log=lambda message: None)
    minima = np.stack([chain_positions_nm(p) for p in WELL_CENTRES_DEG])
    walkers = Walkers(minima.copy(), move.evaluator.energies_kj(minima))
    streams = RandomStreams.seeded(3)
    records = [[] for _ in range(3)]
    for _ in range(1000):
        for walker in range(3):
            which = np.array([walker])
            local.apply(walkers, which, streams)
            records[walker].append(walkers.positions_nm[walker].copy())
            move.apply(walkers, which, streams)
            records[walker].append(walkers.positions_nm[walker].copy())
    assert move.counters.accepted > 1000
    series = [assign_wells(dihedrals_rad(np.array(r))) for r in records]
    result = population_estimate(series, 3, np.random.default_rng(1))
    exact = exact_populations()  # scipy.integrate.quad of exp(-V/kT) per well (chain_systems.py)
    assert np.all((result.lower <= exact) & (exact <= result.upper)), (result.populations, result.lower,
                                                                       result.upper, exact)
    assert np.all(result.upper - result.lower < 0.06), result.upper - result.lower
