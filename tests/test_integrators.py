"""GHMC samples the exact distribution; the evaluator drives both local moves."""

import numpy as np
import openmm
import pytest
from scipy.special import gamma

from hopwell.energy import EnergyEvaluator, kT_kj

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
