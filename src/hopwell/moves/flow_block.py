"""The flow block: K independent flow proposals per walker, new torsions, everything else kept.

The non-local move draws the principal torsions about rotatable bonds at once from a
normalizing flow q on the torus, and keeps the walker's bonds, angles, ring torsions and
torsion offsets (so methyl hydrogens and branches turn rigidly with their principal torsion).
Given the kept coordinates r (and the flow's context c, a part of r), this is an independence
proposal for the torsions t, and the Metropolis-Hastings ratio for the target
p(t | r) ~ exp(-u(x(r, t))) J(r) is::

    alpha = min(1, exp(-u(x') + u(x)) * q(t | c) / q(t' | c))

J = prod r^2 sin(theta) depends on bonds and angles only, so it cancels exactly. The move leaves
p(t | r) invariant and hence the Boltzmann distribution (a Metropolis-within-Gibbs step). Whole
conformations (bonds and angles too) proposed independently were measured here to give zero
acceptance for n-butane after 40 training cycles: product densities over stiff coordinates put
most proposals many kT uphill.

Two choices raise the flow move's acceptance; both were measured offline on 7416 production
states of Ace-Ala-NMe in vacuum (flows fitted to the first 70% in time, acceptance of 32
proposals from each of 150 later states):

- Torsions about partial double bonds (amide C-N and the like, :func:`hopwell.coords.torsions.stiff_rows`) are left
  out of the flow and turned by the one-torsion moves and seed darts only; where a molecule
  has no other rotatable bond, the flow keeps them. Each amide torsion redrawn alone was
  accepted 55-59% of the time, and all four rotatable torsions from one flow 19%, against 30%
  for phi and psi alone: the acceptance of a joint independence proposal falls roughly as the
  product of its parts'.
- The flow is conditioned (zuko's ``context``) on the bond angles at its torsions' central
  atoms (:func:`hopwell.coords.torsions.context_angles`) and on the moving torsions it leaves out: it models
  p(t | c), not the marginal p(t). Backbone angles differ between basins; they raised phi-psi
  acceptance from 30% to 37%. All kept coordinates as context (56 inputs) overfitted
  (held-out log-likelihood -4.7 against -0.46 unconditional), so the networks see the few
  angles, with Gaussian noise added to them during training. The left-out torsions enter as
  (cos, sin), because an amide's cis/trans state changes which positions of its neighbours
  clash. Measured on the demo molecule (N-benzyl-N-methylacetamide, 4-minute demo runs): with
  the angles alone as context, the side-chain proposals were accepted 6-9% of the time and
  then 0 times in the last 150 of 1000 cycles (65-70% clashed, the rest a median 800-1100
  kJ/mol uphill); with the amide torsion added, 6.8% over the production phase, still with
  stretches of zero. The context is the same in x and x', so q(t | c) enters the ratio exactly
  as above.

The K proposals of one block are drawn from the walker's state at the block's start and tried
in turn as a chain of independence steps (a step after an acceptance compares with the new
state's q and u). All walkers' blocks are drawn together (one pass through the flow's
networks, one rebuild, one guard call and one energy loop), which changes nothing in the
ratio: each walker's proposals depend on its own state only, and the walkers move
independently. Proposals flagged by the
clash or stereo guard (:class:`hopwell.coords.guards.ProposalGuard`) have target density zero:
rejected, and never sent to OpenMM.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import cartesian_to_internal, internal_to_cartesian
from hopwell.flow.training import FlowTrainer
from hopwell.moves.base import (
    REJECT_CLASH,
    REJECT_NONE,
    REJECT_STEREO,
    MoveCounters,
    MoveResult,
    RandomStreams,
    Walkers,
)
from hopwell.systems.energy import EnergyEvaluator


@dataclass
class FlowBlockSettings:
    """Settings of the flow block.

    Attributes
    ----------
    proposals_per_cycle : int
        Flow proposals (all the flow's torsions at once) per walker per cycle.
    """

    proposals_per_cycle: int = 32


class FlowBlock:
    """The flow block move (see the module docstring).

    Parameters
    ----------
    trainer : FlowTrainer
        The flow and the columns it covers.
    guard : ProposalGuard
    evaluator : EnergyEvaluator
    proposals : int
        K, proposals per walker per application.

    Attributes
    ----------
    production : bool
        Set by the scheduler once the flow is frozen: counts go to the production counters
        and the proposal records are handed back for the store.
    """

    name = "flow"

    def __init__(self, trainer: FlowTrainer, guard: ProposalGuard, evaluator: EnergyEvaluator, proposals: int):
        self.trainer, self.guard, self.evaluator, self.k = trainer, guard, evaluator, int(proposals)
        self.counters = {"training": MoveCounters(), "production": MoveCounters()}
        self.production = False

    def _draw(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams):
        """Every walker's K proposals in one flow pass, one rebuild, one guard call and one
        energy loop: positions ``(W, K, n_atoms, 3)``, log q ``(W, K)``, log J ``(W, K)``, log q
        of the current states ``(W,)``, energies ``(W, K)`` and rejection causes ``(W, K)``."""
        k, trainer = self.k, self.trainer
        zmat, rows, n = trainer.zmat, trainer.flow_rows, len(which)
        with torch.no_grad():
            current = cartesian_to_internal(zmat, torch.as_tensor(walkers.positions_nm[which]))
            context = trainer.conditioning(current)
            t_new, log_q_new = trainer.flow.sample_each(k, context, n, streams.torch)
            torsions = current.torsions_rad.repeat_interleave(k, 0)
            torsions[:, rows] = t_new.reshape(n * k, -1)
            pos_new, log_j_new = internal_to_cartesian(
                zmat, current.bonds_nm.repeat_interleave(k, 0), current.angles_rad.repeat_interleave(k, 0), torsions)
            log_q_cur = trainer.flow.log_prob(current.torsions_rad[:, rows], context).numpy()
        pos_new = pos_new.numpy()
        mask = self.guard(pos_new)
        rejected_by = np.where(mask.clash, REJECT_CLASH, np.where(mask.stereo, REJECT_STEREO, REJECT_NONE))
        energy = np.full(n * k, np.nan)
        ok = rejected_by == REJECT_NONE
        if ok.any():
            energy[ok] = self.evaluator.energies_kj(pos_new[ok])
        rejected_by[ok & ~np.isfinite(energy)] = REJECT_CLASH
        shape = (n, k)
        return (pos_new.reshape(shape + pos_new.shape[1:]), log_q_new.numpy(), log_j_new.numpy().reshape(shape),
                log_q_cur, energy.reshape(shape), rejected_by.reshape(shape))

    def _chain(self, walkers: Walkers, walker: int, positions_nm: np.ndarray, log_q_new: np.ndarray,
               log_q_cur: float, energy: np.ndarray, rejected_by: np.ndarray, streams: RandomStreams) -> np.ndarray:
        """One walker's K proposals tried in turn as independence steps; the accepted flags."""
        kT = self.evaluator.kT
        accepted = np.zeros(self.k, dtype=bool)
        u_cur = walkers.energies_kj[walker] / kT
        log_u = np.log(streams.numpy.random(self.k))
        for i in np.flatnonzero(rejected_by == REJECT_NONE):
            # J(q') = J(q): bonds and angles are kept.
            log_alpha = -(energy[i] / kT - u_cur) + (log_q_cur - log_q_new[i])
            if log_u[i] < log_alpha:
                accepted[i] = True
                u_cur, log_q_cur = energy[i] / kT, log_q_new[i]
                walkers.set(walker, positions_nm[i], energy[i])
        counters = self.counters["production" if self.production else "training"]
        counters.proposed += self.k
        counters.accepted += int(accepted.sum())
        counters.clash += int((rejected_by == REJECT_CLASH).sum())
        counters.stereo += int((rejected_by == REJECT_STEREO).sum())
        counters.recent.append((int(accepted.sum()), self.k))
        return accepted

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        which = np.asarray(which, dtype=np.int64)
        if len(which) == 0:
            return MoveResult(np.zeros(0, dtype=bool), proposals=None)
        positions, log_q_new, log_j_new, log_q_cur, energy, rejected_by = self._draw(walkers, which, streams)
        accepted = np.stack([self._chain(walkers, int(w), positions[j], log_q_new[j], float(log_q_cur[j]),
                                         energy[j], rejected_by[j], streams) for j, w in enumerate(which)])
        proposals = None
        if self.production:
            proposals = {
                "positions_nm": positions.reshape((-1,) + positions.shape[2:]).astype(np.float32),
                "energy_kj": energy.ravel(), "log_q": log_q_new.ravel(), "log_jacobian": log_j_new.ravel(),
                "walker": np.repeat(which, self.k).astype(np.int32), "accepted": accepted.ravel(),
                "rejected_by": rejected_by.ravel().astype(np.int8),
            }
        return MoveResult(accepted.any(axis=1), proposals=proposals)

    def state_dict(self) -> dict:
        return {name: c.to_json() for name, c in self.counters.items()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = {name: MoveCounters.from_json(state.get(name, {})) for name in self.counters}
