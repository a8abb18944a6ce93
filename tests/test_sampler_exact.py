"""The sampler's populations against references outside hopwell.

* A four-atom chain whose torsion populations are exact ratios of scipy.integrate.quad
  integrals (see tests/chain_systems.py for why the marginal is exactly exp(-V/kT)).
* n-butane (MMFF94, vacuum) against a plain OpenMM Langevin run, an independent estimate.

Everything is seeded and runs on OpenMM's Reference platform with one torch thread.
"""

from __future__ import annotations

import numpy as np
import openmm
import pytest
import torch
from chain_systems import (
    ANGLE_RAD,
    BOND_NM,
    KT_KJ,
    TEMPERATURE_K,
    assign_wells,
    chain_mol,
    chain_positions_nm,
    chain_system,
    dihedrals_rad,
    exact_populations,
    family_covers,
    new_store,
    production_positions,
    proposal_field,
    torsion_energy_kj,
    training_positions,
    well_edges_rad,
)
from openmm import unit
from scipy import integrate

from hopwell.analysis.stats import population_estimate
from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import cartesian_to_internal
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.systems.builder import BuildOptions, build

torch.set_num_threads(1)

# The requirement: 95% intervals narrower than 2 percentage points.
MAX_WIDTH = 0.02


def run_sampler(tmp_path, mol, system, seeds_nm, settings, n_walkers, samples):
    store = new_store(tmp_path / "run", settings)
    sampler = Sampler(mol, system, seeds_nm, settings, store, n_walkers=n_walkers, platform="Reference")
    sampler.run(Budget(samples=samples))
    return sampler, store


def well_series(store, n_walkers):
    return [assign_wells(dihedrals_rad(x)) for x in production_positions(store, n_walkers)]


def plain_langevin(system, start_nm, temperature_K, n_frames, stride, seed, equilibrate=0):
    """Plain OpenMM Langevin dynamics (1 fs, 1/ps, Reference): positions every ``stride`` steps."""
    integrator = openmm.LangevinMiddleIntegrator(
        temperature_K * unit.kelvin, 1.0 / unit.picosecond, 0.001 * unit.picosecond)
    integrator.setRandomNumberSeed(seed)
    context = openmm.Context(system, integrator, openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(start_nm)
    context.setVelocitiesToTemperature(temperature_K * unit.kelvin, seed)
    integrator.step(equilibrate)
    frames = np.empty((n_frames, system.getNumParticles(), 3))
    for k in range(n_frames):
        integrator.step(stride)
        frames[k] = context.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer)
    return frames


