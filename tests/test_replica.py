"""Temperature replica exchange (``--method remd``) against references outside hopwell.

* The ladder against its closed form and the exchange criterion against a direct evaluation of
  the Boltzmann weights of the swapped and unswapped joint states.
* The four-atom chain of tests/chain_systems.py, seeded in one well, whose target-rung torsion
  populations must be the scipy.integrate.quad populations although plain dynamics at the
  target temperature never leaves the seed well.
* Crash safety: a stopped, crashed or killed remd run resumes without losing or repeating a
  recorded cycle, and its exchange counts continue.
"""

from __future__ import annotations

import json
import math
import signal

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
from scipy import constants
from test_resume import _hopwell, _kill_when, _spawn, _wait_for_cycle
from test_sampler_exact import plain_langevin

from hopwell.analysis.stats import population_estimate
from hopwell.moves.exchange import exchange_log_acceptance, neighbour_pairs
from hopwell.sampling.replica import ReplicaSampler, geometric_ladder
from hopwell.sampling.run import load_sampler, resume_run, start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.sampling.store import MOVE_LANGEVIN, RunStore
from hopwell.systems.builder import BuildOptions


@pytest.fixture(autouse=True)
def _one_torch_thread():
    """In-process sampling with one torch thread, as the command line runs it."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


# -- the ladder and the exchange criterion --------------------------------------------------
def test_geometric_ladder_is_the_closed_form():
    for low, high, n in ((300.0, 600.0, 6), (300.0, 2500.0, 4), (250.0, 251.0, 2)):
        ladder = geometric_ladder(low, high, n)
        # The closed form T_k = T_low (T_high / T_low)^(k / (n - 1)), term by term.
        closed = [low * math.pow(high / low, k / (n - 1)) for k in range(n)]
        np.testing.assert_allclose(ladder, closed, rtol=1e-13)
        assert ladder[0] == pytest.approx(low, rel=1e-14) and ladder[-1] == pytest.approx(high, rel=1e-14)
        np.testing.assert_allclose(ladder[1:] / ladder[:-1], (high / low) ** (1 / (n - 1)), rtol=1e-13)
    for bad in ((300.0, 600.0, 1), (300.0, 300.0, 4), (600.0, 300.0, 4), (0.0, 300.0, 3), (300.0, 600.0, 2.5)):
        with pytest.raises(ValueError):
            geometric_ladder(*bad)


def test_exchange_criterion_is_the_boltzmann_ratio_of_the_swapped_states():
    rng = np.random.default_rng(3)
    temperatures = rng.uniform(250.0, 900.0, size=(200, 2))
    # 1/kT from the CODATA molar gas constant (scipy.constants), in mol/kJ.
    beta = 1.0 / (constants.R * temperatures / 1000.0)
    energy = rng.uniform(-60.0, 60.0, size=(200, 2))
    log_alpha = exchange_log_acceptance(beta[:, 0], beta[:, 1], energy[:, 0], energy[:, 1])
    # The joint Boltzmann weights after the swap (rung i holds U_j) and before it.
    swapped = np.exp(-beta[:, 0] * energy[:, 1] - beta[:, 1] * energy[:, 0])
    unswapped = np.exp(-beta[:, 0] * energy[:, 0] - beta[:, 1] * energy[:, 1])
    np.testing.assert_allclose(np.exp(log_alpha), swapped / unswapped, rtol=1e-10)
    # Scalars too; a swap that moves the higher energy to the hotter rung is always accepted.
    assert exchange_log_acceptance(beta[0, 0], beta[0, 0] / 2.0, 10.0, -5.0) > 0.0


def test_neighbour_pairs_alternate_and_cover_the_ladder():
    assert neighbour_pairs(6, 0).tolist() == [0, 2, 4]
    assert neighbour_pairs(6, 1).tolist() == [1, 3]
    assert neighbour_pairs(5, 0).tolist() == [0, 2] and neighbour_pairs(5, 1).tolist() == [1, 3]
    assert neighbour_pairs(2, 1).tolist() == []
    for n in range(2, 9):
        both = np.concatenate([neighbour_pairs(n, 0), neighbour_pairs(n, 1)])
        assert sorted(both.tolist()) == list(range(n - 1))  # every pair, once per two cycles


# -- exactness on the chain ---------------------------------------------------------------------
# Measured here (20 000 cycles, seed 1): 95% intervals 4.6, 5.2 and 6.4 points wide; the rung-0
# indicator's statistical inefficiency is ~25 cycles, so narrower intervals need longer runs.
MAX_WIDTH = 0.07
CHAIN_CYCLES = 20000


def test_remd_from_one_well_matches_quadrature(tmp_path):
    """Rung 0 (300 K) starts in the shallowest well; exchanges with hotter rungs must fill all three.

    The local move is GHMC, exact for any time step: the exchange criterion weighs the total
    energy, bonds and angles included, so a local move whose bond and angle energies are biased
    would bias the torsion populations of rung 0 too.
    """
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, method="remd", replicas=4, top_temperature_K=2500.0,
        local_move="ghmc", timestep_fs=4.0, langevin_steps=25, training_cycles=0,
        cycles_per_chunk=1000, flow_layers=1, flow_hidden=8, seed=1,
    )
    store = new_store(tmp_path / "run", settings)
    sampler = ReplicaSampler(chain_mol(), chain_system(), chain_positions_nm(-60.0)[None], settings, store,
                             platform="Reference")
    sampler.run(Budget(samples=CHAIN_CYCLES))
    assert sampler.cycle == CHAIN_CYCLES
    (positions,) = production_positions(store, 1)  # rung 0 only, one state per cycle
    assert len(positions) == CHAIN_CYCLES

    wells = assign_wells(dihedrals_rad(positions))
    result = population_estimate([wells], 3, np.random.default_rng(7))
    # Exact reference: scipy.integrate.quad of exp(-V/kT) over each well (chain_systems.py).
    exact = exact_populations()  # the three wells checked family-wise (chain_systems.FAMILY_STRETCH)
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, result.lower, result.upper, exact)
    assert np.all(result.upper - result.lower < MAX_WIDTH), result.upper - result.lower

    # Plain OpenMM Langevin at 300 K from the same seed, over as much simulated time as rung 0
    # ran, never leaves the seed well: the exchanges did the crossing.
    time_ps = CHAIN_CYCLES * settings.langevin_steps * settings.timestep_fs * 1e-3
    frames = plain_langevin(chain_system(), chain_positions_nm(-60.0), TEMPERATURE_K,
                            n_frames=int(time_ps), stride=1000, seed=3)
    assert np.all(assign_wells(dihedrals_rad(frames)) == 0)


# -- resume ------------------------------------------------------------------------------------
def test_remd_with_langevin_segments_matches_quadrature(tmp_path):
    """The same ladder with 1 fs Langevin segments (the default local move) instead of GHMC.

    Exchanges weigh bond and angle energies, so this fails if Langevin segments started from
    fresh velocities bias them: measured here before the velocities were moved to the
    integrator's half step, this run gave 0.225, 0.370, 0.405 against quadrature's 0.199, 0.301,
    0.499.
    """
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, method="remd", replicas=4, top_temperature_K=2500.0,
        local_move="langevin", timestep_fs=1.0, langevin_steps=50, training_cycles=0,
        cycles_per_chunk=1000, flow_layers=1, flow_hidden=8, seed=1,
    )
    store = new_store(tmp_path / "run", settings)
    sampler = ReplicaSampler(chain_mol(), chain_system(), chain_positions_nm(-60.0)[None], settings, store,
                             platform="Reference")
    sampler.run(Budget(samples=2 * CHAIN_CYCLES))
    (positions,) = production_positions(store, 1)
    result = population_estimate([assign_wells(dihedrals_rad(positions))], 3, np.random.default_rng(7))
    exact = exact_populations()  # scipy.integrate.quad of exp(-V/kT) over each well, family-wise
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, result.lower, result.upper, exact)
    # Narrow enough to exclude the old bias (about 0.1 in the third well).
    assert np.all(result.upper - result.lower < 0.08), result.upper - result.lower


REMD_SETTINGS = dict(method="remd", replicas=3, top_temperature_K=600.0, langevin_steps=50,
                     training_cycles=0, seed=11)
REMD_ARGS = ["CCCC", "--method", "remd", "--replicas", "3", "--top-temperature", "600",
             "--langevin-steps", "20", "--seed", "11"]


def _check_remd_run(run_dir, cycles: int | None = None) -> dict:
    """Every cycle recorded once, in order, as rung 0's state; counters agree with the chunks."""
    store = RunStore.open(run_dir)
    state, config = store.read_state(), store.config()
    last_cycle, replicas = int(state["cycle"]), config["sampler"]["replicas"]
    assert store.chunk_indices() == list(range(int(state["next_chunk"])))
    chunks = list(store.iter_chunks())
    np.testing.assert_array_equal(np.concatenate([c["state_cycle"] for c in chunks]), np.arange(last_cycle))
    assert np.all(np.concatenate([c["state_walker"] for c in chunks]) == 0)
    assert np.all(np.concatenate([c["state_move"] for c in chunks]) == MOVE_LANGEVIN)
    assert np.all(np.concatenate([c["state_production"] for c in chunks]))
    assert not any("proposal_cycle" in c for c in chunks)
    assert int(state["production_samples"]) == last_cycle
    assert config["walkers"] == replicas == len(state["positions_nm"])
    np.testing.assert_array_equal(state["positions_nm"][0].astype(np.float32), chunks[-1]["state_positions_nm"][-1])
    assert state["energies_kj"][0] == chunks[-1]["state_energy_kj"][-1]

    exchange = json.loads(str(state["stats"]))["exchange"]
    ladder = geometric_ladder(config["sampler"]["temperature_K"], config["sampler"]["top_temperature_K"], replicas)
    np.testing.assert_allclose(exchange["temperatures_K"], ladder)
    # Pair (k, k + 1) is tried on the cycles of k's parity: a lost or repeated cycle shows here.
    assert exchange["attempted"] == [sum(1 for c in range(last_cycle) if c % 2 == k % 2)
                                     for k in range(replicas - 1)]
    assert all(0 <= a <= n for a, n in zip(exchange["accepted"], exchange["attempted"]))
    assert f"cycle {last_cycle}: exchange acceptance 300-424 K" in (store.path / "progress.log").read_text()
    if cycles is not None:
        assert last_cycle == cycles
    return state


