"""Ring flips: a saturated ring reflected through its mean plane, its substituents carried along.

Torsion moves keep every ring as it is, and a chair flip through Langevin alone must cross a
barrier of about 10 kcal/mol (cyclohexane; a common textbook value). This move takes one of the
molecule's flippable rings (:func:`hopwell.coords.ring_flip.flippable_rings`: isolated,
saturated, five to seven atoms), chosen uniformly, and maps the walker's positions x to
T(x) = :func:`~hopwell.coords.ring_flip.reflect_ring`: one chair onto the other with axial and
equatorial substituents swapped, every stereocentre kept. T is a deterministic involution with
|det dT/dx| = 1, and the ring's choice does not depend on the state, so::

    alpha = min(1, exp(-u(T(x)) + u(x)))

(a deterministic move with a unit Jacobian factor, Green 1995, Biometrika 82:711). Proposals
that fail the clash or stereo guard are rejected before any energy call. All walkers' proposals
of one round are guarded and scored together; each walker makes ``ring_flips_per_cycle``
rounds. The counters are checkpointed under ``ring``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.ring_flip import RingReflection, reflect_ring
from hopwell.moves.base import MoveCounters, MoveResult, RandomStreams, Walkers, guarded_energies
from hopwell.systems.energy import EnergyEvaluator


@dataclass
class RingFlipSettings:
    """Settings of the ring-flip move.

    Attributes
    ----------
    ring_flips_per_cycle : int
        Ring-flip proposals per walker per cycle (0: the move is off; a molecule without a
        flippable ring never makes one).
    """

    ring_flips_per_cycle: int = 1


class RingFlip:
    """The ring-flip move (see the module docstring).

    Parameters
    ----------
    rings : list of RingReflection
        The molecule's flippable rings (:func:`hopwell.coords.ring_flip.flippable_rings`).
    guard : ProposalGuard
    evaluator : EnergyEvaluator
    proposals : int
        Proposals per walker per application.
    """

    name = "ring"

    def __init__(self, rings: list[RingReflection], guard: ProposalGuard, evaluator: EnergyEvaluator,
                 proposals: int):
        self.rings, self.guard, self.evaluator, self.n = rings, guard, evaluator, int(proposals)
        self.counters = MoveCounters()

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        """``self.n`` rounds, each one proposal per walker in ``which``, guarded and scored together."""
        which = np.asarray(which, dtype=np.int64)
        moved = np.zeros(len(which), dtype=bool)
        for _ in range(self.n):
            chosen = streams.numpy.integers(0, len(self.rings), len(which))
            proposed = np.stack([reflect_ring(walkers.positions_nm[w], self.rings[r]) for w, r in zip(which, chosen)])
            energy, mask = guarded_energies(self.guard, self.evaluator, proposed)
            log_u = np.log(streams.numpy.random(len(which)))
            hit = np.isfinite(energy) & (log_u < -(energy - walkers.energies_kj[which]) / self.evaluator.kT)
            for j in np.flatnonzero(hit):
                walkers.set(int(which[j]), proposed[j], energy[j])
            moved |= hit
            self.counters.proposed += len(which)
            self.counters.accepted += int(hit.sum())
            self.counters.clash += int(np.asarray(mask.clash).sum())
            self.counters.stereo += int(np.asarray(mask.stereo).sum())
        return MoveResult(moved)

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = MoveCounters.from_json(state.get(self.name, {}))
