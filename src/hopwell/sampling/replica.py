"""Temperature replica exchange: the ``--method remd`` baseline.

Replica exchange runs one copy of the system at each temperature of a ladder T_0 < T_1 < ...
and now and then swaps the configurations of neighbouring rungs
(:class:`hopwell.moves.exchange.ReplicaSwap`, whose docstring gives the swap's Metropolis
ratio), so that configurations that crossed barriers at the top walk down the ladder.

Here the walkers of :class:`hopwell.sampling.sampler.Sampler` are the rungs: walker r holds the
configuration now at temperature ``ladder[r]``. Each cycle runs one Langevin segment per rung
(velocities drawn afresh from Maxwell-Boltzmann at the rung's temperature, so a swap exchanges
configurations only and needs no velocity rescaling), then attempts the swaps of disjoint
neighbour pairs, (0, 1), (2, 3), ... on even cycles and (1, 2), (3, 4), ... on odd ones. Only
rung 0 is recorded, once per cycle, as walker 0 with move ``MOVE_LANGEVIN``; every cycle is
production. The exchange counts per neighbour pair are checkpointed with the other statistics
(``state.npz`` key ``stats``, entry ``"exchange"``, see
:class:`hopwell.moves.exchange.ExchangeStats`).

The criterion weighs the total potential energy, so a bias of the local move in any degree of
freedom, bonds and angles included, reaches the target rung's conformer populations (a flow
move, which keeps bonds and angles, is immune to this). On the four-atom test chain, Langevin
segments started from on-step Maxwell-Boltzmann velocities (the integrator keeps them half a
step behind) put up to 0.3 kT too much energy in the bonds and angles and shifted rung 0's well
populations by up to 9 points; with the velocities shifted to the half step
(:meth:`hopwell.systems.energy.EnergyEvaluator.langevin`), 1 fs Langevin and GHMC
(``local_move="ghmc"``, exact for any time step) both match the quadrature
(tests/test_replica.py).
"""

from __future__ import annotations

import json

import numpy as np
from rdkit import Chem

from hopwell.moves.exchange import ReplicaSwap, neighbour_pairs
from hopwell.sampling.sampler import Sampler, SamplerSettings
from hopwell.sampling.store import MOVE_LANGEVIN, RunStore
from hopwell.systems.energy import kT_kj


def geometric_ladder(low_K: float, high_K: float, n: int) -> np.ndarray:
    """Temperatures in geometric progression, ``T_k = low_K (high_K / low_K)^(k / (n - 1))``.

    A constant ratio between neighbours gives roughly equal exchange acceptance along the
    ladder when the heat capacity varies little with temperature.

    Parameters
    ----------
    low_K, high_K : float
        The lowest (target) and highest temperatures (K), ``0 < low_K < high_K``.
    n : int
        Number of rungs, at least 2.

    Returns
    -------
    numpy.ndarray, shape ``(n,)``
        Temperatures in K, increasing, from ``low_K`` to ``high_K``.

    Examples
    --------
    >>> geometric_ladder(300.0, 1200.0, 3).tolist()
    [300.0, 600.0, 1200.0]
    """
    if not (isinstance(n, (int, np.integer)) and n >= 2):
        raise ValueError(f"n (the number of rungs) must be an integer of at least 2, got {n!r}")
    if not 0.0 < low_K < high_K:
        raise ValueError(f"temperatures must satisfy 0 < low_K < high_K, got low_K={low_K}, high_K={high_K}")
    return np.geomspace(low_K, high_K, n)


class ReplicaSampler(Sampler):
    """Temperature replica exchange over a geometric ladder (see the module docstring).

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Molecule with explicit hydrogens.
    system : openmm.System
    seeds_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
        Rung r starts from seed ``r % n_seeds``.
    settings : SamplerSettings
        ``temperature_K`` is rung 0 (the target), ``top_temperature_K`` the top rung,
        ``replicas`` the number of rungs, ``langevin_steps`` the segment per rung and cycle.
        The flow and training settings are not used: every cycle is production.
    store : RunStore
    platform : str, optional
    """

    def __init__(self, mol: Chem.Mol, system, seeds_nm: np.ndarray, settings: SamplerSettings,
                 store: RunStore, platform: str | None = None):
        self.temperatures_K = geometric_ladder(settings.temperature_K, settings.top_temperature_K,
                                               settings.replicas)
        super().__init__(mol, system, seeds_nm, settings, store, n_walkers=settings.replicas,
                         platform=platform)
        self.training_end_cycle = 0  # nothing to train: production from the first cycle

    def _segment_evaluators(self) -> list:
        """Rung 0's evaluator is the sampler's; rungs 1 and up get their own, seeded from the
        run's RNG (made anew on resume, so a resumed run does not replay the start's noise)."""
        platform = self.evaluator.platform.getName()
        self.evaluators = [self.evaluator] + [self._evaluator(t, platform) for t in self.temperatures_K[1:]]
        return self.evaluators

    def _build_moves(self) -> None:
        super()._build_moves()
        self.local.label = "rung"
        self.swap = ReplicaSwap(self.temperatures_K, kT_kj)

    @property
    def stats(self) -> dict:
        return super().stats | {"exchange": self.swap.counters}

    def _counters_json(self) -> dict:
        return super()._counters_json() | self.swap.state_dict()

    def run_cycle(self) -> None:
        """Segments on every rung, one round of swaps, then rung 0's state queued for the chunk."""
        every = np.arange(self.n_walkers)
        self.local.apply(self.walkers, every, self.streams)
        self.swap.apply(self.walkers, neighbour_pairs(self.n_walkers, self.cycle % 2), self.streams)
        self.queue.add_state(self.snapshot(), 0, self.cycle, MOVE_LANGEVIN, production=True)
        self.production_samples += 1
        self.cycle += 1

    def flush(self) -> None:
        """Chunk, then checkpoint (the base class's order), then the exchange line in the log.

        The line is written when the flush wrote a chunk, so once per checkpointed stretch.
        """
        wrote_chunk = bool(self.queue)
        super().flush()
        if wrote_chunk:
            self.store.log(f"cycle {self.cycle}: exchange acceptance {self.swap.counters.describe()}")

    def restore(self, state: dict, flow_state: dict) -> None:
        """Continue from a checkpoint: the base state (fresh rung noise included) and the exchange counts."""
        super().restore(state, flow_state)
        self.swap.load_state_dict(json.loads(str(state["stats"])))
