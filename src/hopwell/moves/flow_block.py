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
state's q and u), one guard call and one energy loop for the block. Proposals flagged by the
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

    def _block(self, walkers: Walkers, walker: int, streams: RandomStreams) -> dict:
        k, kT, trainer = self.k, self.evaluator.kT, self.trainer
        zmat = trainer.zmat
        with torch.no_grad():
            current = cartesian_to_internal(zmat, torch.as_tensor(walkers.positions_nm[walker:walker + 1]))
            context = trainer.conditioning(current)[0]
            rows = trainer.flow_rows
            t_new, log_q_new = trainer.flow.sample(k, context, streams.torch)
            torsions = current.torsions_rad.repeat(k, 1)
            torsions[:, rows] = t_new
            pos_new, log_j_new = internal_to_cartesian(
                zmat, current.bonds_nm.repeat(k, 1), current.angles_rad.repeat(k, 1), torsions)
            log_q_cur = float(trainer.flow.log_prob(current.torsions_rad[:, rows], context)[0])
        pos_new = pos_new.numpy()
        log_q_new, log_j_new = log_q_new.numpy(), log_j_new.numpy()
        mask = self.guard(pos_new)
        rejected_by = np.where(mask.clash, REJECT_CLASH, np.where(mask.stereo, REJECT_STEREO, REJECT_NONE))
        energy = np.full(k, np.nan)
        ok = rejected_by == REJECT_NONE
        if ok.any():
            energy[ok] = self.evaluator.energies_kj(pos_new[ok])
        rejected_by[ok & ~np.isfinite(energy)] = REJECT_CLASH
        accepted = np.zeros(k, dtype=bool)
        u_cur = walkers.energies_kj[walker] / kT
        log_u = np.log(streams.numpy.random(k))
        for i in np.flatnonzero(rejected_by == REJECT_NONE):
            # J(q') = J(q): bonds and angles are kept.
            log_alpha = -(energy[i] / kT - u_cur) + (log_q_cur - log_q_new[i])
            if log_u[i] < log_alpha:
                accepted[i] = True
                u_cur, log_q_cur = energy[i] / kT, log_q_new[i]
                walkers.set(walker, pos_new[i], energy[i])
        counters = self.counters["production" if self.production else "training"]
        counters.proposed += k
        counters.accepted += int(accepted.sum())
        counters.clash += int((rejected_by == REJECT_CLASH).sum())
        counters.stereo += int((rejected_by == REJECT_STEREO).sum())
        counters.recent.append((int(accepted.sum()), k))
        return {
            "positions_nm": pos_new.astype(np.float32), "energy_kj": energy, "log_q": log_q_new,
            "log_jacobian": log_j_new, "walker": np.full(k, walker, np.int32), "accepted": accepted,
            "rejected_by": rejected_by.astype(np.int8),
        }

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        blocks = [self._block(walkers, int(w), streams) for w in which]
        accepted = np.array([bool(b["accepted"].any()) for b in blocks])
        proposals = ({key: np.concatenate([b[key] for b in blocks]) for key in blocks[0]}
                     if self.production and blocks else None)
        return MoveResult(accepted, proposals=proposals)

    def state_dict(self) -> dict:
        return {name: c.to_json() for name, c in self.counters.items()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = {name: MoveCounters.from_json(state.get(name, {})) for name in self.counters}
