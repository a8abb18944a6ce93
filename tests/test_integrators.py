"""GHMC samples the exact distribution; the evaluator drives both local moves."""

import numpy as np
import openmm
import pytest
from chain_systems import (
    ANGLE_K,
    ANGLE_RAD,
    BOND_K,
    BOND_NM,
    KT_KJ,
    TEMPERATURE_K,
    chain_positions_nm,
    chain_system,
)
from scipy import integrate
from scipy.special import gamma

from hopwell.analysis.observables import series_mean
from hopwell.systems.energy import EnergyEvaluator, kT_kj

C_KJ_NM4 = 2.0e4


def _quartic_wells(n=100):
    """n independent particles (12 Da) in the anharmonic well c (x^4 + y^4 + z^4)."""
    system = openmm.System()
    force = openmm.CustomExternalForce("c*(x^4 + y^4 + z^4)")
    force.addGlobalParameter("c", C_KJ_NM4)
    for i in range(n):
        system.addParticle(12.0)
        force.addParticle(i, [])
    system.addForce(force)
    return system


@pytest.mark.parametrize("local_move", ["ghmc", "langevin"])
def test_quartic_well_second_moment(local_move):
    # Exact reference: <x^2> = (beta c)^(-1/2) Gamma(3/4) / Gamma(1/4) for exp(-beta c x^4)
    # (a closed-form integral; scipy.special.gamma). dt = 30 fs is 15x the default step.
    exact = (C_KJ_NM4 / kT_kj(300.0)) ** -0.5 * gamma(0.75) / gamma(0.25)
    evaluator = EnergyEvaluator(_quartic_wells(), 300.0, platform="Reference", timestep_ps=0.03,
                                friction_per_ps=5.0, seed=3, local_move=local_move)
    rng = np.random.default_rng(3)
    x, v, samples = rng.normal(0, np.sqrt(exact), (100, 3)), None, []
    for _ in range(600):
        x, v, _ = evaluator.langevin(x, 10, v)
        samples.append(x.copy())
    # 550 frames x 300 coordinates, nearly independent between frames: ~0.5% standard error.
    assert np.mean(np.array(samples[50:]) ** 2) == pytest.approx(exact, rel=0.02)
    if local_move == "ghmc":
        assert 0.5 < evaluator.local_acceptance() < 1.0
    else:
        assert evaluator.local_acceptance() is None


def test_unknown_local_move_is_refused():
    with pytest.raises(ValueError, match="unknown local move"):
        EnergyEvaluator(_quartic_wells(), 300.0, local_move="leapfrog")


def _exact_bond_angle_energy_kt() -> float:
    """Mean bond plus angle energy of the four-atom chain, in kT, by scipy quadrature.

    Bonds and angles are independent in the chain's internal coordinates, each weighted by its
    Jacobian factor (r^2 for a bond, sin(theta) for an angle); the torsion term does not involve
    them.
    """
    def mean(energy, jacobian, low, high):
        weight = lambda q: jacobian(q) * np.exp(-energy(q) / KT_KJ)  # noqa: E731
        numerator = integrate.quad(lambda q: energy(q) * weight(q), low, high, limit=200)[0]
        return numerator / integrate.quad(weight, low, high, limit=200)[0] / KT_KJ

    bond = mean(lambda r: 0.5 * BOND_K * (r - BOND_NM) ** 2, lambda r: r ** 2, BOND_NM - 0.05, BOND_NM + 0.05)
    angle = mean(lambda t: 0.5 * ANGLE_K * (t - ANGLE_RAD) ** 2, np.sin, ANGLE_RAD - 0.6, ANGLE_RAD + 0.6)
    return 3 * bond + 2 * angle


@pytest.mark.parametrize("n_steps, n_segments", [(50, 200000), (250, 60000)])
def test_langevin_segments_from_fresh_velocities_keep_bond_energies(n_steps, n_segments):
    # Each segment starts from new Maxwell-Boltzmann velocities, as the sampler's do. Before
    # they were moved to the integrator's half step, measured here in several runs: 2.8-3.0 kT
    # (50-step segments) and 2.35-2.43 kT (250) against 2.50 exact; after, 2.51-2.52 for both
    # (the rest is the integrator's own second-order error, 1 fs with a 34 fs bond period).
    system = chain_system()
    system.getForce(2).setForceGroup(1)  # the torsion, left out of the energy below
    evaluator = EnergyEvaluator(system, TEMPERATURE_K, platform="Reference", seed=5)
    x, _, _ = evaluator.langevin(chain_positions_nm(180.0), 5000)
    energies = []
    for _ in range(n_segments):
        x, _, _ = evaluator.langevin(x, n_steps)
        energies.append(evaluator.energies_kj(x[None], groups={0})[0] / evaluator.kT)
    mean, low, high = series_mean(np.array(energies)[None])
    assert mean == pytest.approx(_exact_bond_angle_energy_kt(), abs=0.05)
    assert high - low < 0.06  # precise enough to see the old bias of 0.07-0.5 kT
