"""Basin probes (hopwell.sampling.probes): the pure pieces, and a run that finds unseeded wells.

The four-atom chain (chain_systems.py) has three torsion wells separated by barriers of about
12 kT, whose exact populations come from scipy quadrature. Seeded in one well only, with the
flow and one-torsion moves off, a short run with Langevin segments alone would stay in it; the
probes must find the other two wells in training, make them dart centres, and the production
populations must then match the quadrature. With probes off the same run must not.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from chain_systems import (
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
)

from hopwell.analysis.stats import population_estimate
from hopwell.analysis.verdict import judge
from hopwell.moves.darts import MIN_SEPARATION_RAD
from hopwell.sampling.probes import is_new_basin, kicked_torsions
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings


def test_kick_redraws_one_to_max_of_the_given_rows_only():
    rng = np.random.default_rng(3)
    start = np.linspace(-1.0, 1.0, 12)
    rows = np.array([1, 4, 7, 9])
    counts = set()
    for _ in range(300):
        out = kicked_torsions(start, rows, 3, rng)
        changed = np.flatnonzero(out != start)
        assert set(changed) <= set(rows.tolist())
        assert np.all((out >= -np.pi) & (out < np.pi))
        counts.add(len(changed))
    assert counts == {1, 2, 3}


def test_new_basin_is_the_darts_separation_away_from_every_centre():
    rows = np.array([0, 2])
    centres = np.array([[0.0, 5.0, 0.0], [np.pi, 5.0, np.pi]])
    just_inside = 0.999 * MIN_SEPARATION_RAD
    assert not is_new_basin(np.array([just_inside, -2.0, 0.0]), centres, rows)  # row 1 does not count
    assert is_new_basin(np.array([1.001 * MIN_SEPARATION_RAD, 0.0, 0.0]), centres, rows)
    # Wrapped: -pi + 0.1 lies 0.1 from pi.
    assert not is_new_basin(np.array([-np.pi + 0.1, 0.0, np.pi]), centres, rows)
    assert is_new_basin(np.array([1.0, 1.0, 1.0]), np.empty((0, 3)), rows)


def _one_well_run(tmp_path, probes: int, samples: int):
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=0, single_moves_per_cycle=0,
        darts_per_cycle=4, training_cycles=40, probes_per_cycle=probes, probe_every_production=0,
        flow_layers=2, flow_hidden=16, cycles_per_chunk=100, seed=5,
    )
    seeds = chain_positions_nm(180.0)[None]
    store = new_store(tmp_path / f"run{probes}", settings)
    sampler = Sampler(chain_mol(), chain_system(), seeds, settings, store, n_walkers=3, platform="Reference")
    sampler.run(Budget(samples=samples))
    series = [assign_wells(dihedrals_rad(x)) for x in production_positions(store, 3)]
    return sampler, store, population_estimate(series, 3, np.random.default_rng(1))


def test_probes_find_the_unseeded_wells_and_the_populations_match_quadrature(tmp_path):
    exact = exact_populations()  # scipy.integrate.quad of exp(-V/kT) per well (chain_systems.py)
    sampler, store, result = _one_well_run(tmp_path, probes=1, samples=6000)
    assert sampler.basins.darts is not None and sampler.basins.darts.darts.n_centres == 3
    assert len(sampler.basins.found) == 2 and not any(b.production for b in sampler.basins.found)
    found_wells = sorted(int(assign_wells(dihedrals_rad(b.positions_nm[None]))[0]) for b in sampler.basins.found)
    assert found_wells == [0, 1]  # the -60 and 60 wells
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, exact)  # chain_systems.FAMILY_STRETCH
    # The finds survive the checkpoint, and a resumed sampler reads them back.
    state = store.read_state()
    assert len(json.loads(str(state["found_basins"]))) == 2
    assert state["dart_centres_nm"].shape[0] == 3


def test_without_probes_the_one_well_run_misses_the_other_wells(tmp_path):
    exact = exact_populations()
    sampler, _, result = _one_well_run(tmp_path, probes=0, samples=1500)
    assert sampler.basins.darts is None and not sampler.basins.found
    assert not np.all((result.lower <= exact) & (exact <= result.upper))


@pytest.mark.parametrize("production, converged", [(True, False), (False, True)])
def test_a_basin_found_in_production_keeps_the_verdict_from_converged(production, converged):
    rng = np.random.default_rng(0)
    series = rng.integers(0, 2, size=(4, 4000))  # clean, well mixed: no other rule fires
    estimate = population_estimate(series, 2, rng)
    found = [{"cycle": 900, "production": production, "energy_kj": -3.0, "above_lowest_kj": 4.0}]
    verdict = judge(series, estimate, ["a", "b"], [False, False], found_basins=found)
    assert verdict.converged is converged
    assert any("found-basins.sdf" in text for text in verdict.reasons + verdict.warnings)


# kT at 300 K from the molar gas constant, R = 8.314462618 J/(mol K) (CODATA 2018).
KT_300_KJ = 8.314462618e-3 * 300.0


@pytest.mark.parametrize("above_kj, converged", [
    ([22.4], True),               # e^(3 - 8.98) = 0.25%: below the 0.5% floor, a warning
    ([15.0], False),              # e^(3 - 6.01) = 4.9%: could matter
    ([25.0, 25.0, 25.0], True),   # 3 x 0.09%
    ([21.0] * 3, False),          # 3 x 0.22% = 0.66%: each below the floor, together above it
    ([-2.0], False),              # lower than every known minimum
])
def test_a_basin_found_in_production_is_weighed_by_its_energy(above_kj, converged):
    rng = np.random.default_rng(0)
    series = rng.integers(0, 2, size=(4, 4000))
    estimate = population_estimate(series, 2, rng)
    found = [{"cycle": 900, "production": True, "energy_kj": e, "above_lowest_kj": e} for e in above_kj]
    weighed = judge(series, estimate, ["a", "b"], [False, False], found_basins=found, kT_kj=KT_300_KJ)
    assert weighed.converged is converged
    text = (weighed.warnings if converged else weighed.reasons)[-1]
    assert "found in production" in text and "found-basins.sdf" in text
    # without the temperature the finds are not weighed and always hold the verdict back
    assert not judge(series, estimate, ["a", "b"], [False, False], found_basins=found).converged