def test_chain_system_is_what_the_quadrature_assumes():
    mol, system = chain_mol(), chain_system()
    # No hydrogens of any kind, so hopwell's guards take the molecule as it is.
    assert all(atom.GetTotalNumHs() == 0 for atom in mol.GetAtoms())
    seeds = np.stack([chain_positions_nm(p) for p in (-60.0, 60.0, 180.0)])
    guard = ProposalGuard.from_mol(mol, seeds[0])
    # The only checked pair is the 1-4 pair; even fully eclipsed (phi = 0) it stays well clear.
    assert guard.clash.pairs.tolist() == [[0, 3]]
    cis = chain_positions_nm(0.0)[None]
    assert not guard(cis).rejected[0]
    # Law of cosines for the planar cis chain: d = b (1 - 2 cos theta).
    assert np.linalg.norm(cis[0, 3] - cis[0, 0]) == pytest.approx(BOND_NM * (1 - 2 * np.cos(ANGLE_RAD)))
    assert np.linalg.norm(cis[0, 3] - cis[0, 0]) > 1.3 * guard.clash.threshold_nm[0]
    # The seeds have the intended dihedrals (mdtraj geometry).
    assert np.degrees(dihedrals_rad(seeds)) == pytest.approx([-60.0, 60.0, 180.0], abs=1e-4)
    # OpenMM's energy at ideal bonds and angles is V(phi): the system encodes the quadrature's V.
    context = openmm.Context(system, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
    for phi in (-150.0, -60.0, 0.0, 45.0, 60.0, 180.0):
        context.setPositions(chain_positions_nm(phi))
        energy = context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
        assert energy == pytest.approx(float(torsion_energy_kj(np.radians(phi))), abs=1e-3)
    # Three clearly different populations, barriers far above kT (Langevin cannot cross them).
    exact = exact_populations()
    assert exact.sum() == pytest.approx(1.0)
    assert np.all(np.diff(exact) > 0.05)
    barrier_kt = (torsion_energy_kj(well_edges_rad()) - torsion_energy_kj(np.pi)) / KT_KJ
    assert np.all(barrier_kt > 11.0)


def test_one_well_seed_matches_quadrature(tmp_path):
    """All walkers start in the shallowest well; the flow must find and mix the other two."""
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=16, single_moves_per_cycle=0,
        training_cycles=40, fit_every=4, fit_steps=40, flow_layers=2, flow_hidden=16,
        cycles_per_chunk=100, seed=5,
    )
    n_walkers = 3
    seeds = chain_positions_nm(-60.0)[None]
    sampler, store = run_sampler(tmp_path, chain_mol(), chain_system(), seeds, settings, n_walkers, 26000)

    series = well_series(store, n_walkers)
    result = population_estimate(series, 3, np.random.default_rng(5))
    # Exact reference: scipy.integrate.quad of exp(-V/kT) over each well (chain_systems.py);
    # the three wells checked family-wise (chain_systems.FAMILY_STRETCH).
    exact = exact_populations()
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, result.lower, result.upper, exact)
    assert np.all(result.upper - result.lower < MAX_WIDTH), result.upper - result.lower
    # Every walker, seeded in well 0 only, visits all three wells in production.
    assert all(set(np.unique(s)) == {0, 1, 2} for s in series)
    assert set(np.unique(assign_wells(dihedrals_rad(training_positions(store))))) == {0, 1, 2}
    # The guard never cut the support: no proposal was rejected before its energy was computed.
    assert np.all(proposal_field(store, "rejected_by") == 0)

    # Plain Langevin alone (OpenMM, same thermostat and time step) over as many steps as all the
    # sampler's Langevin segments together never leaves the seed well: the flow did the mixing.
    n_steps = n_walkers * sampler.cycle * settings.langevin_steps
    frames = plain_langevin(chain_system(), seeds[0], TEMPERATURE_K, n_steps // 100, 100, seed=3)
    assert np.all(assign_wells(dihedrals_rad(frames)) == 0)


def test_flow_moves_alone_match_quadrature(tmp_path):
    """Metropolis-Hastings with an untrained, mismatched proposal and one Langevin step per cycle.

    The target is exact for any fixed bonds and angles (the density factorizes), so whatever
    the one-step Langevin segments do, the torsion populations must still be the quadrature's,
    and they must come from the proposal-density ratio in the acceptance: the proposal here puts
    half its weight on the -60 well, and a chain that left out q(x)/q(x') would converge to
    populations proportional to integral exp(-V/kT) q instead.
    """
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=1, proposals_per_cycle=16, single_moves_per_cycle=1,
        training_cycles=0, flow_layers=2, flow_hidden=16, cycles_per_chunk=100, seed=23,
    )
    seeds = np.stack([chain_positions_nm(p) for p in (-55.0, -65.0, 60.0, 180.0)])
    n_walkers = len(seeds)
    sampler, store = run_sampler(tmp_path, chain_mol(), chain_system(), seeds, settings, n_walkers, 8000)
    assert sampler.stats["training"].proposed == 0  # no adaptation: the flow stayed as built

    result = population_estimate(well_series(store, n_walkers), 3, np.random.default_rng(6))
    exact = exact_populations()  # scipy.integrate.quad, see chain_systems.py
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, result.lower, result.upper, exact)
    assert np.all(result.upper - result.lower < 2 * MAX_WIDTH), result.upper - result.lower

    # The populations an independence chain without the q ratio would give, by quadrature of
    # exp(-V/kT) q(phi) over each well; the run must tell them apart from the exact ones.
    # The flow is untrained (its base alone), so q does not depend on its context (bond
    # angles); any walker's serve.
    context = sampler.trainer.conditioning(cartesian_to_internal(sampler.zmat, torch.as_tensor(seeds[:1])))[0]

    def log_q(phi):
        with torch.no_grad():
            return float(sampler.trainer.flow.log_prob(torch.tensor([[phi]], dtype=torch.float64), context)[0])

    edges = well_edges_rad()
    bounds = [(edges[0], edges[1]), (edges[1], edges[2]), (edges[2], edges[0] + 2 * np.pi)]
    v_min = torsion_energy_kj(np.pi)
    biased = np.array([integrate.quad(lambda p: np.exp(-(torsion_energy_kj(p) - v_min) / KT_KJ + log_q(p)),
                                      a, b, limit=200)[0] for a, b in bounds])
    biased /= biased.sum()
    q_mass = np.array([integrate.quad(lambda p: np.exp(log_q(p)), a, b, limit=200)[0] for a, b in bounds])
    assert q_mass.sum() == pytest.approx(1.0, abs=1e-3)  # log_prob is a normalized density
    assert q_mass[0] > 0.4
    assert not np.all((result.lower <= biased) & (biased <= result.upper)), biased
    assert np.max(np.abs(biased - exact)) > 2 * np.max(result.upper - result.lower)
    assert sampler.stats["single"].accepted > 0


