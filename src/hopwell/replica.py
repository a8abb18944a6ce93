"""Temperature replica exchange: the ``--method remd`` baseline.

Replica exchange (Swendsen & Wang 1986, Phys. Rev. Lett. 57, 2607; in its molecular-dynamics
form, Sugita & Okamoto 1999, Chem. Phys. Lett. 314, 141) runs one copy of the system at each
temperature of a ladder T_0 < T_1 < ... and now and then proposes to swap the configurations of
neighbouring rungs. The joint target is the product of the rungs' Boltzmann distributions, and a
swap of rungs i and j is accepted with the Metropolis probability::

    alpha = min(1, exp((beta_i - beta_j) (U_i - U_j))),    beta = 1 / kT

so every rung, the target temperature T_0 included, keeps its own Boltzmann distribution while
configurations that crossed barriers at the top walk down the ladder.

Here the walkers of :class:`hopwell.sampler.Sampler` are the rungs: walker r holds the
configuration now at temperature ``ladder[r]``. Each cycle runs one Langevin segment per rung
(velocities drawn afresh from Maxwell-Boltzmann at the rung's temperature, so a swap exchanges
configurations only and needs no velocity rescaling), then attempts the swaps of disjoint
neighbour pairs, (0, 1), (2, 3), ... on even cycles and (1, 2), (3, 4), ... on odd ones. Only
rung 0 is recorded, once per cycle, as walker 0 with move ``MOVE_LANGEVIN``; every cycle is
production. The exchange counts per neighbour pair are checkpointed with the other statistics
(``state.npz`` key ``stats``, entry ``"exchange"``, see :class:`ExchangeStats`).

The criterion weighs the total potential energy, so a bias of the local move in any degree of
freedom, bonds and angles included, reaches the target rung's conformer populations (a flow
move, which keeps bonds and angles, is immune to this). On the four-atom test chain, Langevin
segments started from on-step Maxwell-Boltzmann velocities (the integrator keeps them half a
step behind) put up to 0.3 kT too much energy in the bonds and angles and shifted rung 0's well
populations by up to 9 points; with the velocities shifted to the half step
(:meth:`hopwell.energy.EnergyEvaluator.langevin`), 1 fs Langevin and GHMC
(``local_move="ghmc"``, exact for any time step) both match the quadrature
(tests/test_replica.py).
"""

from __future__ import annotations

import json
from collections import deque
from dataclasses import dataclass, field

import numpy as np
from rdkit import Chem

from hopwell.energy import EnergyEvaluator, kT_kj
from hopwell.sampler import EXPLOSION_KJ, Sampler, SamplerSettings
from hopwell.store import MOVE_LANGEVIN, STATE_FIELDS, RunStore

# Cycles kept in the moving window of recent exchange outcomes (as in CycleStats.recent).
RECENT_CYCLES = 20


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


def exchange_log_acceptance(beta_i, beta_j, energy_i_kj, energy_j_kj):
    """Log Metropolis ratio of swapping the configurations of two rungs.

    ``log alpha = (beta_i - beta_j) (U_i - U_j)``: the log ratio of the joint Boltzmann weights
    after and before the swap, ``exp(-beta_i U_j - beta_j U_i) / exp(-beta_i U_i - beta_j U_j)``.
    Accept when ``log(u) < log alpha`` for u uniform on [0, 1).

    Parameters
    ----------
    beta_i, beta_j : float or numpy.ndarray, shape ``(n_pairs,)``
        Inverse thermal energies 1/kT of the two rungs, mol/kJ.
    energy_i_kj, energy_j_kj : float or numpy.ndarray, shape ``(n_pairs,)``
        Potential energies (kJ/mol) of the configurations now at rungs i and j.

    Returns
    -------
    float or numpy.ndarray, shape ``(n_pairs,)``
    """
    return (np.asarray(beta_i) - beta_j) * (np.asarray(energy_i_kj) - energy_j_kj)


def neighbour_pairs(n_rungs: int, parity: int) -> np.ndarray:
    """Lower rungs of the disjoint neighbour pairs of one parity.

    Parity 0 gives pairs (0, 1), (2, 3), ...; parity 1 gives (1, 2), (3, 4), ....

    Parameters
    ----------
    n_rungs : int
    parity : int
        0 or 1 (taken modulo 2): the cycle number's parity.

    Returns
    -------
    numpy.ndarray of int, shape ``(n_pairs,)``
        Rung i of each pair (i, i + 1).
    """
    return np.arange(parity % 2, n_rungs - 1, 2)


