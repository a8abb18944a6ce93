"""Base densities of hopwell's conformer flow over internal coordinates.

A conformer of ``n`` atoms is one feature vector of ``3n - 6`` internal coordinates (float64),
laid out as ``[bonds_nm | angles_rad | torsions_rad]`` with ``n - 1``, ``n - 2`` and ``n - 3``
entries, in the row order of :mod:`hopwell.internal`; :func:`pack` and :func:`unpack` convert
between this vector and :class:`hopwell.internal.InternalCoords`.

:class:`InternalBase` is a product density over the features. Bonds and angles are Gaussians
truncated to their valid range (bonds in ``(0, inf)``, angles in ``(0, pi)``); torsions are a
von Mises mixture on the circle plus a uniform floor weight, so no torsion has zero density.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from scipy import special

from hopwell.internal import InternalCoords

# Width floors: a fitted width never drops below these (seeds often sit exactly in a minimum).
MIN_BOND_WIDTH_NM = 0.002
MIN_ANGLE_WIDTH_RAD = 0.02
MIN_TORSION_WIDTH_RAD = 0.2  # principal torsions: kappa <= 1 / width**2 = 25
MIN_OFFSET_WIDTH_RAD = 0.05  # torsion offsets (rigid branches): kappa <= 400
MIN_KAPPA = 1.0
# Uniform floor weight of offset torsions: a uniform draw puts a branch atom anywhere around its
# central bond (clashing with its siblings), so offsets get a far smaller floor than principal
# torsions.
OFFSET_UNIFORM_WEIGHT = 1e-3
PLAIN_WIDTH_FACTOR = 2.0  # the plain base widens each fitted bond/angle width by this factor
EM_ITERATIONS = 50


def pack(coords: InternalCoords) -> torch.Tensor:
    """Feature vectors ``[bonds | angles | torsions]``, shape (batch, 3n - 6), float64."""
    return torch.cat([coords.bonds_nm, coords.angles_rad, coords.torsions_rad], -1).double()


def unpack(x: torch.Tensor, n_atoms: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Split feature vectors of shape (batch, 3n - 6) into (bonds_nm, angles_rad, torsions_rad)."""
    if x.ndim != 2 or x.shape[1] != 3 * n_atoms - 6:
        raise ValueError(f"x must have shape (batch, {3 * n_atoms - 6}), got {tuple(x.shape)}")
    return x[:, :n_atoms - 1], x[:, n_atoms - 1:2 * n_atoms - 3], x[:, 2 * n_atoms - 3:]


def _log_von_mises(x: torch.Tensor, loc: torch.Tensor, kappa: torch.Tensor) -> torch.Tensor:
    """Von Mises log-density, ``kappa cos(x - loc) - log(2 pi I0(kappa))`` (I0 via i0e)."""
    log_norm = math.log(2 * math.pi) + torch.log(torch.special.i0e(kappa))
    return kappa * (torch.cos(x - loc) - 1.0) - log_norm


def _sample_von_mises(loc: torch.Tensor, kappa: torch.Tensor,
                      generator: torch.Generator | None) -> torch.Tensor:
    """Von Mises draws by Best & Fisher's wrapped-Cauchy rejection (Appl. Stat. 28:152, 1979)."""
    tau = 1.0 + torch.sqrt(1.0 + 4.0 * kappa ** 2)
    rho = (tau - torch.sqrt(2.0 * tau)) / (2.0 * kappa)
    r = (1.0 + rho ** 2) / (2.0 * rho)
    out = torch.empty_like(loc)
    todo = torch.ones_like(loc, dtype=torch.bool)
    while todo.any():
        u = torch.rand((3,) + loc.shape, generator=generator, dtype=loc.dtype)
        z = torch.cos(math.pi * u[0])
        f = (1.0 + r * z) / (r + z)
        c = kappa * (r - f)
        accept = todo & ((c * (2.0 - c) > u[1]) | (torch.log(c / u[1]) + 1.0 - c >= 0.0))
        theta = torch.sign(u[2] - 0.5) * torch.acos(f.clamp(-1.0, 1.0))
        out = torch.where(accept, theta, out)
        todo &= ~accept
    return wrap(out + loc)