# n-butane at 600 K: measured here, plain Langevin at 300 K crosses the anti/gauche barrier
# only ~8-16 times per ns, so a one-minute MD run spans about two bootstrap blocks and its interval
# cannot be trusted; at 600 K it crosses ~200 times per ns.
BUTANE_T_K = 600.0


def butane_states(positions_nm):
    """1 for gauche (|C-C-C-C| < 120 degrees, mdtraj dihedral), 0 for anti."""
    return (np.abs(dihedrals_rad(positions_nm, (0, 1, 2, 3))) < np.radians(120.0)).astype(np.int64)


def test_butane_agrees_with_plain_langevin(tmp_path):
    molsys = build("CCCC", BuildOptions(n_seeds=5))
    assert [a.GetSymbol() for a in molsys.mol.GetAtoms()][:4] == ["C"] * 4
    settings = SamplerSettings(
        temperature_K=BUTANE_T_K, langevin_steps=50, proposals_per_cycle=16, single_moves_per_cycle=2,
        training_cycles=30, fit_every=4, fit_steps=40, flow_layers=2, flow_hidden=32,
        cycles_per_chunk=100, seed=31,
    )
    n_walkers = 4
    _, store = run_sampler(tmp_path, molsys.mol, molsys.system, molsys.seeds_nm, settings, n_walkers, 2000)
    hopwell = population_estimate([butane_states(x) for x in production_positions(store, n_walkers)], 2,
                                  np.random.default_rng(7))

    # Independent estimate: plain OpenMM Langevin, 20 ps equilibration then 1 ns, frames every 250 fs.
    frames = plain_langevin(molsys.system, molsys.seeds_nm[0], BUTANE_T_K, 4000, 250, seed=9, equilibrate=20000)
    md = population_estimate(butane_states(frames)[None], 2, np.random.default_rng(8))
    assert md.upper[1] - md.lower[1] < 0.25  # the MD interval is tight enough to mean something
    assert hopwell.upper[1] - hopwell.lower[1] < 0.1
    # Agreement within the combined intervals (the two intervals overlap), for anti and gauche.
    assert np.all((hopwell.lower <= md.upper) & (md.lower <= hopwell.upper)), (
        hopwell.populations, hopwell.lower, hopwell.upper, md.populations, md.lower, md.upper)
    # Sanity band only (from memory, not a measured reference): MMFF-like force fields put
    # gauche ~3-4 kJ/mol above anti, so with two gauche wells p_g/p_a ~ 2 exp(-dE/kT) gives a
    # gauche fraction of ~0.3-0.4 at 300 K and ~0.45-0.5 at 600 K.
    assert 0.38 < hopwell.populations[1] < 0.6
