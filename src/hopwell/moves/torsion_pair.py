"""Torsion-pair moves: redraw two neighbouring moving torsions together from the base's marginals.

A one-torsion move (:mod:`hopwell.moves.one_torsion`) cannot make a change that needs two
torsions to turn at once, such as the two bonds about an ether oxygen or either side of an
amide, when each half alone clashes or costs too much. This move redraws a block of two.

The block: a moving torsion i chosen uniformly among the n moving torsions, then a partner j
chosen uniformly among i's neighbours, the moving torsions whose bonds share an atom with i's
(a torsion without neighbours is redrawn alone). The probability of choosing the block {i, j},
``(1/n)(1/deg i + 1/deg j)``, does not depend on the state, so it is the same in both
directions and cancels. The new values are drawn independently from the base's marginals q_i
and q_j (von Mises mixtures with a uniform floor), an independence proposal for the block given
everything else, with J (bonds and angles only) unchanged::

    alpha = min(1, exp(-u(x') + u(x)) * q_i(t_i) q_j(t_j) / (q_i(t_i') q_j(t_j')))

The positions are made as the one-torsion move makes them, once per torsion: the second torsion
is set on the structure the first made (a rigid rotation changes its own torsion row alone, so
the second torsion's old value is the state's). Batching, guards and counters are the one-torsion
move's; the counters are checkpointed under ``pair``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from hopwell.coords.internal import ZMatrix, cartesian_to_internal
from hopwell.moves.one_torsion import OneTorsion


@dataclass
class TorsionPairSettings:
    """Settings of the torsion-pair move.

    Attributes
    ----------
    pair_moves_per_cycle : int
        Pair proposals per walker per cycle (0: the move is off).
    """

    pair_moves_per_cycle: int = 0


def bond_neighbours(zmat: ZMatrix, moving: np.ndarray) -> list[np.ndarray]:
    """For each moving column, the other moving columns whose rotation bonds share an atom with its own.

    Column c turns the bond between ``angle_ref`` and ``bond_ref`` of Z-matrix row ``moving[c] + 3``
    (:func:`hopwell.coords.torsions.moving_torsions`).
    """
    rows = np.asarray(moving, dtype=np.int64) + 3
    bonds = [{int(zmat.angle_ref[r]), int(zmat.bond_ref[r])} for r in rows]
    return [np.array([d for d, other in enumerate(bonds) if d != c and bond & other], dtype=np.int64)
            for c, bond in enumerate(bonds)]


class TorsionPair(OneTorsion):
    """The torsion-pair move (see the module docstring); parameters as :class:`OneTorsion`."""

    name = "pair"

    def __init__(self, trainer, guard, evaluator, proposals: int):
        super().__init__(trainer, guard, evaluator, proposals)
        self.neighbours = bond_neighbours(trainer.zmat, trainer.moving)
        self.degree = np.array([len(n) for n in self.neighbours], dtype=np.int64)

    def _draw(self, positions_nm: np.ndarray, current, owner: np.ndarray,
              rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        flow, moving = self.trainer.flow, np.asarray(self.trainer.moving)
        first = rng.integers(0, len(moving), len(owner))
        paired = self.degree[first] > 0
        pick = np.floor(rng.random(len(owner)) * np.maximum(self.degree[first], 1)).astype(np.int64)
        second = np.array([self.neighbours[i][k] if p else i for i, k, p in zip(first, pick, paired)],
                          dtype=np.int64)
        new_first, new_second = flow.marginal_sample(first, rng), flow.marginal_sample(second, rng)
        torsions = current.torsions_rad.numpy()[owner]
        old_first, old_second = torsions[np.arange(len(owner)), moving[first]], torsions[np.arange(len(owner)), moving[second]]
        log_q_ratio = flow.marginal_log_prob(first, old_first) - flow.marginal_log_prob(first, new_first)
        log_q_ratio = log_q_ratio + np.where(
            paired, flow.marginal_log_prob(second, old_second) - flow.marginal_log_prob(second, new_second), 0.0)
        proposed = self._propose(positions_nm, current, owner, first, new_first)
        if paired.any():
            both = np.flatnonzero(paired)
            with torch.no_grad():
                after_first = cartesian_to_internal(self.trainer.zmat, torch.as_tensor(proposed[both]))
            proposed[both] = self._propose(proposed[both], after_first, np.arange(len(both)), second[both],
                                           new_second[both])
        return proposed, log_q_ratio
