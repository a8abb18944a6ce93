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
