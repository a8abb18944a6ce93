"""Torsion-space flow proposals: new principal torsions, everything else kept.

The sampler's non-local move draws the principal torsions about rotatable bonds at once from a
normalizing flow q on the torus, and keeps the walker's bonds, angles, ring torsions and
torsion offsets (so methyl hydrogens and branches turn rigidly with their principal torsion).
Given the kept coordinates r, this is an independence proposal for the torsions t, and the
Metropolis-Hastings ratio for the target p(t | r) ~ exp(-u(x(r, t))) J(r) is::

    alpha = min(1, exp(-u(x') + u(x)) * q(t) / q(t'))

J = prod r^2 sin(theta) depends on bonds and angles only, so it cancels exactly. The move leaves
p(t | r) invariant and hence the Boltzmann distribution (a Metropolis-within-Gibbs step). Whole
conformations (bonds and angles too) proposed independently were measured here to give zero
acceptance for n-butane after 40 training cycles: product densities over stiff coordinates put
most proposals many kT uphill.

Two choices raise the flow move's acceptance; both were measured offline on 7416 production
states of Ace-Ala-NMe in vacuum (flows fitted to the first 70% in time, acceptance of 32
proposals from each of 150 later states):

- Torsions about partial double bonds (amide C-N and the like, :func:`stiff_rows`) are left
  out of the flow and turned by the one-torsion moves and seed darts only; where a molecule
  has no other rotatable bond, the flow keeps them. Each amide torsion redrawn alone was
  accepted 55-59% of the time, and all four rotatable torsions from one flow 19%, against 30%
  for phi and psi alone: the acceptance of a joint independence proposal falls roughly as the
  product of its parts'.
- The flow is conditioned (zuko's ``context``) on the bond angles at its torsions' central
  atoms (:func:`context_angles`) and on the moving torsions it leaves out: it models
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

The flow is zuko's neural circular spline flow (circular rational-quadratic splines, Rezende
et al. 2020; Durkan et al. 2019) with its uniform base replaced by a physics-informed one: a
von Mises mixture per torsion placed on the observed torsion values plus a near-uniform floor
component (weight ``FLOOR_WEIGHT``) so that no angle has vanishing density. Everything runs in
float64 so that log q enters acceptance ratios exactly.
"""

from __future__ import annotations

import numpy as np
import torch
import zuko
from rdkit import Chem
from torch.distributions import Categorical, Independent, MixtureSameFamily, VonMises
from zuko.lazy import UnconditionalDistribution

from hopwell.flow.base import fit_von_mises_mixture
from hopwell.internal import ZMatrix

FLOOR_WEIGHT = 0.05
FLOOR_KAPPA = 1e-6  # von Mises with this concentration is uniform to within 1e-6 in density
N_COMPONENTS = 3
MAX_KAPPA = 25.0  # width 1/sqrt(kappa) >= 0.2 rad: a base wider than any torsion well


def moving_torsions(zmat: ZMatrix, mol: Chem.Mol) -> np.ndarray:
    """Indices of the torsion rows the flow proposes: proper principal torsions, acyclic bonds.

    A row qualifies when its torsion is a proper dihedral (its reference atom bonded to the
    angle reference, t-a-b-atom), it is principal (offsets follow it), the bond a-b is not in
    a ring, and every other neighbour of b is placed about the same bond a-b (so the move is a
    rigid rotation of b's substituents). Improper-style rows (reference bonded to b) place an atom around its own centre and
    behave like angles; moving them was measured to raise energies by hundreds of kJ/mol.

    Returns
    -------
    numpy.ndarray of int, shape ``(n_moving,)``
        Positions in the Z-matrix torsion array (row ``k`` places atom ``order[k + 3]``).
    """
    placed_about = {}  # atom -> (bond_ref, angle_ref) of its row; None for the first three
    for row, atom in enumerate(zmat.order):
        placed_about[int(atom)] = None if row < 3 else (int(zmat.bond_ref[row]), int(zmat.angle_ref[row]))
    rows = []
    for k in np.flatnonzero(zmat.is_principal):
        row = k + 3
        b, a, t = (int(zmat.bond_ref[row]), int(zmat.angle_ref[row]), int(zmat.torsion_ref[row]))
        proper = mol.GetBondBetweenAtoms(t, a) is not None
        # A rigid rotation about a-b turns every other neighbour of b with it; a neighbour
        # placed otherwise (one of the first three atoms) would be left behind, and the
        # "torsion" would bend the angles at b instead.
        rigid = all(placed_about[n.GetIdx()] == (b, a)
                    for n in mol.GetAtomWithIdx(b).GetNeighbors() if n.GetIdx() != a)
        if proper and rigid and not mol.GetBondBetweenAtoms(b, a).IsInRing():
            rows.append(int(k))
    return np.array(rows, dtype=int)


