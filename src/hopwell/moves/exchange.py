"""Replica swaps: exchange the configurations of neighbouring rungs of a temperature ladder.

Replica exchange (Swendsen & Wang 1986, Phys. Rev. Lett. 57, 2607; in its molecular-dynamics
form, Sugita & Okamoto 1999, Chem. Phys. Lett. 314, 141) runs one copy of the system at each
temperature of a ladder T_0 < T_1 < ... The joint target is the product of the rungs' Boltzmann
distributions, and a swap of rungs i and j is accepted with the Metropolis probability::

    alpha = min(1, exp((beta_i - beta_j) (U_i - U_j))),    beta = 1 / kT

so every rung keeps its own Boltzmann distribution. Walker r holds the configuration now at
temperature ``ladder[r]``; the scheduler names the lower rungs of disjoint neighbour pairs
(:func:`neighbour_pairs`) and the move tries each pair once. Configurations are swapped,
velocities are not kept (each local segment draws its own at its rung's temperature).
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

import numpy as np

from hopwell.moves.base import MoveResult, RandomStreams, Walkers

# Cycles kept in the moving window of recent exchange outcomes (as in MoveCounters.recent).
RECENT_CYCLES = 20


@dataclass
class LadderSettings:
    """Settings of the temperature ladder (``method="remd"``).

    Attributes
    ----------
    replicas : int
        Rungs, geometric from ``temperature_K`` to ``top_temperature_K``.
    top_temperature_K : float
    """

    replicas: int = 6
    top_temperature_K: float = 600.0


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


class ReplicaSwap:
    """The swap move (see the module docstring).

    Parameters
    ----------
    temperatures_K : numpy.ndarray, shape ``(n_rungs,)``
    kT_of : callable
        ``kT_of(temperature_K)`` in kJ/mol.
    """

    name = "exchange"

    def __init__(self, temperatures_K: np.ndarray, kT_of):
        self.temperatures_K = np.asarray(temperatures_K, dtype=float)
        self.betas_mol_per_kj = 1.0 / np.array([kT_of(t) for t in self.temperatures_K])
        self.counters = ExchangeStats.empty(self.temperatures_K)

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        """Try the swaps of pairs ``(which[k], which[k] + 1)``; ``which`` must be disjoint pairs."""
        lower = np.asarray(which, dtype=int)
        upper = lower + 1
        log_alpha = exchange_log_acceptance(self.betas_mol_per_kj[lower], self.betas_mol_per_kj[upper],
                                            walkers.energies_kj[lower], walkers.energies_kj[upper])
        swapped = np.log(streams.numpy.random(len(lower))) < log_alpha
        order = np.arange(len(walkers))
        order[lower[swapped]], order[upper[swapped]] = upper[swapped], lower[swapped]
        walkers.positions_nm, walkers.energies_kj = walkers.positions_nm[order], walkers.energies_kj[order]
        self.counters.record(lower, swapped)
        return MoveResult(swapped)

    def state_dict(self) -> dict:
        c = self.counters
        return {self.name: {"temperatures_K": c.temperatures_K, "attempted": c.attempted,
                            "accepted": c.accepted, "recent": [list(x) for x in c.recent]}}

    def load_state_dict(self, state: dict) -> None:
        if self.name in state:
            self.counters = ExchangeStats.from_json(state[self.name])
