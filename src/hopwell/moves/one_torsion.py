"""One-torsion moves: redraw one moving torsion from the flow base's marginal, keep the rest.

For a torsion i chosen uniformly among the moving torsions, the new value t_i' is drawn from the
base's one-torsion marginal q_i (a von Mises mixture with a uniform floor,
:meth:`hopwell.flow.torsion.TorsionFlow.marginal_sample`). Given everything else this is an
independence proposal for t_i, and J (bonds and angles only) is unchanged, so::

    alpha = min(1, exp(-u(x') + u(x)) * q_i(t_i) / q_i(t_i'))

The choice of i is the same in both directions and cancels. Proposals are drawn and scored in
batches from the current state; after an acceptance the rest of the batch is dropped and drawn
again from the new state, so every accepted proposal was made from the state it replaces.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import cartesian_to_internal, internal_to_cartesian
from hopwell.flow.training import FlowTrainer
from hopwell.moves.base import MoveCounters, MoveResult, RandomStreams, Walkers
from hopwell.systems.energy import EnergyEvaluator


@dataclass
class OneTorsionSettings:
    """Settings of the one-torsion move.

    Attributes
    ----------
    single_moves_per_cycle : int
        One-torsion proposals per walker per cycle.
    """

    single_moves_per_cycle: int = 16


class OneTorsion:
    """The one-torsion move (see the module docstring).

    Parameters
    ----------
    trainer : FlowTrainer
        Its flow's base marginals are the proposals; its ``moving`` rows the torsions.
    guard : ProposalGuard
    evaluator : EnergyEvaluator
    proposals : int
        Proposals per walker per application.
    """

    name = "single"

    def __init__(self, trainer: FlowTrainer, guard: ProposalGuard, evaluator: EnergyEvaluator, proposals: int):
        self.trainer, self.guard, self.evaluator, self.n = trainer, guard, evaluator, int(proposals)
        self.counters = MoveCounters()

    def _walker(self, walkers: Walkers, walker: int, streams: RandomStreams) -> bool:
        zmat, flow, kT = self.trainer.zmat, self.trainer.flow, self.evaluator.kT
        moving = torch.as_tensor(self.trainer.moving)
        remaining, moved = self.n, False
        while remaining > 0:
            with torch.no_grad():
                current = cartesian_to_internal(zmat, torch.as_tensor(walkers.positions_nm[walker:walker + 1]))
                index = torch.as_tensor(streams.numpy.integers(0, len(moving), remaining))
                new = flow.marginal_sample(index, streams.torch)
                torsions = current.torsions_rad.repeat(remaining, 1)
                rows, cols = torch.arange(remaining), moving[index]
                old = torsions[rows, cols].clone()
                torsions[rows, cols] = new
                positions, _ = internal_to_cartesian(
                    zmat, current.bonds_nm.repeat(remaining, 1), current.angles_rad.repeat(remaining, 1), torsions)
                log_q_ratio = (flow.marginal_log_prob(index, old) - flow.marginal_log_prob(index, new)).numpy()
            positions = positions.numpy()
            mask = self.guard(positions)
            ok = ~np.asarray(mask.rejected)
            energy = np.full(remaining, np.inf)
            if ok.any():
                energy[ok] = self.evaluator.energies_kj(positions[ok])
            log_u = np.log(streams.numpy.random(remaining))
            log_alpha = -(energy - walkers.energies_kj[walker]) / kT + log_q_ratio
            hits = np.flatnonzero(np.isfinite(energy) & (log_u < log_alpha))
            used = int(hits[0]) + 1 if len(hits) else remaining
            self.counters.proposed += used
            self.counters.clash += int(np.asarray(mask.clash)[:used].sum())
            self.counters.stereo += int(np.asarray(mask.stereo)[:used].sum())
            if len(hits):
                self.counters.accepted += 1
                walkers.set(walker, positions[hits[0]], energy[hits[0]])
                moved = True
            remaining -= used
        return moved

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        return MoveResult(np.array([self._walker(walkers, int(w), streams) for w in which], dtype=bool))

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = MoveCounters.from_json(state.get(self.name, {}))