@dataclass
class ExchangeStats:
    """Exchange attempts and acceptances per neighbour pair (k, k + 1) of the ladder.

    Written to the checkpoint as JSON (``state.npz`` key ``stats``, entry ``"exchange"``)::

        {"temperatures_K": [T_0, ..., T_{n-1}],
         "attempted": [a_0, ..., a_{n-2}], "accepted": [b_0, ..., b_{n-2}],
         "recent": [[accepted, attempted], ...]}

    where entry k of ``attempted`` and ``accepted`` counts the swaps tried and made between
    rungs k and k + 1, and ``recent`` holds the totals over all pairs of the last
    ``RECENT_CYCLES`` cycles, oldest first.
    """

    temperatures_K: list[float]
    attempted: list[int]
    accepted: list[int]
    recent: deque = field(default_factory=lambda: deque(maxlen=RECENT_CYCLES))

    @classmethod
    def empty(cls, temperatures_K) -> "ExchangeStats":
        n_pairs = len(temperatures_K) - 1
        return cls([float(t) for t in temperatures_K], [0] * n_pairs, [0] * n_pairs)

    @classmethod
    def from_json(cls, values: dict) -> "ExchangeStats":
        recent = deque(map(tuple, values["recent"]), maxlen=RECENT_CYCLES)
        return cls(values["temperatures_K"], values["attempted"], values["accepted"], recent)

    def record(self, lower, swapped) -> None:
        """Count one cycle's attempts: pairs ``(lower[k], lower[k] + 1)``, outcome ``swapped[k]``."""
        for k, ok in zip(np.asarray(lower).tolist(), np.asarray(swapped).tolist()):
            self.attempted[k] += 1
            self.accepted[k] += int(ok)
        self.recent.append((int(np.sum(swapped)), len(lower)))

    def acceptance(self) -> np.ndarray:
        """Fraction of accepted swaps per pair, shape ``(n_rungs - 1,)``; NaN where none tried."""
        attempted = np.asarray(self.attempted, dtype=float)
        accepted = np.asarray(self.accepted, dtype=float)
        return np.divide(accepted, attempted, out=np.full_like(attempted, np.nan), where=attempted > 0)

    def recent_acceptance(self) -> float:
        """Fraction accepted over all pairs in the last ``RECENT_CYCLES`` cycles."""
        if not self.recent:
            return float("nan")
        accepted, attempted = np.sum(self.recent, axis=0)
        return accepted / attempted if attempted else float("nan")

    def describe(self) -> str:
        """One line: the acceptance of each pair, e.g. ``300-342 K 0.61, 342-390 K 0.58``."""
        t = self.temperatures_K
        return ", ".join(f"{t[k]:.0f}-{t[k + 1]:.0f} K {a:.2f}" for k, a in enumerate(self.acceptance()))


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
        self.evaluators = [self.evaluator] + self._upper_evaluators()
        self.betas_mol_per_kj = 1.0 / np.array([kT_kj(t) for t in self.temperatures_K])
        self.training_end_cycle = 0  # nothing to train: production from the first cycle
        self.stats["exchange"] = ExchangeStats.empty(self.temperatures_K)

    def _upper_evaluators(self) -> list[EnergyEvaluator]:
        """Evaluators of rungs 1 and up, seeded from the sampler's RNG (rung 0 is ``self.evaluator``)."""
        s = self.settings
        return [
            EnergyEvaluator(self.system, t, platform=self.evaluator.platform.getName(),
                            timestep_ps=s.timestep_fs * 1e-3, friction_per_ps=s.friction_per_ps,
                            seed=int(self.rng.integers(1, 2**31 - 1)), local_move=s.local_move)
            for t in self.temperatures_K[1:]
        ]

    # -- moves ----------------------------------------------------------------------------
    def _segment(self, rung: int) -> None:
        """One local-move segment (Langevin or GHMC) at the rung's temperature; undone if it explodes."""
        x0, e0 = self.positions_nm[rung], self.energies_kj[rung]
        x, _, e = self.evaluators[rung].langevin(x0, self.settings.langevin_steps)
        if not (np.isfinite(e) and np.all(np.isfinite(x))) or e - e0 > EXPLOSION_KJ:
            self.store.log(f"cycle {self.cycle} rung {rung} ({self.temperatures_K[rung]:.0f} K):"
                           f" Langevin segment gave energy {e:.4g} kJ/mol (from {e0:.4g});"
                           " rolled back to the previous state")
            return
        self.positions_nm[rung], self.energies_kj[rung] = x, e

    def _exchange(self, parity: int) -> None:
        """Metropolis swaps of the configurations of the neighbour pairs of one parity."""
        lower = neighbour_pairs(self.n_walkers, parity)
        upper = lower + 1
        log_alpha = exchange_log_acceptance(self.betas_mol_per_kj[lower], self.betas_mol_per_kj[upper],
                                            self.energies_kj[lower], self.energies_kj[upper])
        swapped = np.log(self.rng.random(len(lower))) < log_alpha
        order = np.arange(self.n_walkers)
        order[lower[swapped]], order[upper[swapped]] = upper[swapped], lower[swapped]
        self.positions_nm, self.energies_kj = self.positions_nm[order], self.energies_kj[order]
        self.stats["exchange"].record(lower, swapped)

    def run_cycle(self) -> None:
        """Segments on every rung, one round of swaps, then rung 0's state queued for the chunk."""
        for rung in range(self.n_walkers):
            self._segment(rung)
        self._exchange(self.cycle % 2)
        states = {k: [] for k in STATE_FIELDS}
        self._record_state(states, 0, MOVE_LANGEVIN, production=True)
        self.production_samples += 1
        self._pending.append((states, {}))
        self.cycle += 1

    # -- persistence ----------------------------------------------------------------------
    def flush(self) -> None:
        """Chunk, then checkpoint (the base class's order), then the exchange line in the log.

        The line is written when the flush wrote a chunk, so once per checkpointed stretch.
        """
        wrote_chunk = bool(self._pending)
        super().flush()
        if wrote_chunk:
            self.store.log(f"cycle {self.cycle}: exchange acceptance {self.stats['exchange'].describe()}")

    def restore(self, state: dict) -> None:
        """Continue from a checkpoint: the base state, the exchange counts and fresh rung noise.

        Every rung's evaluator is made anew with a seed from the restored RNG (rung 0 by the
        base class), so a resumed run does not replay the Langevin noise of the run's start.
        """
        stats = json.loads(str(state["stats"]))
        exchange = ExchangeStats.from_json(stats.pop("exchange"))
        super().restore({**state, "stats": np.str_(json.dumps(stats))})
        self.evaluators = [self.evaluator] + self._upper_evaluators()
        self.stats["exchange"] = exchange
