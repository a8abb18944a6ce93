"""The one interface every Monte Carlo move has, and the walker states moves act on.

A move is an object, in the spirit of OpenMM's forces and integrators: the scheduler
(:class:`hopwell.sampling.sampler.Sampler`) hands it the walkers and the shared random streams,
and the move proposes, accepts with its own exact Metropolis-Hastings ratio (written once, in
its module's docstring), updates the walkers it was given and keeps its own counters::

    class Move:
        name: str                                         # its key in the checkpoint's counters
        def apply(self, walkers, which, streams) -> MoveResult
        def state_dict(self) -> dict                      # {checkpoint key: JSON-able counters}
        def load_state_dict(self, state: dict) -> None    # the checkpoint's counters, all moves

``state_dict`` entries of all moves are merged into the checkpoint's ``stats`` JSON, so each
move reads back its own keys (and starts from zero where an older checkpoint has none). Moves
never write to the run store; what they record (proposal records of the flow move,
intermediate frames for the flow fit) comes back in the :class:`MoveResult`.
"""

from __future__ import annotations

import json
from collections import deque
from dataclasses import asdict, dataclass, field
from typing import Protocol

import numpy as np
import torch

from hopwell.coords.guards import GuardMask

RECENT = 20  # applications kept in a move's moving acceptance window
REJECT_NONE, REJECT_CLASH, REJECT_STEREO = 0, 1, 2


@dataclass
class MoveCounters:
    """Proposals and acceptances of one move, rejections by cause, and a moving window.

    ``recent`` holds ``(accepted, proposed)`` of the last ``RECENT`` applications.
    """

    proposed: int = 0
    accepted: int = 0
    clash: int = 0
    stereo: int = 0
    recent: deque = field(default_factory=lambda: deque(maxlen=RECENT))

    def acceptance(self) -> float:
        return self.accepted / self.proposed if self.proposed else float("nan")

    def recent_acceptance(self) -> float:
        if not self.recent:
            return float("nan")
        a, p = np.sum(self.recent, axis=0)
        return a / p if p else float("nan")

    def to_json(self) -> dict:
        return asdict(self) | {"recent": [list(r) for r in self.recent]}

    @classmethod
    def from_json(cls, values: dict) -> "MoveCounters":
        values = dict(values)
        recent = deque(map(tuple, values.pop("recent", [])), maxlen=RECENT)
        known = {k: v for k, v in values.items() if k in ("proposed", "accepted", "clash", "stereo")}
        return cls(**known, recent=recent)


@dataclass
class Walkers:
    """The chain states of all walkers: positions and potential energies.

    Attributes
    ----------
    positions_nm : numpy.ndarray, shape ``(n_walkers, n_atoms, 3)``
    energies_kj : numpy.ndarray, shape ``(n_walkers,)``
    """

    positions_nm: np.ndarray
    energies_kj: np.ndarray

    def __len__(self) -> int:
        return len(self.positions_nm)

    def set(self, walker: int, positions_nm: np.ndarray, energy_kj: float) -> None:
        """Move one walker to a new state."""
        self.positions_nm[walker] = positions_nm
        self.energies_kj[walker] = energy_kj


@dataclass
class RandomStreams:
    """The random streams every move draws from: numpy for MH decisions and choices, torch for
    the flow's draws. One pair per run (or per shard), saved in the checkpoint."""

    numpy: np.random.Generator
    torch: torch.Generator

    @classmethod
    def seeded(cls, seed: int) -> "RandomStreams":
        return cls(np.random.default_rng(seed), torch.Generator().manual_seed(seed))

    def state_arrays(self) -> dict:
        """Both streams' states as checkpoint arrays (``rng``: numpy's as JSON, ``torch_rng``)."""
        return {"rng": np.str_(json.dumps(self.numpy.bit_generator.state)),
                "torch_rng": self.torch.get_state().numpy()}

    def load_state_arrays(self, state: dict) -> None:
        """Continue both streams from :meth:`state_arrays` output."""
        self.numpy.bit_generator.state = json.loads(str(state["rng"]))
        self.torch.set_state(torch.from_numpy(np.array(state["torch_rng"])))


@dataclass
class MoveResult:
    """What one application of a move hands back to the scheduler.

    Attributes
    ----------
    accepted : numpy.ndarray of bool, shape ``(len(which),)``
        Whether each walker's state changed.
    proposals : dict, optional
        Proposal records for the run store (the flow move in production).
    frames_nm : numpy.ndarray, optional
        Extra states for the flow fit (intermediate frames of a Langevin segment in training).
    """

    accepted: np.ndarray
    proposals: dict | None = None
    frames_nm: np.ndarray | None = None


def guarded_energies(guard, evaluator, positions_nm: np.ndarray) -> tuple[np.ndarray, GuardMask]:
    """Energies (kJ/mol) of the proposals that pass the guard, +inf for the rest (never evaluated).

    Parameters
    ----------
    guard : hopwell.coords.guards.ProposalGuard
    evaluator : hopwell.systems.energy.EnergyEvaluator
    positions_nm : numpy.ndarray, shape ``(n, n_atoms, 3)``

    Returns
    -------
    energy_kj : numpy.ndarray, shape ``(n,)``
    mask : hopwell.coords.guards.GuardMask
        Which proposals were rejected, and why.
    """
    mask = guard(positions_nm)
    ok = ~np.asarray(mask.rejected)
    energy_kj = np.full(len(positions_nm), np.inf)
    if ok.any():
        energy_kj[ok] = evaluator.energies_kj(positions_nm[ok])
    return energy_kj, mask


class Move(Protocol):
    """The interface of a move (see the module docstring)."""

    name: str

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult: ...

    def state_dict(self) -> dict: ...

    def load_state_dict(self, state: dict) -> None: ...

