"""One-torsion moves: redraw one moving torsion from the flow base's marginal, keep the rest.

For a torsion i chosen uniformly among the moving torsions, the new value t_i' is drawn from the
base's one-torsion marginal q_i (a von Mises mixture with a uniform floor,
:meth:`hopwell.flow.torsion.TorsionFlow.marginal_sample`). Given everything else this is an
independence proposal for t_i, and J (bonds and angles only) is unchanged, so::

    alpha = min(1, exp(-u(x') + u(x)) * q_i(t_i) / q_i(t_i'))

The choice of i is the same in both directions and cancels. Proposals are drawn and scored in
batches from the current state; after an acceptance the rest of the batch is dropped and drawn
again from the new state, so every accepted proposal was made from the state it replaces. The
batches of all walkers are drawn, guarded and scored together (one guard call and one energy
loop per round); each walker's proposals depend on its own state only.

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
from hopwell.moves.base import MoveCounters, MoveResult, RandomStreams, Walkers, guarded_energies
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

    def _propose(self, positions_nm: np.ndarray, current, owner: np.ndarray, index: np.ndarray,
                 new: np.ndarray) -> np.ndarray:
        """Positions ``(n, n_atoms, 3)``: proposal ``j`` sets moving column ``index[j]`` of the
        state ``owner[j]`` (of ``positions_nm`` and its internal coordinates ``current``) to
        ``new[j]``."""
        rows = np.asarray(self.trainer.moving)[index]
        old = current.torsions_rad.numpy()[owner, rows]
        axis = self.axis_of[index]
        out = np.empty((len(index),) + positions_nm.shape[1:])
        turned = axis >= 0
        if turned.any():
            out[turned] = rotate_torsions(positions_nm[owner[turned]], self.axes, axis[turned],
                                          new[turned] - old[turned])
        if not turned.all():
            rebuilt = np.flatnonzero(~turned)
            from_state = torch.as_tensor(owner[rebuilt])
            torsions = current.torsions_rad[from_state]
            torsions[torch.arange(len(rebuilt)), torch.as_tensor(rows[rebuilt])] = torch.as_tensor(new[rebuilt])
            positions, _ = internal_to_cartesian(self.trainer.zmat, current.bonds_nm[from_state],
                                                 current.angles_rad[from_state], torsions)
            out[rebuilt] = positions.numpy()
        return out

    def _draw(self, positions_nm: np.ndarray, current, owner: np.ndarray,
              rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Proposals from the states ``owner`` and their ``log q(t) - log q(t')``: one column each."""
        flow, moving = self.trainer.flow, np.asarray(self.trainer.moving)
        index = rng.integers(0, len(moving), len(owner))
        new = flow.marginal_sample(index, rng)
        old = current.torsions_rad.numpy()[owner, moving[index]]
        log_q_ratio = flow.marginal_log_prob(index, old) - flow.marginal_log_prob(index, new)
        return self._propose(positions_nm, current, owner, index, new), log_q_ratio

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        """Each walker in ``which`` gets its proposals; all walkers' current batches are drawn,
        guarded and scored together, then tried walker by walker."""
        which = np.asarray(which, dtype=np.int64)
        kT = self.evaluator.kT
        remaining = np.full(len(which), self.n)
        moved = np.zeros(len(which), dtype=bool)
        while (active := np.flatnonzero(remaining > 0)).size:
            walker_ids = which[active]
            positions_nm = walkers.positions_nm[walker_ids]
            with torch.no_grad():
                current = cartesian_to_internal(self.trainer.zmat, torch.as_tensor(positions_nm))
            counts = remaining[active]
            owner = np.repeat(np.arange(len(active)), counts)
            bounds = np.concatenate([[0], np.cumsum(counts)])
            proposed, log_q_ratio = self._draw(positions_nm, current, owner, streams.numpy)
            energy, mask = guarded_energies(self.guard, self.evaluator, proposed)
            log_u = np.log(streams.numpy.random(len(owner)))
            log_alpha = -(energy - walkers.energies_kj[walker_ids][owner]) / kT + log_q_ratio
            hit = np.isfinite(energy) & (log_u < log_alpha)
            clash, stereo = np.asarray(mask.clash), np.asarray(mask.stereo)
            for j, (slot, walker) in enumerate(zip(active, walker_ids)):
                part = slice(bounds[j], bounds[j + 1])
                hits = np.flatnonzero(hit[part])
                used = int(hits[0]) + 1 if len(hits) else int(counts[j])
                self.counters.proposed += used
                self.counters.clash += int(clash[part][:used].sum())
                self.counters.stereo += int(stereo[part][:used].sum())
                if len(hits):
                    self.counters.accepted += 1
                    first = bounds[j] + hits[0]
                    walkers.set(int(walker), proposed[first], energy[first])
                    moved[slot] = True
                remaining[slot] -= used
        return MoveResult(moved)

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = MoveCounters.from_json(state.get(self.name, {}))