# Bonds with partial double-bond character (amide, thioamide, ester, carbamate, urea): the
# carbonyl-type carbon's single bond to N or O. Common practice: their rotation barriers
# (roughly 15-20 kcal/mol for amides, 10-13 for esters; values from memory) make them
# two-state switches rather than free rotors.
STIFF_BOND = Chem.MolFromSmarts("[CX3](=[OX1,SX1])-[#7,#8]")


def stiff_rows(zmat: ZMatrix, mol: Chem.Mol, rows: np.ndarray) -> np.ndarray:
    """Which torsion ``rows`` turn about a partial double bond (:data:`STIFF_BOND`), ``(len(rows),)``."""
    stiff = {frozenset(match[0::2]) for match in mol.GetSubstructMatches(STIFF_BOND)}
    return np.array([frozenset((int(zmat.bond_ref[k + 3]), int(zmat.angle_ref[k + 3]))) in stiff
                     for k in rows], dtype=bool)


def context_angles(zmat: ZMatrix, rows: np.ndarray) -> np.ndarray:
    """Bond angles a flow over torsion ``rows`` is conditioned on: those whose vertex is an atom
    of one of the rows' central bonds (the backbone angle N-CA-C of a peptide, for one).

    Returns
    -------
    numpy.ndarray of int
        Columns of the Z-matrix angle array (column ``j`` is placement row ``j + 2``).
    """
    central = {int(a) for k in rows for a in (zmat.bond_ref[k + 3], zmat.angle_ref[k + 3])}
    return np.array([r - 2 for r in range(2, zmat.n_atoms) if int(zmat.bond_ref[r]) in central], dtype=int)


def _seed_cpu(generator: torch.Generator) -> None:
    """Seed torch's global CPU generator (which zuko samples from) from ``generator``.

    Only the CPU generator: ``torch.manual_seed`` also seeds accelerator back-ends and costs
    about 1.4 ms a call, measured here as ~30% of a cycle for small molecules.
    """
    torch.default_generator.manual_seed(int(torch.randint(0, 2**62, (1,), generator=generator)))


def _mixture(loc: torch.Tensor, kappa: torch.Tensor, logits: torch.Tensor):
    return Independent(MixtureSameFamily(Categorical(logits=logits), VonMises(loc, kappa)), 1)


def _base_parameters(torsions_rad: np.ndarray) -> tuple[torch.Tensor, ...]:
    """Mixture parameters (loc, kappa, logits), each ``(n_moving, N_COMPONENTS + 1)``."""
    n = torsions_rad.shape[1]
    loc, kappa, weight = fit_von_mises_mixture(
        torsions_rad, N_COMPONENTS, np.full(n, FLOOR_WEIGHT), np.full(n, MAX_KAPPA)
    )
    loc = np.concatenate([loc, np.zeros((n, 1))], 1)
    kappa = np.concatenate([kappa, np.full((n, 1), FLOOR_KAPPA)], 1)
    weight = np.concatenate([weight, np.full((n, 1), FLOOR_WEIGHT)], 1)
    return tuple(torch.as_tensor(a, dtype=torch.float64) for a in (loc, kappa, np.log(weight)))


