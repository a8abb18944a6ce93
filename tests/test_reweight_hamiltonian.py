"""Hamiltonian reweighting (``--reweight-solvent`` / ``--reweight-forcefield``) against exact cases.

* The four-atom chain of tests/chain_systems.py: its torsion marginal is exactly
  proportional to exp(-V(phi)/kT) for any torsion potential V (the density factorizes; see
  chain_systems.exact_populations), so drawing phi from exp(-V_A/kT) is drawing the chain's
  conformations and reading their torsion. Samples drawn under the chain's potential V_A and
  reweighted by w = exp(-(V_B - V_A)/kT) must reproduce the well populations under another
  potential V_B, computed with scipy.integrate.quad.
* The refusal below ``MIN_REWEIGHT_ESS`` at its exact threshold, and for a potential whose
  wells sit on V_A's barriers.
* The store route, :func:`hopwell.analysis.reweight.hamiltonian_log_weights`: its weights for
  n-butane reweighted from vacuum to OBC2 are the energy differences of the two built systems
  computed here in separate OpenMM contexts.

Everything is seeded.
"""

from __future__ import annotations

import re
from dataclasses import asdict, replace

import numpy as np
import openmm
import pytest
from chain_systems import (
    KT_KJ,
    TEMPERATURE_K,
    TORSION_A_KJ,
    TORSION_B_KJ,
    TORSION_C_KJ,
    assign_wells,
    exact_populations,
    well_edges_rad,
)
from openmm import unit
from scipy import constants, integrate
from scipy import stats as scipy_stats

from hopwell.analysis.reweight import (
    MIN_REWEIGHT_ESS,
    hamiltonian_log_weights,
    reweighted_populations,
)
from hopwell.analysis.stats import population_estimate
from hopwell.errors import InputError
from hopwell.sampling.store import RunStore
from hopwell.systems.builder import BuildOptions, build

# Potential B: the chain's threefold term with other onefold terms, which move about 45% of
# the population from the 180 well into the -60 well (quadrature below).
B_COS_KJ, B_SIN_KJ = -0.5 * KT_KJ, 0.8 * KT_KJ
REFUSAL = (r"reweighting refused: effective sample size (\d+) < 100 \(too little overlap\);"
           r" sample the new conditions directly")


def torsion_kj(phi_rad, cos_kj=TORSION_B_KJ, sin_kj=TORSION_C_KJ, threefold_kj=TORSION_A_KJ):
    """V(phi) = a (1 + cos 3 phi) + b cos phi + c sin phi in kJ/mol; defaults: the chain's V_A."""
    return threefold_kj * (1.0 + np.cos(3.0 * phi_rad)) + cos_kj * np.cos(phi_rad) + sin_kj * np.sin(phi_rad)


def potential_b_kj(phi_rad):
    return torsion_kj(phi_rad, B_COS_KJ, B_SIN_KJ)


def quadrature_populations(potential_kj) -> np.ndarray:
    """Populations of the chain's three wells (split at V_A's maxima) under exp(-V/kT), by quad."""
    edges = well_edges_rad()
    bounds = [(edges[0], edges[1]), (edges[1], edges[2]), (edges[2], edges[0] + 2.0 * np.pi)]
    v_min = potential_kj(np.linspace(-np.pi, np.pi, 3601)).min()
    z = np.array([integrate.quad(lambda p: np.exp(-(potential_kj(p) - v_min) / KT_KJ), a, b,
                                 epsabs=0.0, epsrel=1e-12, limit=200)[0] for a, b in bounds])
    return z / z.sum()


def metropolis_torsions(rng, shape, n_steps, potential_kj):
    """Metropolis chains on the circle with target exp(-V/kT), shape ``shape + (n_steps,)``.

    Each step proposes, with probability 1/2 each, a Gaussian step of 0.15 rad or a uniform
    draw on the circle; both kernels are symmetric, so the acceptance is min(1, exp(-dV/kT))
    (Metropolis et al. 1953). Chains start at 180 degrees, V_A's deepest well.
    """
    phi = np.full(shape, np.pi)
    energy = potential_kj(phi)
    out = np.empty(shape + (n_steps,))
    for t in range(n_steps):
        local = rng.random(shape) < 0.5
        trial = np.where(local, phi + rng.normal(0.0, 0.15, shape), rng.uniform(-np.pi, np.pi, shape))
        trial = (trial + np.pi) % (2.0 * np.pi) - np.pi
        trial_energy = potential_kj(trial)
        accept = np.log(rng.random(shape)) < -(trial_energy - energy) / KT_KJ
        phi, energy = np.where(accept, trial, phi), np.where(accept, trial_energy, energy)
        out[..., t] = phi
    return out


def log_weights_a_to(potential_kj, phi_rad):
    """log w = -(V_new - V_A) / kT: the chain's other terms are the same in both and cancel."""
    return -(potential_kj(phi_rad) - torsion_kj(phi_rad)) / KT_KJ


def test_reweighting_to_another_torsion_potential_matches_quadrature():
    exact_a, exact_b = quadrature_populations(torsion_kj), quadrature_populations(potential_b_kj)
    assert exact_a == pytest.approx(exact_populations(), abs=1e-12)  # the helper is chain_systems'
    phi = metropolis_torsions(np.random.default_rng(1), (4,), 20000, torsion_kj)
    wells = assign_wells(phi)
    # The samples follow V_A (their own intervals hold its quadrature) ...
    sampled = population_estimate(wells, 3, np.random.default_rng(2))
    assert np.all((sampled.lower <= exact_a) & (exact_a <= sampled.upper)), (sampled.populations, exact_a)
    # ... and V_B's populations lie outside those intervals, so weights that did nothing fail.
    assert not np.any((sampled.lower <= exact_b) & (exact_b <= sampled.upper))
    result = reweighted_populations(wells, log_weights_a_to(potential_b_kj, phi), 3,
                                    np.random.default_rng(3))
    assert np.all((result.lower <= exact_b) & (exact_b <= result.upper)), (result.populations, exact_b)
    assert result.populations == pytest.approx(exact_b, abs=0.03)
    assert MIN_REWEIGHT_ESS < result.ess < wells.size


