"""hopwell's conformer flow: spline coupling layers over internal coordinates.

The flow ``T`` maps a feature vector ``x = [bonds_nm | angles_rad | torsions_rad]`` (see
:mod:`hopwell.flow.base`) to the base variable ``u = T(x)``, so that
``log q(x) = log p_base(T(x)) + log |det dT/dx|``. ``T`` is a stack of coupling layers (Dinh et
al., "Density estimation using Real NVP", ICLR 2017): each transforms one set of features
elementwise, with spline parameters computed by a network from the other features. Torsions
get circular rational-quadratic splines (Rezende et al., "Normalizing flows on tori and
spheres", ICML 2020); bonds and angles monotonic rational-quadratic splines (Durkan et al.,
"Neural spline flows", NeurIPS 2019) on a standardized variable. Everything, networks included,
runs in float64, so that log-densities used in acceptance ratios are float64 throughout.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np
import torch
from zuko.transforms import MonotonicRQSTransform

from hopwell.flow.base import InternalBase, unpack, wrap
from hopwell.internal import ZMatrix, internal_to_cartesian

SPLINE_BOUND = 5.0  # bonds/angles: spline on [-5, 5] standardized units, identity outside
MIN_SLOPE = 1e-3  # smallest and (inverse) largest spline derivative
MAX_GRAD_NORM = 10.0

EnergyFn = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


class _CircularSpline(MonotonicRQSTransform):
    """Rational-quadratic spline on [-pi, pi] with knots fixed at -pi and pi and one shared
    derivative at both ends (the boundary condition of Rezende et al. 2020), so the map and its
    derivative are continuous on the circle.

    ``derivatives`` has shape (..., bins): ``bins - 1`` interior knots, then the end derivative.
    """

    def __init__(self, widths: torch.Tensor, heights: torch.Tensor, derivatives: torch.Tensor):
        super().__init__(widths, heights, derivatives[..., :-1], bound=math.pi, slope=MIN_SLOPE)
        edge = derivatives[..., -1:]
        edge = torch.exp(edge / (1 + abs(edge / math.log(MIN_SLOPE))))  # same soft clip as zuko
        self.derivatives = torch.cat([edge, self.derivatives[..., 1:-1], edge], -1)

    @staticmethod
    def searchsorted(seq: torch.Tensor, value: torch.Tensor) -> torch.Tensor:
        # Every angle of [-pi, pi] lies in a bin, the end knots included.
        return torch.clamp(torch.sum(seq < value[..., None], -1), 1, seq.shape[-1] - 1)


class _Coupling(torch.nn.Module):
    """Elementwise splines of the features ``transformed``, conditioned on all the others."""

    def __init__(self, transformed: torch.Tensor, periodic: torch.Tensor, center: torch.Tensor,
                 scale: torch.Tensor, hidden: int, bins: int):
        super().__init__()
        for name, mask in [("circ_idx", transformed & periodic),
                           ("lin_idx", transformed & ~periodic),
                           ("cond_circ_idx", ~transformed & periodic),
                           ("cond_lin_idx", ~transformed & ~periodic)]:
            self.register_buffer(name, torch.nonzero(mask).flatten(), persistent=False)
        self.register_buffer("center", center[self.lin_idx], persistent=False)
        self.register_buffer("scale", scale[self.lin_idx], persistent=False)
        self.register_buffer("cond_center", center[self.cond_lin_idx], persistent=False)
        self.register_buffer("cond_scale", scale[self.cond_lin_idx], persistent=False)
        self.bins = bins
        n_in = 2 * len(self.cond_circ_idx) + len(self.cond_lin_idx)
        n_out = 3 * bins * len(self.circ_idx) + (3 * bins - 1) * len(self.lin_idx)
        self.net = torch.nn.Sequential(
            torch.nn.Linear(n_in, hidden), torch.nn.SiLU(),
            torch.nn.Linear(hidden, hidden), torch.nn.SiLU(),
            torch.nn.Linear(hidden, n_out)).double()
        torch.nn.init.zeros_(self.net[-1].weight)  # zero spline parameters: the identity map
        torch.nn.init.zeros_(self.net[-1].bias)

    def _splines(self, x: torch.Tensor) -> tuple[_CircularSpline, MonotonicRQSTransform]:
        angles = x[:, self.cond_circ_idx]
        features = torch.cat([torch.cos(angles), torch.sin(angles),
                              (x[:, self.cond_lin_idx] - self.cond_center) / self.cond_scale], -1)
        params = self.net(features)
        k = self.bins
        n_circ = 3 * k * len(self.circ_idx)
        circ = params[:, :n_circ].reshape(len(x), len(self.circ_idx), 3 * k)
        lin = params[:, n_circ:].reshape(len(x), len(self.lin_idx), 3 * k - 1)
        return (_CircularSpline(circ[..., :k], circ[..., k:2 * k], circ[..., 2 * k:]),
                MonotonicRQSTransform(lin[..., :k], lin[..., k:2 * k], lin[..., 2 * k:],
                                      bound=SPLINE_BOUND, slope=MIN_SLOPE))

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Normalizing direction: ``(u, log |det du/dx|)``, shapes (batch, D) and (batch,)."""
        circ, lin = self._splines(x)
        u_circ, ladj_circ = circ.call_and_ladj(x[:, self.circ_idx])
        z, ladj_lin = lin.call_and_ladj((x[:, self.lin_idx] - self.center) / self.scale)
        u = x.index_copy(1, self.circ_idx, wrap(u_circ))
        u = u.index_copy(1, self.lin_idx, self.center + self.scale * z)
        return u, ladj_circ.sum(-1) + ladj_lin.sum(-1)

    def inverse(self, u: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Generative direction: ``(x, log |det du/dx|)`` at the returned x."""
        circ, lin = self._splines(u)  # the conditioning features are the same in x and u
        x_circ = wrap(circ.inv(u[:, self.circ_idx]))
        z = lin.inv((u[:, self.lin_idx] - self.center) / self.scale)
        ladj = circ.call_and_ladj(x_circ)[1].sum(-1) + lin.call_and_ladj(z)[1].sum(-1)
        x = u.index_copy(1, self.circ_idx, x_circ)
        return x.index_copy(1, self.lin_idx, self.center + self.scale * z), ladj


class _ReducedEnergy(torch.autograd.Function):
    """Reduced energies from a numpy callback, with forces as the backward pass."""

    @staticmethod
    def forward(ctx, positions_nm: torch.Tensor, energy_fn: EnergyFn) -> torch.Tensor:
        energies, forces = energy_fn(positions_nm.detach().cpu().numpy())
        u = torch.as_tensor(np.asarray(energies, dtype=np.float64))
        f = torch.as_tensor(np.asarray(forces, dtype=np.float64))
        if u.shape != positions_nm.shape[:1] or f.shape != positions_nm.shape:
            raise ValueError(f"energy_fn must return shapes {tuple(positions_nm.shape[:1])} and "
                             f"{tuple(positions_nm.shape)}, got {tuple(u.shape)} and "
                             f"{tuple(f.shape)}")
        ctx.save_for_backward(f)
        return u

    @staticmethod
    def backward(ctx, grad_u: torch.Tensor):
        (f,) = ctx.saved_tensors
        return -grad_u[:, None, None] * f, None


def reduced_energy(positions_nm: torch.Tensor, energy_fn: EnergyFn) -> torch.Tensor:
    """Differentiable reduced energies from a callback.

    Parameters
    ----------
    positions_nm : torch.Tensor, shape (batch, n_atoms, 3)
    energy_fn : callable
        Maps a numpy array of positions (batch, n_atoms, 3) in nm to reduced energies u = U/kT,
        shape (batch,), and reduced forces ``-du/dx`` in 1/nm, shape (batch, n_atoms, 3).

    Returns
    -------
    torch.Tensor, shape (batch,)
        float64; its gradient with respect to ``positions_nm`` is minus the reduced forces.
    """
    return _ReducedEnergy.apply(positions_nm, energy_fn)


class ConformerFlow(torch.nn.Module):
    """Normalizing flow over ``[bonds_nm | angles_rad | torsions_rad]`` on top of a base.

    Coupling layer ``l`` transforms, by ``l mod 3``: the torsions in ``torsion_half`` given all
    other features; the other torsions given all other features; the bonds and angles given the
    torsions. A coupling with nothing to transform is left out. Network outputs start at zero,
    so the untrained flow is the identity and its density equals the base's.

    Parameters
    ----------
    base : InternalBase
    torsion_half : np.ndarray of bool, shape (n_torsions,)
        The first torsion set of the alternating torsion couplings.
    hidden : int
        Width of the two hidden layers of each conditioner network.
    layers : int
        Number of coupling layers.
    bins : int
        Spline bins per feature.
    zmat : ZMatrix, optional
        Needed by :meth:`reverse_kl_step` (see :meth:`for_zmatrix`).
    """

    def __init__(self, base: InternalBase, torsion_half: np.ndarray, hidden: int = 64,
                 layers: int = 6, bins: int = 8, zmat: ZMatrix | None = None):
        super().__init__()
        n_bonds, n_angles, n_torsions = base.sizes
        half = torch.as_tensor(np.asarray(torsion_half, dtype=bool))
        if half.shape != (n_torsions,):
            raise ValueError(f"torsion_half must have shape ({n_torsions},), "
                             f"got {tuple(half.shape)}")
        if hidden < 1 or layers < 1 or bins < 2:
            raise ValueError("need hidden >= 1, layers >= 1 and bins >= 2")
        self.base, self.zmat = base, zmat
        self.config = {"sizes": list(base.sizes), "components": int(base.loc_rad.shape[1]),
                       "torsion_half": half.tolist(), "hidden": hidden, "layers": layers,
                       "bins": bins}
        periodic = torch.arange(sum(base.sizes)) >= n_bonds + n_angles
        # Spline scale: the base width, shrunk so that [-SPLINE_BOUND, SPLINE_BOUND] standardized
        # units stay inside each bond's and angle's valid range.
        edge = torch.minimum(base.mean - base.lower, base.upper - base.mean) / SPLINE_BOUND
        scale = torch.cat([torch.minimum(base.width, edge),
                           torch.ones(n_torsions, dtype=torch.float64)])
        center = torch.cat([base.mean, torch.zeros(n_torsions, dtype=torch.float64)])
        no_torsion = torch.zeros(n_bonds + n_angles, dtype=torch.bool)
        sets = [torch.cat([no_torsion, half]), torch.cat([no_torsion, ~half]), ~periodic]
        self.couplings = torch.nn.ModuleList(
            _Coupling(sets[l % 3], periodic, center, scale, hidden, bins)
            for l in range(layers) if sets[l % 3].any())

    @classmethod
    def for_zmatrix(cls, zmat: ZMatrix, base: InternalBase, hidden: int = 64, layers: int = 6,
                    bins: int = 8) -> "ConformerFlow":
        """A flow for a Z-matrix. Principal torsions alternate between the two torsion sets in
        row order, and so do the members of each group (a principal torsion, then its offsets in
        row order), so that a principal torsion and its first offset, and consecutive offsets of
        one branch point, condition each other."""
        n = zmat.n_atoms
        if tuple(base.sizes) != (n - 1, n - 2, n - 3):
            raise ValueError(f"base sizes {base.sizes} do not fit a Z-matrix of {n} atoms")
        group = np.where(zmat.is_principal, np.arange(n - 3), zmat.principal_of)
        member = np.array([np.sum(group[:k] == group[k]) for k in range(n - 3)])
        rank = (np.cumsum(zmat.is_principal) - 1)[group]  # the group's rank among groups
        half = (rank + member) % 2 == 0
        return cls(base, half, hidden=hidden, layers=layers, bins=bins, zmat=zmat)

    def _check(self, x: torch.Tensor) -> torch.Tensor:
        x = torch.as_tensor(x, dtype=torch.float64)
        if x.ndim != 2 or x.shape[1] != sum(self.base.sizes):
            raise ValueError(f"x must have shape (batch, {sum(self.base.sizes)}), "
                             f"got {tuple(x.shape)}")
        n_circ = self.base.sizes[2]
        return torch.cat([x[:, :-n_circ], wrap(x[:, -n_circ:])], -1)

    def to_base(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """``(u, log |det du/dx|)`` for features x of shape (batch, D); torsions are wrapped."""
        u, ladj = self._check(x), torch.zeros(len(x), dtype=torch.float64)
        for coupling in self.couplings:
            u, step = coupling(u)
            ladj = ladj + step
        return u, ladj

    def from_base(self, u: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """``(x, log |det du/dx|)`` for base variables u of shape (batch, D)."""
        x, ladj = self._check(u), torch.zeros(len(u), dtype=torch.float64)
        for coupling in reversed(self.couplings):
            x, step = coupling.inverse(x)
            ladj = ladj + step
        return x, ladj

    def log_prob(self, x: torch.Tensor) -> torch.Tensor:
        """Log-density of features x, shape (batch, D) -> (batch,), float64."""
        u, ladj = self.to_base(x)
        return self.base.log_prob(u) + ladj

    def _rsample(self, n: int,
                 generator: torch.Generator | None) -> tuple[torch.Tensor, torch.Tensor]:
        u = self.base.sample(n, generator)
        x, ladj = self.from_base(u)
        return x, self.base.log_prob(u) + ladj

    def sample(self, n: int,
               generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """Draw n conformers: features x, shape (n, D), and their log-density log_q, shape (n,)."""
        with torch.no_grad():
            return self._rsample(n, generator)

    def fit_step(self, optimizer: torch.optim.Optimizer, x_batch: torch.Tensor,
                 weights: torch.Tensor | None = None) -> float:
        """One maximum-likelihood (forward-KL) step on a batch; returns the (weighted) mean
        negative log-likelihood before the step. Gradient norms are clipped at MAX_GRAD_NORM.

        Parameters
        ----------
        optimizer : torch.optim.Optimizer
            Over ``self.parameters()``.
        x_batch : torch.Tensor, shape (batch, D)
        weights : torch.Tensor, shape (batch,), optional
            Non-negative sample weights, not all zero; default equal weights.
        """
        x = self._check(x_batch)
        w = torch.ones(len(x), dtype=torch.float64) if weights is None else torch.as_tensor(
            weights, dtype=torch.float64)
        valid = w.shape == (len(x),) and bool(torch.all(torch.isfinite(w)) & torch.all(w >= 0))
        if not valid or w.sum() <= 0:
            raise ValueError("weights must be finite, non-negative, not all zero, shape (batch,)")
        loss = -(w * self.log_prob(x)).sum() / w.sum()
        return self._step(optimizer, loss)

    def reverse_kl_step(self, optimizer: torch.optim.Optimizer, n: int, energy_fn: EnergyFn,
                        generator: torch.Generator | None = None) -> float:
        """One reverse-KL step: minimize ``E_q[log q(x) - log J(x) + u(x)]`` over n samples.

        The target density in internal coordinates is ``exp(-u) J`` (see
        :func:`hopwell.internal.internal_to_cartesian`); gradients reach the flow through the
        Cartesian map and the callback's forces (:func:`reduced_energy`). Returns the loss.

        Parameters
        ----------
        optimizer : torch.optim.Optimizer
        n : int
            Samples per step.
        energy_fn : callable
            Positions (n, n_atoms, 3) in nm -> reduced energies (n,) and reduced forces
            (n, n_atoms, 3) in 1/nm, numpy arrays.
        generator : torch.Generator, optional
        """
        if self.zmat is None:
            raise ValueError("reverse_kl_step needs a flow built with a Z-matrix (for_zmatrix)")
        x, log_q = self._rsample(n, generator)
        positions_nm, log_jacobian = internal_to_cartesian(self.zmat, *unpack(x, self.zmat.n_atoms))
        loss = (log_q - log_jacobian + reduced_energy(positions_nm, energy_fn)).mean()
        return self._step(optimizer, loss)

    def _step(self, optimizer: torch.optim.Optimizer, loss: torch.Tensor) -> float:
        optimizer.zero_grad()
        loss.backward()
        torch.nn.utils.clip_grad_norm_(self.parameters(), MAX_GRAD_NORM)
        optimizer.step()
        return float(loss.detach())

    def save(self, path) -> None:
        """Write the configuration and ``state_dict`` to ``path`` with ``torch.save``."""
        torch.save({"config": self.config, "state": self.state_dict()}, path)

    def load(self, path) -> "ConformerFlow":
        """Read a :meth:`save` file (``torch.load(weights_only=True)``) into this flow, which
        must have the same configuration (ValueError otherwise); returns ``self``."""
        saved = torch.load(path, weights_only=True)
        if saved.get("config") != self.config:
            raise ValueError(f"{path}: saved flow configuration {saved.get('config')} differs "
                             f"from this flow's {self.config}")
        self.load_state_dict(saved["state"])
        return self