class TorsionFlow(torch.nn.Module):
    """Densities over ``n_moving`` torsions in ``[-pi, pi)``: one-torsion marginals and a flow.

    The base is a von Mises mixture per moving torsion (its marginals serve the one-torsion
    moves); the flow covers the columns ``flow_columns`` of them, optionally conditioned on kept
    coordinates: bond angles (:func:`context_angles`), which enter the networks standardized by
    the mean and spread of the last :meth:`refit_base` data, and torsions outside the flow,
    which enter as (cos, sin).

    Parameters
    ----------
    torsions_rad : numpy.ndarray, shape ``(n_samples, n_moving)``
        Observed torsions (the seeds) that place the base's mixture components.
    flow_columns : numpy.ndarray of int, optional
        The moving torsions the flow redraws (default: all).
    context_periodic : numpy.ndarray of bool, optional
        One entry per conditioning input, True for a torsion; None or empty for an
        unconditional flow.
    transforms, hidden, bins : int
        zuko NCSF settings.
    """

    def __init__(self, torsions_rad: np.ndarray, flow_columns: np.ndarray | None = None,
                 context_periodic: np.ndarray | None = None, transforms: int = 3, hidden: int = 64,
                 bins: int = 8):
        super().__init__()
        torsions_rad = np.atleast_2d(np.asarray(torsions_rad, dtype=float))
        if torsions_rad.shape[1] < 1:
            raise ValueError("a torsion flow needs at least one torsion")
        self.n_moving = torsions_rad.shape[1]
        columns = np.arange(self.n_moving) if flow_columns is None else np.asarray(flow_columns, dtype=int)
        if len(columns) < 1:
            raise ValueError("a torsion flow needs at least one torsion")
        self.register_buffer("flow_columns", torch.as_tensor(columns), persistent=False)
        self.register_buffer("other_columns", torch.as_tensor(np.setdiff1d(np.arange(self.n_moving), columns)),
                             persistent=False)
        periodic = torch.as_tensor(np.asarray([] if context_periodic is None else context_periodic, dtype=bool))
        self.register_buffer("context_lin", torch.nonzero(~periodic).flatten(), persistent=False)
        self.register_buffer("context_circ", torch.nonzero(periodic).flatten(), persistent=False)
        self.n_flow, self.n_context = len(columns), len(periodic)
        n_lin = len(self.context_lin)
        # Mixture parameters of the torsions outside the flow, and the context standardization:
        # checkpointed only where they exist, so that flows saved without them still load.
        n_other = len(self.other_columns)
        loc, kappa, logits = _base_parameters(torsions_rad)
        for name, value in zip(("other_loc", "other_kappa", "other_logits"), (loc, kappa, logits)):
            self.register_buffer(name, value[self.other_columns].clone(), persistent=n_other > 0)
        self.register_buffer("context_center", torch.zeros(n_lin, dtype=torch.float64), persistent=n_lin > 0)
        self.register_buffer("context_scale", torch.ones(n_lin, dtype=torch.float64), persistent=n_lin > 0)
        # Each zuko circular spline transform shifts the circle by pi before its spline, so an
        # even number of transforms with zeroed output layers is exactly the identity: the
        # untrained flow equals its physics base (measured: held-out log-likelihood -28 for an
        # odd, randomly initialized flow against -5.7 for its base on Ace-Ala-NMe torsions).
        transforms += transforms % 2
        self.flow = zuko.flows.NCSF(
            features=self.n_flow, context=n_lin + 2 * len(self.context_circ), transforms=transforms, bins=bins,
            hidden_features=(hidden, hidden),
        ).double()
        self.flow.base = UnconditionalDistribution(
            _mixture, *(a[self.flow_columns] for a in (loc, kappa, logits)), buffer=True)
        self.reset_transforms()

    def reset_transforms(self) -> None:
        """Set every spline to the identity (zero the hyper-networks' output layers)."""
        with torch.no_grad():
            for transform in self.flow.transform.transforms:
                # One feature and no context: zuko keeps the spline parameters themselves
                # (``phi``); otherwise the output layer of the autoregressive hyper-network.
                params = list(transform.phi) if hasattr(transform, "phi") else [
                    transform.hyper[-1].weight, transform.hyper[-1].bias]
                for param in params:
                    param.zero_()

    def _context(self, context: torch.Tensor | None, batch: int | None = None, noise: float = 0.0,
                 generator: torch.Generator | None = None) -> torch.Tensor | None:
        """Network input from raw context ``(..., n_context)``: standardized angles (plus Gaussian
        noise of spread ``noise``), then cos and sin of the torsions; expanded to ``batch`` rows
        when one set is shared. None for an unconditional flow."""
        if self.n_context == 0:
            return None
        if context is None:
            raise ValueError("this flow is conditional: pass its context")
        context = torch.as_tensor(context, dtype=torch.float64)
        lin = (context[..., self.context_lin] - self.context_center) / self.context_scale
        if noise > 0:
            lin = lin + noise * torch.randn(lin.shape, dtype=lin.dtype, generator=generator)
        circ = context[..., self.context_circ]
        z = torch.cat([lin, torch.cos(circ), torch.sin(circ)], -1)
        return z.expand(batch, -1) if batch is not None and z.dim() == 1 else z

    def base_log_prob(self, torsions_rad: torch.Tensor) -> torch.Tensor:
        """log density of the base alone over the flow's torsions, shape ``(batch,)``."""
        t = torch.remainder(torch.as_tensor(torsions_rad, dtype=torch.float64) + np.pi, 2 * np.pi) - np.pi
        return self.flow.base().log_prob(t)

    def refit_base(self, torsions_rad: np.ndarray, context: np.ndarray | None = None) -> None:
        """Move the mixtures onto new observations of all moving torsions ``(n, n_moving)``, and
        the standardization onto their context ``(n, n_context)`` (training phase only)."""
        loc, kappa, logits = _base_parameters(np.asarray(torsions_rad, dtype=float))
        for name, value in zip(("0", "1", "2"), (loc, kappa, logits)):
            getattr(self.flow.base, f"_{name}").copy_(value[self.flow_columns])
        for name, value in zip(("other_loc", "other_kappa", "other_logits"), (loc, kappa, logits)):
            getattr(self, name).copy_(value[self.other_columns])
        if len(self.context_lin) and context is not None:
            context = torch.as_tensor(context, dtype=torch.float64)[:, self.context_lin]
            self.context_center.copy_(context.mean(0))
            # A floor keeps a coordinate that has not moved yet from blowing up its input.
            self.context_scale.copy_(context.std(0, correction=0).clamp_min(1e-4))

    def log_prob(self, torsions_rad: torch.Tensor, context: torch.Tensor | None = None) -> torch.Tensor:
        """log q(t | context), shape ``(batch,)``, of the flow's torsions ``(batch, n_flow)``
        (wrapped first) given ``(batch, n_context)`` or one ``(n_context,)`` for all."""
        t = torch.remainder(torch.as_tensor(torsions_rad, dtype=torch.float64) + np.pi, 2 * np.pi) - np.pi
        return self.flow(self._context(context, len(t))).log_prob(t)

    def sample(self, n: int, context: torch.Tensor | None = None,
               generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """Draw ``n`` vectors of the flow's torsions given one context ``(n_context,)``, with
        their log q: shapes ``(n, n_flow)``, ``(n,)``."""
        with torch.no_grad():
            context = self._context(context)
            if generator is not None:
                state = torch.get_rng_state()
                _seed_cpu(generator)
            try:
                t, log_q = self.flow(context).rsample_and_log_prob((n,))
            finally:
                if generator is not None:
                    torch.set_rng_state(state)
        t = torch.remainder(t + np.pi, 2 * np.pi) - np.pi
        return t, log_q

    def _marginal(self) -> tuple[torch.Tensor, ...]:
        """The mixtures' (loc, kappa, logits) of every moving torsion, each ``(n_moving, n_components)``."""
        base = self.flow.base
        out = []
        for flow_part, other_part in ((base._0, self.other_loc), (base._1, self.other_kappa),
                                      (base._2, self.other_logits)):
            full = torch.empty(self.n_moving, flow_part.shape[1], dtype=torch.float64)
            full[self.flow_columns], full[self.other_columns] = flow_part, other_part
            out.append(full)
        return tuple(out)

    def marginal_log_prob(self, index: torch.Tensor, torsions_rad: torch.Tensor) -> torch.Tensor:
        """log of the base's one-torsion marginal q_i(t), for torsions ``index`` (shape ``(n,)``)."""
        loc, kappa, logits = (a[index] for a in self._marginal())
        return _mixture(loc, kappa, logits).base_dist.log_prob(torch.as_tensor(torsions_rad, dtype=torch.float64))

    def marginal_sample(self, index: torch.Tensor, generator: torch.Generator | None = None) -> torch.Tensor:
        """One draw from the base's marginal of each torsion in ``index`` (shape ``(n,)``)."""
        loc, kappa, logits = (a[index] for a in self._marginal())
        pick = torch.multinomial(torch.softmax(logits, -1), 1, generator=generator)[:, 0]
        rows = torch.arange(len(index))
        mixture = _mixture(loc[rows, pick][:, None], kappa[rows, pick][:, None],
                           torch.zeros(len(index), 1, dtype=torch.float64))
        if generator is not None:
            state = torch.get_rng_state()
            _seed_cpu(generator)
        try:
            value = mixture.sample()
        finally:
            if generator is not None:
                torch.set_rng_state(state)
        return torch.remainder(value + np.pi, 2 * np.pi) - np.pi

    def fit_step(self, optimizer: torch.optim.Optimizer, torsions_rad: torch.Tensor,
                 context: torch.Tensor | None = None, context_noise: float = 0.0,
                 generator: torch.Generator | None = None) -> float:
        """One maximum-likelihood step on a batch; returns the mean negative log-likelihood.

        ``context_noise`` adds Gaussian noise of that spread (in standardized units) to the
        context angles, a regularizer against fitting the noise of correlated training frames.
        """
        t = torch.remainder(torch.as_tensor(torsions_rad, dtype=torch.float64) + np.pi, 2 * np.pi) - np.pi
        z = self._context(context, noise=context_noise, generator=generator)
        loss = -self.flow(z).log_prob(t).mean()
        optimizer.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(self.parameters(), 10.0)
        optimizer.step()
        return float(loss.detach())