def wrap(angle_rad: torch.Tensor) -> torch.Tensor:
    """Wrap angles to [-pi, pi)."""
    wrapped = torch.remainder(angle_rad + math.pi, 2.0 * math.pi) - math.pi
    return torch.where(wrapped >= math.pi, wrapped - 2.0 * math.pi, wrapped)


def _kappa_from_resultant(r: np.ndarray) -> np.ndarray:
    """Approximate inverse of A1(kappa) = I1/I0, the mean resultant length (Best & Fisher 1981,
    as given in Fisher, Statistical Analysis of Circular Data, 1993)."""
    r = np.clip(r, 1e-9, 1.0 - 1e-9)
    return np.where(r < 0.53, 2 * r + r ** 3 + 5 * r ** 5 / 6,
                    np.where(r < 0.85, -0.4 + 1.39 * r + 0.43 / (1 - r),
                             1.0 / (r ** 3 - 4 * r ** 2 + 3 * r)))


def fit_von_mises_mixture(torsions: np.ndarray, n_components: int, uniform_weight: np.ndarray,
                           max_kappa: np.ndarray) -> tuple[np.ndarray, ...]:
    """EM fit of ``uniform_weight / 2pi + (1 - uniform_weight) sum_k w_k vM(mu_k, kappa_k)``.

    Components start evenly spaced from each torsion's circular mean. ``uniform_weight`` and
    ``max_kappa`` have shape (n_torsions,). Returns loc, kappa and weights (summing to
    ``1 - uniform_weight``), each of shape (n_torsions, n_components).
    """
    uniform_weight = uniform_weight[:, None, None]
    x = torsions.T[:, :, None]  # (T, N, 1)
    mean = np.angle(np.exp(1j * torsions).mean(0))
    loc = mean[:, None] + 2 * np.pi * np.arange(n_components) / n_components
    kappa = np.full(loc.shape, MIN_KAPPA)
    weight = np.full(loc.shape, 1.0 / n_components)
    for _ in range(EM_ITERATIONS):
        log_comp = (np.log(weight)[:, None] + np.log1p(-uniform_weight)
                    + kappa[:, None] * (np.cos(x - loc[:, None]) - 1)
                    - np.log(2 * np.pi * special.i0e(kappa))[:, None])
        log_unif = np.broadcast_to(np.log(uniform_weight / (2 * np.pi)), log_comp.shape[:2] + (1,))
        log_all = np.concatenate([log_comp, log_unif], -1)
        resp = np.exp(log_all - log_all.max(-1, keepdims=True))
        resp = (resp / resp.sum(-1, keepdims=True))[..., :-1]  # (T, N, K)
        mass = resp.sum(1) + 1e-12
        weight = mass / mass.sum(-1, keepdims=True)
        resultant = (resp * np.exp(1j * x)).sum(1) / mass
        loc = np.angle(resultant)
        kappa = np.clip(_kappa_from_resultant(np.abs(resultant)), MIN_KAPPA, max_kappa[:, None])
    return loc, kappa, weight * (1.0 - uniform_weight[:, 0])


