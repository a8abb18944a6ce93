"""The von Mises mixture fit behind the torsion flow's base."""

import numpy as np
from scipy import stats

from hopwell.flow.von_mises import fit_von_mises_mixture


def _mixture_log_pdf(x, loc, kappa, weight, uniform_weight):
    comps = [w * stats.vonmises.pdf(x, k, loc=m) for m, k, w in zip(loc, kappa, weight)]
    return np.log(uniform_weight / (2 * np.pi) + np.sum(comps, axis=0))


def test_fit_recovers_a_two_well_torsion():
    rng = np.random.default_rng(5)

    def draw(n):
        well = rng.random(n) < 0.7
        phi = np.where(well, rng.vonmises(-1.0, 8.0, n), rng.vonmises(2.0, 20.0, n))
        true = np.logaddexp(np.log(0.7) + stats.vonmises.logpdf(phi, 8.0, loc=-1.0),
                            np.log(0.3) + stats.vonmises.logpdf(phi, 20.0, loc=2.0))
        return phi, true

    train, _ = draw(4000)
    test, true_log_density = draw(4000)
    loc, kappa, weight = fit_von_mises_mixture(train[:, None], 3, np.array([0.05]), np.array([25.0]))
    np.testing.assert_allclose(weight.sum(), 0.95)
    fitted = _mixture_log_pdf(test, loc[0], kappa[0], weight[0], 0.05)
    # Source: the true density (scipy.stats.vonmises). The 5% uniform floor alone costs about
    # -log(0.95) = 0.05 nats; the fit must come within 0.1 nats of the truth.
    gap = true_log_density.mean() - fitted.mean()
    assert 0.0 < gap < 0.1


def test_fit_respects_the_concentration_cap():
    rng = np.random.default_rng(1)
    sharp = rng.vonmises(0.5, 400.0, (2000, 1))
    _, kappa, _ = fit_von_mises_mixture(sharp, 2, np.array([0.05]), np.array([25.0]))
    assert kappa.max() <= 25.0 + 1e-12
    assert kappa.max() > 20.0  # the cap binds: the data are far sharper


def test_one_torsion_marginals_match_scipy_and_their_sampler_matches_them():
    """The base's one-torsion marginal density against scipy.stats.vonmises, and its numpy
    sampler against that density (binned counts against the integrated density)."""
    from scipy import integrate

    from hopwell.flow.torsion import TorsionFlow

    rng = np.random.default_rng(11)
    data = np.stack([np.where(rng.random(3000) < 0.7, rng.vonmises(-1.0, 8.0, 3000), rng.vonmises(2.0, 20.0, 3000)),
                     rng.vonmises(3.0, 4.0, 3000)], axis=1)
    flow = TorsionFlow(data, transforms=2, hidden=8)
    loc, kappa, log_w = flow._marginal()
    x = np.linspace(-np.pi, np.pi, 101)
    for i in range(2):
        # Source: scipy.stats.vonmises.logpdf, summed over the mixture's components.
        expected = np.log(sum(np.exp(w) * stats.vonmises.pdf(x, k, loc=m)
                              for m, k, w in zip(loc[i], kappa[i], log_w[i])))
        np.testing.assert_allclose(flow.marginal_log_prob(np.full(len(x), i), x), expected, rtol=0, atol=1e-10)
    n = 40000
    draws = flow.marginal_sample(np.zeros(n, dtype=int), np.random.default_rng(3))
    assert draws.min() >= -np.pi and draws.max() < np.pi
    edges = np.linspace(-np.pi, np.pi, 13)
    counts, _ = np.histogram(draws, edges)
    for count, lo, hi in zip(counts, edges[:-1], edges[1:]):
        p = integrate.quad(lambda t: float(np.exp(flow.marginal_log_prob(np.array([0]), np.array([t]))[0])), lo, hi)[0]
        # Binomial counts: within 5 standard deviations of n p (a false alarm about 1 in 10^6 per bin).
        assert abs(count - n * p) < 5 * np.sqrt(n * p * (1 - p)) + 1, (lo, count, n * p)
