"""One-torsion moves: redraw one moving torsion from the flow base's marginal, keep the rest.

For a torsion i chosen uniformly among the moving torsions, the new value t_i' is drawn from the
base's one-torsion marginal q_i (a von Mises mixture with a uniform floor,
:meth:`hopwell.flow.torsion.TorsionFlow.marginal_sample`). Given everything else this is an
independence proposal for t_i, and J (bonds and angles only) is unchanged, so::

    alpha = min(1, exp(-u(x') + u(x)) * q_i(t_i) / q_i(t_i'))

The choice of i is the same in both directions and cancels. Proposals are drawn and scored in
batches from the current state; after an acceptance the rest of the batch is dropped and drawn
again from the new state, so every accepted proposal was made from the state it replaces.

Where torsion row i is a rigid rotation (:func:`hopwell.coords.rotate.torsion_axes`), the
proposal turns the atoms beyond its bond by ``t_i' - t_i`` in Cartesian space instead of
rebuilding the molecule from internal coordinates: the rotation changes row i alone and keeps
every bond and angle, so it is the same proposal up to a rigid-body motion (which changes no
energy) and J is unchanged as before. Other rows are rebuilt from the Z-matrix.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import ZMatrix, cartesian_to_internal, internal_to_cartesian
from hopwell.coords.rotate import rigid_rows, rotate_torsions, torsion_axes
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


def tree_bonds(zmat: ZMatrix) -> list[tuple[int, int]]:
    """The Z-matrix's placement bonds (each atom to its bond reference): a spanning tree.

    For a bond outside every ring (a bridge of the molecular graph) the atoms on each side are
    the same in this tree as in the full bond graph, since a ring-closing bond joins atoms of
    one side; the moving torsions (:func:`hopwell.coords.torsions.moving_torsions`) turn such
    bonds only.
    """
    return [(int(zmat.order[r]), int(zmat.bond_ref[r])) for r in range(1, zmat.n_atoms)]


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
        zmat, moving = trainer.zmat, np.asarray(trainer.moving)
        bonds = tree_bonds(zmat)
        rigid = rigid_rows(zmat, bonds, moving)
        self.axes = torsion_axes(zmat, bonds, rigid)
        # Per moving column: its index into ``axes``, or -1 where the row is rebuilt.
        self.axis_of = np.array([int(np.flatnonzero(rigid == row)[0]) if row in rigid else -1
                                 for row in moving], dtype=np.int64)

    def _propose(self, position_nm: np.ndarray, index: np.ndarray, new: torch.Tensor,
                 current) -> np.ndarray:
        """Positions ``(n, n_atoms, 3)`` with moving column ``index[j]`` set to ``new[j]``."""
        rows = np.asarray(self.trainer.moving)[index]
        old = current.torsions_rad[0, rows].numpy()
        axis = self.axis_of[index]
        out = np.empty((len(index),) + position_nm.shape)
        turned = axis >= 0
        if turned.any():
            out[turned] = rotate_torsions(np.broadcast_to(position_nm, (int(turned.sum()),) + position_nm.shape),
                                          self.axes, axis[turned], new.numpy()[turned] - old[turned])
        if not turned.all():
            rebuilt = np.flatnonzero(~turned)
            torsions = current.torsions_rad.repeat(len(rebuilt), 1)
            torsions[torch.arange(len(rebuilt)), torch.as_tensor(rows[rebuilt])] = new[rebuilt]
            positions, _ = internal_to_cartesian(self.trainer.zmat, current.bonds_nm.repeat(len(rebuilt), 1),
                                                 current.angles_rad.repeat(len(rebuilt), 1), torsions)
            out[rebuilt] = positions.numpy()
        return out

    def _walker(self, walkers: Walkers, walker: int, streams: RandomStreams) -> bool:
        zmat, flow, kT = self.trainer.zmat, self.trainer.flow, self.evaluator.kT
        moving = torch.as_tensor(self.trainer.moving)
        remaining, moved = self.n, False
        while remaining > 0:
            with torch.no_grad():
                current = cartesian_to_internal(zmat, torch.as_tensor(walkers.positions_nm[walker:walker + 1]))
                index = torch.as_tensor(streams.numpy.integers(0, len(moving), remaining))
                new = flow.marginal_sample(index, streams.torch)
                old = current.torsions_rad[0, moving[index]]
                log_q_ratio = (flow.marginal_log_prob(index, old) - flow.marginal_log_prob(index, new)).numpy()
            positions = self._propose(walkers.positions_nm[walker], index.numpy(), new, current)
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
