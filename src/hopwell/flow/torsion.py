"""The torsion flow: a trainable density over the torsions the non-local moves redraw.

:class:`TorsionFlow` is zuko's neural circular spline flow (circular rational-quadratic splines,
Rezende et al. 2020; Durkan et al. 2019) with its uniform base replaced by a physics-informed
one: a von Mises mixture per torsion placed on the observed torsion values plus a near-uniform
floor component (weight ``FLOOR_WEIGHT``) so that no angle has vanishing density. The base's
one-torsion marginals serve the one-torsion moves (:mod:`hopwell.moves.one_torsion`), the flow
the flow block (:mod:`hopwell.moves.flow_block`, whose docstring gives the measured reasons for
which torsions it covers and what it is conditioned on). Everything runs in float64 so that
log q enters acceptance ratios exactly.
"""

from __future__ import annotations

import numpy as np
import torch
import zuko
from scipy.special import i0e, logsumexp
from torch.distributions import Categorical, Independent, MixtureSameFamily, VonMises
from zuko.lazy import UnconditionalDistribution

from hopwell.flow.von_mises import fit_von_mises_mixture

FLOOR_WEIGHT = 0.05
FLOOR_KAPPA = 1e-6  # von Mises with this concentration is uniform to within 1e-6 in density
N_COMPONENTS = 3
MAX_KAPPA = 25.0  # width 1/sqrt(kappa) >= 0.2 rad: a base wider than any torsion well


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
        contexts = None if context is None else torch.as_tensor(context, dtype=torch.float64)[None]
        t, log_q = self.sample_each(n, contexts, 1, generator)
        return t[0], log_q[0]

    def sample_each(self, n: int, contexts: torch.Tensor | None, n_contexts: int,
                    generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """Draw ``n`` vectors for each of ``n_contexts`` contexts ``(n_contexts, n_context)`` in
        one pass through the networks, with their log q: shapes ``(n_contexts, n, n_flow)``,
        ``(n_contexts, n)``. ``contexts`` may be None (or have no columns) for an unconditional
        flow."""
        with torch.no_grad():
            z = None if self.n_context == 0 else self._context(contexts)
            if generator is not None:
                state = torch.get_rng_state()
                _seed_cpu(generator)
            try:
                if z is None:
                    t, log_q = self.flow(None).rsample_and_log_prob((n_contexts, n))
                else:  # batch shape (n_contexts,): draws come as (n, n_contexts, ...)
                    t, log_q = self.flow(z).rsample_and_log_prob((n,))
                    t, log_q = t.transpose(0, 1), log_q.transpose(0, 1)
            finally:
                if generator is not None:
                    torch.set_rng_state(state)
        t = torch.remainder(t + np.pi, 2 * np.pi) - np.pi
        return t, log_q

    def _marginal(self) -> tuple[np.ndarray, ...]:
        """The mixtures' (loc, kappa, log weights) of every moving torsion, each
        ``(n_moving, n_components)``, as numpy arrays (the one-torsion moves work in numpy)."""
        base = self.flow.base
        out = []
        for flow_part, other_part in ((base._0, self.other_loc), (base._1, self.other_kappa),
                                      (base._2, self.other_logits)):
            full = np.empty((self.n_moving, flow_part.shape[1]))
            full[self.flow_columns.numpy()] = flow_part.detach().numpy()
            full[self.other_columns.numpy()] = other_part.detach().numpy()
            out.append(full)
        loc, kappa, logits = out
        return loc, kappa, logits - logsumexp(logits, axis=1, keepdims=True)

    def marginal_log_prob(self, index, torsions_rad) -> np.ndarray:
        """log of the base's one-torsion marginal q_i(t), for torsions ``index`` (shape ``(n,)``).

        The von Mises density exp(kappa cos(t - loc)) / (2 pi I0(kappa)) written with the scaled
        Bessel function i0e(kappa) = exp(-kappa) I0(kappa), stable for every kappa.
        """
        loc, kappa, log_w = (a[np.asarray(index)] for a in self._marginal())
        t = np.asarray(torsions_rad, dtype=float)[:, None]
        log_pdf = kappa * (np.cos(t - loc) - 1.0) - np.log(2 * np.pi * i0e(kappa))
        return logsumexp(log_w + log_pdf, axis=1)

    def marginal_sample(self, index, rng: np.random.Generator) -> np.ndarray:
        """One draw from the base's marginal of each torsion in ``index`` (shape ``(n,)``):
        a component by its weight, then numpy's von Mises sampler (vectorized, in C)."""
        loc, kappa, log_w = (a[np.asarray(index)] for a in self._marginal())
        cumulative = np.cumsum(np.exp(log_w), axis=1)
        pick = np.minimum((cumulative < rng.random(len(loc))[:, None] * cumulative[:, -1:]).sum(1),
                          loc.shape[1] - 1)
        rows = np.arange(len(loc))
        value = rng.vonmises(loc[rows, pick], kappa[rows, pick])
        return np.remainder(value + np.pi, 2 * np.pi) - np.pi

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
