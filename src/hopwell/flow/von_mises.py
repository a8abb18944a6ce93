"""Von Mises mixtures on the circle: the torsion flow's base densities are fitted with these."""

from __future__ import annotations

import numpy as np
from scipy import special

MIN_KAPPA = 1.0
EM_ITERATIONS = 50


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