class SimulatedCrash(BaseException):
    """Stands for the process dying at this point (not an Exception: nothing may catch it)."""


def test_remd_stop_crash_and_resume_keep_every_cycle_once(tmp_path, monkeypatch):
    run_dir = tmp_path / "run"
    settings = SamplerSettings(**REMD_SETTINGS)
    first = start_run("CCCC", run_dir, BuildOptions(), settings, Budget(samples=120),
                      stop_when=lambda s: s.cycle >= 40)
    assert isinstance(first, ReplicaSampler)
    _check_remd_run(run_dir, cycles=40)

    # Restore: every rung's evaluator is new, at its rung's temperature, with fresh noise.
    resumed = load_sampler(run_dir)
    assert isinstance(resumed, ReplicaSampler)
    np.testing.assert_allclose([e.temperature_K for e in resumed.evaluators], first.temperatures_K)
    seeds_before = {e.integrator.getRandomNumberSeed() for e in first.evaluators}
    seeds_after = {e.integrator.getRandomNumberSeed() for e in resumed.evaluators}
    assert len(seeds_after) == settings.replicas and not seeds_after & seeds_before
    assert resumed.stats["exchange"].attempted == first.stats["exchange"].attempted
    assert resumed.stats["exchange"].accepted == first.stats["exchange"].accepted

    # Death between a chunk and the checkpoint that would count it: the chunk is dropped.
    def dying_write_state(self, arrays):
        raise SimulatedCrash

    monkeypatch.setattr(RunStore, "write_state", dying_write_state)
    with pytest.raises(SimulatedCrash):
        resumed.run(Budget(samples=120))
    monkeypatch.undo()
    assert RunStore(run_dir).chunk_indices()[-1] == 4  # written, but no checkpoint counts it
    assert load_sampler(run_dir).cycle == 40
    assert "removed 1 chunk(s)" in (run_dir / "progress.log").read_text()
    _check_remd_run(run_dir, cycles=40)

    assert resume_run(run_dir).cycle == 120  # the saved budget
    _check_remd_run(run_dir, cycles=120)


def test_remd_kill9_then_resume(tmp_path):
    run_dir = tmp_path / "run"
    proc, err = _spawn(["run", *REMD_ARGS, "--samples", "100", "-o", str(run_dir)], tmp_path, "run")
    # SIGKILL soon after the first checkpoint past checkpoint zero.
    _wait_for_cycle(proc, run_dir, above=-1)
    rc = _kill_when(proc, run_dir, "progress", 0.05, limit=60.0)
    assert rc == -signal.SIGKILL, err.read_text()
    killed_at = int(RunStore(run_dir).read_state()["cycle"])
    assert 0 < killed_at < 100
    result = _hopwell(["resume", str(run_dir)], cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    _check_remd_run(run_dir, cycles=100)
    assert f"resumed at cycle {killed_at}" in (run_dir / "progress.log").read_text()
