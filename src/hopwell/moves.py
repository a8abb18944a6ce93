"""Torsion-space flow proposals: new principal torsions, everything else kept.

The sampler's non-local move draws all principal torsions about acyclic bonds at once from a
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
    """Flow density over ``n_moving`` torsions in ``[-pi, pi)``.

    Parameters
    ----------
    torsions_rad : numpy.ndarray, shape ``(n_samples, n_moving)``
        Observed torsions (the seeds) that place the base's mixture components.
    transforms, hidden, bins : int
        zuko NCSF settings.
    """

    def __init__(self, torsions_rad: np.ndarray, transforms: int = 3, hidden: int = 64, bins: int = 8):
        super().__init__()
        torsions_rad = np.atleast_2d(np.asarray(torsions_rad, dtype=float))
        if torsions_rad.shape[1] < 1:
            raise ValueError("a torsion flow needs at least one torsion")
        self.n_moving = torsions_rad.shape[1]
        # Each zuko circular spline transform shifts the circle by pi before its spline, so an
        # even number of transforms with zeroed output layers is exactly the identity: the
        # untrained flow equals its physics base (measured: held-out log-likelihood -28 for an
        # odd, randomly initialized flow against -5.7 for its base on Ace-Ala-NMe torsions).
        transforms += transforms % 2
        self.flow = zuko.flows.NCSF(
            features=self.n_moving, transforms=transforms, bins=bins, hidden_features=(hidden, hidden)
        ).double()
        self.flow.base = UnconditionalDistribution(_mixture, *_base_parameters(torsions_rad), buffer=True)
        self.reset_transforms()

    def reset_transforms(self) -> None:
        """Set every spline to the identity (zero the hyper-networks' output layers)."""
        with torch.no_grad():
            for transform in self.flow.transform.transforms:
                # One feature: zuko keeps the spline parameters themselves (``phi``); more
                # features: the output layer of the autoregressive hyper-network.
                params = list(transform.phi) if hasattr(transform, "phi") else [
                    transform.hyper[-1].weight, transform.hyper[-1].bias]
                for param in params:
                    param.zero_()

    def base_log_prob(self, torsions_rad: torch.Tensor) -> torch.Tensor:
        """log density of the base alone, shape ``(batch,)``."""
        t = torch.remainder(torch.as_tensor(torsions_rad, dtype=torch.float64) + np.pi, 2 * np.pi) - np.pi
        return self.flow.base().log_prob(t)

    def refit_base(self, torsions_rad: np.ndarray) -> None:
        """Move the base mixture onto new observations (training phase only)."""
        for name, value in zip(("0", "1", "2"), _base_parameters(np.asarray(torsions_rad, dtype=float))):
            getattr(self.flow.base, f"_{name}").copy_(value)

    def log_prob(self, torsions_rad: torch.Tensor) -> torch.Tensor:
        """log q, shape ``(batch,)``, of torsions shape ``(batch, n_moving)`` (wrapped first)."""
        t = torch.remainder(torch.as_tensor(torsions_rad, dtype=torch.float64) + np.pi, 2 * np.pi) - np.pi
        return self.flow().log_prob(t)

    def sample(self, n: int, generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """Draw ``n`` torsion vectors and their log q: shapes ``(n, n_moving)``, ``(n,)``."""
        with torch.no_grad():
            if generator is not None:
                state = torch.get_rng_state()
                _seed_cpu(generator)
            try:
                t, log_q = self.flow().rsample_and_log_prob((n,))
            finally:
                if generator is not None:
                    torch.set_rng_state(state)
        t = torch.remainder(t + np.pi, 2 * np.pi) - np.pi
        return t, log_q

    def _marginal(self) -> tuple[torch.Tensor, ...]:
        """The base mixture's (loc, kappa, logits), each ``(n_moving, n_components)``."""
        base = self.flow.base
        return base._0, base._1, base._2

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

    def fit_step(self, optimizer: torch.optim.Optimizer, torsions_rad: torch.Tensor) -> float:
        """One maximum-likelihood step on a batch; returns the mean negative log-likelihood."""
        loss = -self.log_prob(torsions_rad).mean()
        optimizer.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(self.parameters(), 10.0)
        optimizer.step()
        return float(loss.detach())