class InternalBase(torch.nn.Module):
    """Product base density over ``[bonds | angles | torsions]`` (all buffers, no parameters).

    Parameters
    ----------
    mean, width : torch.Tensor, shape (n_bonds + n_angles,)
        Centre and width of the truncated Gaussian of each bond (nm) and angle (rad).
    loc_rad, kappa, weight : torch.Tensor, shape (n_torsions, n_components)
        Von Mises components of each torsion; ``weight`` sums to ``1 - uniform_weight`` per row.
        ``n_components = 0`` gives uniform torsions.
    uniform_weight : float or torch.Tensor of shape (n_torsions,)
        Weight of the uniform density ``1 / 2pi`` in each torsion's mixture, in (0, 1].
    """

    def __init__(self, mean: torch.Tensor, width: torch.Tensor, loc_rad: torch.Tensor,
                 kappa: torch.Tensor, weight: torch.Tensor, uniform_weight: float | torch.Tensor):
        super().__init__()
        n_bonds = (mean.shape[0] + 1) // 2  # n_bonds + n_angles = 2 n_atoms - 3
        if mean.ndim != 1 or mean.shape != width.shape or torch.any(width <= 0) or n_bonds < 3:
            raise ValueError("mean and width must be 1-d of equal length 2 n_atoms - 3 (at least"
                             " 4 atoms), widths positive")
        if not (loc_rad.shape == kappa.shape == weight.shape and loc_rad.shape[0] == n_bonds - 2):
            raise ValueError("loc_rad, kappa and weight must have shape (n_torsions, n_components)")
        uniform_weight = torch.as_tensor(uniform_weight, dtype=torch.float64).expand(n_bonds - 2)
        if torch.any(uniform_weight <= 0) or torch.any(uniform_weight > 1):
            raise ValueError(f"uniform_weight must be in (0, 1], got {uniform_weight}")
        if not torch.allclose(weight.double().sum(-1), 1 - uniform_weight):
            raise ValueError("each torsion's weights must sum to 1 - uniform_weight")
        upper = torch.cat([torch.full((n_bonds,), math.inf), torch.full((n_bonds - 1,), math.pi)])
        if torch.any((mean <= 0) | (mean >= upper)):
            raise ValueError("bond means must be positive and angle means inside (0, pi)")
        self.sizes = (n_bonds, n_bonds - 1, n_bonds - 2)
        for name, value in [("mean", mean), ("width", width), ("lower", torch.zeros_like(upper)),
                            ("upper", upper), ("loc_rad", loc_rad), ("kappa", kappa),
                            ("weight", weight), ("uniform_weight", uniform_weight)]:
            self.register_buffer(name, value.double().clone())

    @classmethod
    def fit(cls, coords: InternalCoords, is_principal: np.ndarray | None = None,
            plain: bool = False, n_components: int = 3,
            uniform_weight: float = 0.05) -> "InternalBase":
        """Fit a base to a sample of conformers.

        The physics base takes each bond's and angle's sample mean and standard deviation
        (floored at ``MIN_BOND_WIDTH_NM`` / ``MIN_ANGLE_WIDTH_RAD``) and fits each torsion with an
        ``n_components`` von Mises mixture by EM, kappa capped so that the width
        ``1 / sqrt(kappa)`` stays above ``MIN_TORSION_WIDTH_RAD`` (principal torsions) or
        ``MIN_OFFSET_WIDTH_RAD`` (offsets); the uniform floor weight is ``uniform_weight`` for
        principal torsions and ``OFFSET_UNIFORM_WEIGHT`` for offsets. The plain base
        (``plain=True``) keeps the means, widens the widths by ``PLAIN_WIDTH_FACTOR`` and makes
        torsions uniform.

        Parameters
        ----------
        coords : InternalCoords
            Sample of batch size >= 1 (e.g. the seeds or a training buffer).
        is_principal : np.ndarray of bool, shape (n_torsions,), optional
            ``ZMatrix.is_principal``; default all principal.
        plain : bool
        n_components : int
            Von Mises components per torsion (physics base), at least 1.
        uniform_weight : float
            Uniform floor weight of each principal torsion's mixture (physics base), in (0, 1).
        """
        x = pack(coords)
        n_bonds = coords.bonds_nm.shape[1]
        if x.shape[0] < 1:
            raise ValueError("fitting a base needs at least one conformer")
        if n_components < 1 or not 0.0 < uniform_weight < 1.0:
            raise ValueError("need n_components >= 1 and uniform_weight in (0, 1)")
        n_ba, n_torsions = 2 * n_bonds - 1, n_bonds - 2
        floor = torch.cat([torch.full((n_bonds,), MIN_BOND_WIDTH_NM),
                           torch.full((n_bonds - 1,), MIN_ANGLE_WIDTH_RAD)]).double()
        mean = x[:, :n_ba].mean(0)
        width = torch.maximum(x[:, :n_ba].std(0, correction=0), floor)
        if plain:
            empty = torch.zeros(n_torsions, 0)
            return cls(mean, PLAIN_WIDTH_FACTOR * width, empty, empty, empty, 1.0)
        principal = np.ones(n_torsions, bool) if is_principal is None else np.asarray(
            is_principal, bool)
        if principal.shape != (n_torsions,):
            raise ValueError(f"is_principal must have shape ({n_torsions},), got {principal.shape}")
        max_kappa = np.where(principal, MIN_TORSION_WIDTH_RAD, MIN_OFFSET_WIDTH_RAD) ** -2.0
        floor_weight = np.where(principal, uniform_weight, OFFSET_UNIFORM_WEIGHT)
        loc, kappa, weight = fit_von_mises_mixture(x[:, n_ba:].numpy(), n_components,
                                                    floor_weight, max_kappa)
        mixture = (torch.from_numpy(a) for a in (loc, kappa, weight, floor_weight))
        return cls(mean, width, *mixture)

    def log_prob(self, x: torch.Tensor) -> torch.Tensor:
        """Log-density of feature vectors x, shape (batch, 3n - 6) -> (batch,), float64."""
        x = x.double()
        n_ba = self.mean.shape[0]
        if x.ndim != 2 or x.shape[1] != n_ba + self.loc_rad.shape[0]:
            raise ValueError(f"x must have shape (batch, {sum(self.sizes)}), got {tuple(x.shape)}")
        y = x[:, :n_ba]
        z = (y - self.mean) / self.width
        log_mass = torch.log(torch.special.ndtr((self.upper - self.mean) / self.width)
                             - torch.special.ndtr((self.lower - self.mean) / self.width))
        log_gauss = -0.5 * z ** 2 - torch.log(self.width) - 0.5 * math.log(2 * math.pi) - log_mass
        inside = (y > self.lower) & (y < self.upper)
        log_gauss = torch.where(inside, log_gauss, -math.inf).sum(-1)
        t = x[:, n_ba:, None]
        log_comp = torch.log(self.weight) + _log_von_mises(t, self.loc_rad, self.kappa)
        log_unif = torch.log(self.uniform_weight / (2 * math.pi))[:, None].expand_as(t)
        return log_gauss + torch.logsumexp(torch.cat([log_comp, log_unif], -1), -1).sum(-1)

    def sample(self, n: int, generator: torch.Generator | None = None) -> torch.Tensor:
        """Draw n feature vectors, shape (n, 3n - 6), float64."""
        if n < 1:
            raise ValueError(f"n must be positive, got {n}")
        z = torch.randn((n,) + self.mean.shape, generator=generator, dtype=torch.float64)
        y = self.mean + self.width * z
        bad = (y <= self.lower) | (y >= self.upper)
        while bad.any():  # exact truncation by rejection (each mean lies inside its range)
            z = torch.randn(y.shape, generator=generator, dtype=torch.float64)
            fresh = self.mean + self.width * z
            y = torch.where(bad, fresh, y)
            bad = (y <= self.lower) | (y >= self.upper)
        n_torsions, n_components = self.loc_rad.shape
        probs = torch.cat([self.weight, self.uniform_weight[:, None]], -1)
        pick = torch.multinomial(probs, n, replacement=True, generator=generator).T  # (n, T)
        loc = torch.cat([self.loc_rad, torch.zeros(n_torsions, 1, dtype=torch.float64)], -1)
        kappa = torch.cat([self.kappa, torch.ones(n_torsions, 1, dtype=torch.float64)], -1)
        rows = torch.arange(n_torsions)
        vm = _sample_von_mises(loc[rows, pick], kappa[rows, pick], generator)
        uniform = (2 * torch.rand(vm.shape, generator=generator, dtype=torch.float64) - 1) * math.pi
        return torch.cat([y, torch.where(pick == n_components, uniform, vm)], -1)