def test_reweighted_intervals_cover_the_other_potential():
    """Coverage of 95% intervals over 200 seeded data sets, judged by two-sided binomial tests
    (scipy.stats.binomtest) per well, Bonferroni over the three wells: intervals too wide fail
    as well as intervals too narrow."""
    exact_b = quadrature_populations(potential_b_kj)
    n_sets = 200
    phi = metropolis_torsions(np.random.default_rng(4), (n_sets, 2), 6000, torsion_kj)
    rng = np.random.default_rng(5)
    covered = np.zeros(3, dtype=int)
    for sample in phi:
        result = reweighted_populations(assign_wells(sample), log_weights_a_to(potential_b_kj, sample), 3,
                                        rng, n_boot=400)
        covered += (result.lower <= exact_b) & (exact_b <= result.upper)
    p_values = [scipy_stats.binomtest(int(c), n_sets, 0.95).pvalue for c in covered]
    assert min(p_values) > 0.01 / 3, (covered / n_sets, p_values)


@pytest.mark.parametrize("n_weighted", [MIN_REWEIGHT_ESS - 1, MIN_REWEIGHT_ESS])
def test_refusal_at_the_effective_sample_size_threshold(n_weighted):
    # Equal weights on n_weighted samples, zero on the rest: Kish's ESS is exactly n_weighted
    # ((sum w)^2 / sum w^2, Kish 1965). Every sample is in one state, so the weighted series
    # w ([s = k] - p_k) are constant and g = 1: the ESS compared with the threshold is exact.
    states = np.zeros((2, 500), dtype=int)
    log_w = np.full(states.shape, -np.inf)
    log_w.ravel()[:: states.size // n_weighted][:n_weighted] = 0.0
    if n_weighted < MIN_REWEIGHT_ESS:
        with pytest.raises(InputError, match=REFUSAL) as refused:
            reweighted_populations(states, log_w, 2, np.random.default_rng(6))
        assert refused.match(f"effective sample size {n_weighted} < {MIN_REWEIGHT_ESS}")
    else:
        result = reweighted_populations(states, log_w, 2, np.random.default_rng(6))
        assert result.ess == pytest.approx(n_weighted)


def test_refusal_when_the_new_wells_sit_on_the_old_barriers():
    # V_C = a (1 - cos 3 phi) has its minima at 0 and +-120 degrees, where V_A has its maxima:
    # samples of V_A almost never go there, so a handful of weights dominate.
    phi = metropolis_torsions(np.random.default_rng(7), (4,), 20000, torsion_kj)
    log_w = log_weights_a_to(lambda p: torsion_kj(p, 0.0, 0.0, -TORSION_A_KJ) + 2.0 * TORSION_A_KJ, phi)
    with pytest.raises(InputError, match=REFUSAL) as refused:
        reweighted_populations(assign_wells(phi), log_w, 3, np.random.default_rng(8))
    assert int(re.search(REFUSAL, str(refused.value)).group(1)) < MIN_REWEIGHT_ESS


def openmm_energies_kj(system: openmm.System, positions_nm: np.ndarray) -> np.ndarray:
    """Potential energies from a fresh OpenMM Reference context, one frame at a time."""
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    out = []
    for xyz in positions_nm:
        context.setPositions(xyz)
        out.append(context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole))
    return np.array(out)


def test_store_route_weights_are_energy_differences(tmp_path):
    # A run directory of n-butane in vacuum holding one chunk: production frames of two
    # walkers, with training frames between them that must be skipped.
    options = BuildOptions(n_seeds=4)
    vacuum = build("CCCC", options)
    water = build("CCCC", replace(options, solvent="obc2"))
    store = RunStore.create(tmp_path / "run", {"input": "CCCC", "build": asdict(options)}, {})
    rng = np.random.default_rng(9)
    seeds = vacuum.seeds_nm[rng.integers(0, len(vacuum.seeds_nm), 12)]
    positions = (seeds + rng.normal(0.0, 0.003, seeds.shape)).astype(np.float32)
    production = np.array([0, 0, 1, 1, 1, 0, 1, 1, 1, 1, 0, 1], dtype=bool)
    frames = positions.astype(float)
    store.write_chunk(0, {"positions_nm": positions, "production": production,
                          "walker": np.arange(12) % 2}, {})
    u_vacuum = openmm_energies_kj(vacuum.system, frames[production])
    log_w = hamiltonian_log_weights(store, {"solvent": "obc2"}, TEMPERATURE_K, u_vacuum)
    # kT from the CODATA molar gas constant (scipy.constants), not from hopwell.
    kT = constants.R * TEMPERATURE_K / 1000.0
    expected = -(openmm_energies_kj(water.system, frames[production]) - u_vacuum) / kT
    np.testing.assert_allclose(log_w, expected, rtol=1e-9, atol=1e-9)
    assert np.ptp(expected) > 0.1  # the solvation energy differs between the frames
    with pytest.raises(ValueError, match="misaligned"):
        hamiltonian_log_weights(store, {"solvent": "obc2"}, TEMPERATURE_K, u_vacuum[:-1])
