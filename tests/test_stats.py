"""Tests of hopwell.analysis.stats against references outside hopwell."""

import numpy as np
import pytest
from pymbar import timeseries as pymbar_timeseries
from scipy import constants, signal, stats

from hopwell.analysis.stats import (
    BLOCK_FACTOR,
    blockwise_importance_populations,
    count_transitions,
    free_energy_differences,
    integrated_autocorrelation_time,
    jeffreys_interval,
    joint_interval,
    joint_level,
    kish_ess,
    population_estimate,
    split_rhat,
    statistical_inefficiency,
)

# kT at 298.15 K in kJ/mol from the CODATA gas constant (scipy.constants).
KT = constants.R * 298.15 / 1000.0


def ar1(rng, rho, shape):
    """Stationary AR(1) series with unit variance along the last axis."""
    eps = rng.standard_normal(shape)
    zi = rho * rng.standard_normal(shape[:-1] + (1,))
    return signal.lfilter([np.sqrt(1 - rho**2)], [1, -rho], eps, axis=-1, zi=zi)[0]


def markov_two_state(rng, start, n, p_switch):
    """Two-state Markov chains (one per entry of ``start``), shape (len(start), n)."""
    flips = rng.random((len(start), n)) < p_switch
    flips[:, 0] = False
    return (np.asarray(start)[:, None] + np.cumsum(flips, axis=1)) % 2


# AR(1): rho_t = rho**t, so g = 1 + 2 sum rho**t = (1 + rho) / (1 - rho)
# (closed form, e.g. Sokal 1997, "Monte Carlo methods in statistical mechanics").
@pytest.mark.parametrize("rho, n", [(0.5, 100_000), (0.9, 1_000_000), (0.99, 2_000_000)])
def test_inefficiency_ar1_closed_form(rho, n):
    x = ar1(np.random.default_rng(11), rho, (n,))
    g_exact = (1 + rho) / (1 - rho)
    assert statistical_inefficiency(x) == pytest.approx(g_exact, rel=0.10)
    assert integrated_autocorrelation_time(x) == pytest.approx(rho / (1 - rho), rel=0.10)


# pymbar.timeseries.statistical_inefficiency returns g = 1 + 2 tau (pymbar docs).
@pytest.mark.parametrize("rho", [0.5, 0.9, 0.99])
def test_inefficiency_matches_pymbar(rho):
    x = ar1(np.random.default_rng(12), rho, (100_000,))
    g_ref = pymbar_timeseries.statistical_inefficiency(x)
    assert statistical_inefficiency(x) == pytest.approx(g_ref, rel=0.10)
    assert integrated_autocorrelation_time(x) == pytest.approx((g_ref - 1) / 2, rel=0.10)


def test_inefficiency_constant_and_white_noise():
    assert statistical_inefficiency(np.full(500, 3.0)) == 1.0
    assert integrated_autocorrelation_time(np.zeros(10)) == 0.0
    # White noise: rho_t = 0 for t > 0, hence g = 1 (closed form above, rho = 0).
    g = statistical_inefficiency(np.random.default_rng(13).standard_normal(100_000))
    assert 1.0 <= g < 1.05


def test_count_transitions_by_hand():
    # 0 0 1 1 2 0 2: changes at 0->1, 1->2, 2->0, 0->2.
    assert count_transitions(np.array([0, 0, 1, 1, 2, 0, 2])) == 4
    assert count_transitions(np.array([5])) == 0


def thresholded_ar1(rng, n_sets, n_walkers, n, rho, p_one):
    """Binary series 1[x > q], x stationary AR(1), P(state 1) = p_one exactly.

    The threshold q = Phi^-1(1 - p_one) is the Gaussian quantile (scipy.stats.norm).
    """
    x = ar1(rng, rho, (n_sets, n_walkers, n))
    return (x > stats.norm.ppf(1.0 - p_one)).astype(np.int8)


@pytest.fixture(scope="module")
def coverage_sets():
    # 400 data sets of 4 independent walkers x 5000 samples, true P(state 1) = 0.3.
    return thresholded_ar1(np.random.default_rng(2024), 400, 4, 5000, 0.9, 0.3)


def percentile_interval(result):
    """The bootstrap's own percentile interval (before the Jeffreys floor), from the replicas."""
    alpha = 1.0 - result.confidence
    return np.quantile(result.replicates, [alpha / 2.0, 1.0 - alpha / 2.0], axis=0)


def coverage(sets, rng, n_boot=200, truth=0.3, bootstrap_only=False, **kwargs):
    """How many data sets' state-1 intervals hold ``truth``."""
    hits = []
    for d in sets:
        r = population_estimate(d, 2, rng, n_boot=n_boot, **kwargs)
        lower, upper = percentile_interval(r) if bootstrap_only else (r.lower, r.upper)
        hits.append(lower[1] <= truth <= upper[1])
    return int(np.sum(hits))


def test_block_bootstrap_coverage(coverage_sets):
    hits = coverage(coverage_sets, np.random.default_rng(1), resample_walkers=False)
    # Binomial test (scipy.stats.binomtest): coverage consistent with 95 %.
    assert stats.binomtest(hits, len(coverage_sets), 0.95).pvalue > 0.01
    assert 0.93 <= hits / len(coverage_sets) <= 0.97


def test_iid_bootstrap_undercovers(coverage_sets):
    # Ignoring the correlation (blocks of one sample) must fail the same test. The bootstrap's
    # own interval is judged: the Jeffreys floor, sized by the inefficiency, would hide it.
    hits = coverage(coverage_sets[:30], np.random.default_rng(2), n_boot=100, block_length=1,
                    bootstrap_only=True)
    assert stats.binomtest(hits, 30, 0.95).pvalue < 1e-6


def test_walker_resampling_is_conservative(coverage_sets):
    hits = coverage(coverage_sets[:200], np.random.default_rng(3), resample_walkers=True)
    # One-sided binomial test: coverage not below 95 %.
    assert stats.binomtest(hits, 200, 0.95, alternative="less").pvalue > 0.01


def jeffreys_by_scipy(p, n_eff, confidence=0.95):
    """Jeffreys interval from scipy.stats.beta.ppf, bounds 0 at x = 0 and 1 at x = n
    (Brown, Cai & DasGupta 2001, Statist. Sci. 16:101, section 4.1.2)."""
    x, alpha = p * n_eff, 1.0 - confidence
    lower = stats.beta.ppf(alpha / 2, x + 0.5, n_eff - x + 0.5) if x > 0 else 0.0
    upper = stats.beta.ppf(1 - alpha / 2, x + 0.5, n_eff - x + 0.5) if x < n_eff else 1.0
    return lower, upper


@pytest.mark.parametrize("p, n_eff", [(0.0, 50.0), (1.0, 50.0), (0.004, 287.3), (0.3, 1000.0),
                                      (1.0 / 7.0, 7.0), (0.996, 979.25)])
def test_jeffreys_interval_matches_scipy_beta(p, n_eff):
    lower, upper = jeffreys_interval(np.array([p]), n_eff, 0.95)
    assert (lower[0], upper[0]) == pytest.approx(jeffreys_by_scipy(p, n_eff), rel=1e-10, abs=1e-15)
    assert (lower[0] > 0) == (p > 0) and (upper[0] < 1) == (p < 1)


def test_rare_state_interval_never_touches_the_boundary():
    # The measured failure, rebuilt: 0.4% of the samples in a rare state, all in one dwell of
    # one walker of four. Most replicas miss the dwell, so the bootstrap's own interval claims
    # population 1 possible for the common state and 0 for the rare one, which the samples
    # contradict. The reported bounds there must be the Jeffreys bounds on
    # min(ess, p (1 - p) / var) samples (var: the replicas' variance), computed with scipy.
    d = np.zeros((4, 5000), dtype=int)
    d[0, 2000:2080] = 1
    r = population_estimate(d, 2, np.random.default_rng(3), n_boot=1000)
    np.testing.assert_allclose(r.populations, [0.996, 0.004])
    lower, upper = percentile_interval(r)
    assert upper[0] == 1.0 and lower[1] == 0.0  # the collapse the floor must undo
    size = min(r.ess, 0.004 * 0.996 / r.replicates[:, 1].var())
    common, rare = jeffreys_by_scipy(0.996, size), jeffreys_by_scipy(0.004, size)
    assert r.upper[0] == pytest.approx(common[1], rel=1e-10) and r.upper[0] < 1.0
    assert r.lower[1] == pytest.approx(rare[0], rel=1e-10) and r.lower[1] > 0.0
    # The other bounds are the more cautious of the two intervals.
    assert r.lower[0] == pytest.approx(min(lower[0], common[0]))
    assert r.upper[1] == pytest.approx(max(upper[1], rare[1]))


def test_rare_state_coverage_restored_by_the_floor():
    # 400 data sets of 4 walkers x 500 independent samples with P(state 1) = 0.002: about four
    # expected counts, so the percentile bootstrap, which cannot put a bound between the
    # discrete replica values, covers too rarely; the floored intervals must not (one-sided
    # binomial tests, scipy.stats.binomtest).
    sets = thresholded_ar1(np.random.default_rng(10), 400, 4, 500, 0.0, 0.002)
    floored = coverage(sets, np.random.default_rng(1), truth=0.002)
    percentile = coverage(sets, np.random.default_rng(1), truth=0.002, bootstrap_only=True)
    assert stats.binomtest(percentile, 400, 0.95, alternative="less").pvalue < 1e-3
    assert stats.binomtest(floored, 400, 0.95, alternative="less").pvalue > 0.01


@pytest.mark.parametrize("n_states", [1, 2, 3, 5, 10])
def test_joint_level_of_independent_states_is_sidaks(n_states):
    # Independent replicas: all K intervals at level L hold a replica with probability L ** K,
    # so the joint 95% level is 0.95 ** (1 / K) (Sidak 1967, J. Am. Stat. Assoc. 62:626).
    reps = np.random.default_rng(20).standard_normal((200_000, n_states))
    assert joint_level(reps, 0.95) == pytest.approx(0.95 ** (1.0 / n_states), abs=2e-4)


def test_joint_level_of_states_that_move_together_is_the_plain_level():
    column = np.random.default_rng(21).standard_normal((5000, 1))
    assert joint_level(np.repeat(column, 4, axis=1), 0.95) == 0.95


def test_joint_intervals_hold_all_states_at_once():
    # 600 data sets of 4 correlated walkers x 4000 samples in three states with known
    # populations (an AR(1) series cut at Gaussian quantiles, scipy.stats.norm). The states'
    # own 95% intervals all hold their truths less often than 95% (some of three misses);
    # the joint intervals must hold all three in 95% of the sets (binomial test,
    # scipy.stats.binomtest), and each contains the state's own interval.
    truth = np.array([0.2, 0.5, 0.3])
    x = ar1(np.random.default_rng(2025), 0.9, (600, 4, 4000))
    sets = np.digitize(x, stats.norm.ppf(np.cumsum(truth)[:-1]))
    rng = np.random.default_rng(1)
    own, joint = [], []
    for d in sets:
        r = population_estimate(d, 3, rng, n_boot=400)
        lower, upper, level = joint_interval(r)
        assert 0.95 < level <= 1 - 0.05 / 3 and np.all(lower <= r.lower) and np.all(r.upper <= upper)
        own.append(np.all((r.lower <= truth) & (truth <= r.upper)))
        joint.append(np.all((lower <= truth) & (truth <= upper)))
    assert stats.binomtest(sum(own), len(sets), 0.95).pvalue < 0.01  # 92.0% when written
    assert stats.binomtest(sum(joint), len(sets), 0.95).pvalue > 0.01


def test_trapped_walkers():
    # Two walkers never leave state 0, two never leave state 1.
    rng = np.random.default_rng(4)
    d = np.repeat([[0], [0], [1], [1]], 2000, axis=1)
    inner = population_estimate(d, 2, rng, n_boot=500)
    outer = population_estimate(d, 2, rng, n_boot=500, resample_walkers=True)
    assert inner.upper[1] - inner.lower[1] < 0.05
    assert outer.upper[1] - outer.lower[1] > 0.5
    # Both states were seen and neither holds every sample: no bound at 0 or 1.
    assert 0 < outer.lower[1] < 0.25 and 0.75 < outer.upper[1] < 1
    assert split_rhat(d) > 1.5


def test_population_result_fields():
    rng = np.random.default_rng(5)
    d = thresholded_ar1(rng, 1, 3, 4000, 0.8, 0.4)[0]
    r = population_estimate(d, 3, rng, n_boot=300)
    np.testing.assert_allclose(r.populations, np.bincount(d.ravel(), minlength=3) / d.size)
    assert r.replicates.shape == (300, 3)
    np.testing.assert_allclose(r.replicates.sum(axis=1), 1.0)
    assert r.n_samples == d.size and r.ess == pytest.approx(d.size / r.statistical_inefficiency)
    assert r.block_length == int(np.ceil(BLOCK_FACTOR * r.statistical_inefficiency))
    # Mean over walkers of the pymbar g of the state-1 indicator (both states agree).
    g_ref = np.mean([pymbar_timeseries.statistical_inefficiency(w) for w in d])
    assert r.statistical_inefficiency == pytest.approx(g_ref, rel=0.10)
    assert np.all(r.lower <= r.populations) and np.all(r.populations <= r.upper)
    ragged = population_estimate([d[0], d[1][:1500]], 3, rng, n_boot=50)
    pooled = np.concatenate([d[0], d[1][:1500]])
    np.testing.assert_allclose(ragged.populations, np.bincount(pooled, minlength=3) / pooled.size)


def test_free_energy_interval_matches_population_interval():
    rng = np.random.default_rng(6)
    d = thresholded_ar1(rng, 1, 4, 3000, 0.7, 0.25)[0]
    r = population_estimate(d, 2, rng, n_boot=2000)
    dg = free_energy_differences(r, KT)
    assert dg.reference == 0 and dg.values[0] == 0.0

    # dG_1 = -kT ln(p1 / (1 - p1)) falls monotonically with p1, so the interval
    # ends swap; p is smoothed with 0.5 counts per state (documented pseudocount).
    def dg_of(p1):
        s1 = (p1 * r.n_samples + 0.5) / (r.n_samples + 1.0)
        return -KT * np.log(s1 / (1.0 - s1))

    assert dg.values[1] == pytest.approx(dg_of(r.populations[1]))
    # Free-energy intervals are percentiles over the same replicas (no Jeffreys floor).
    lower, upper = percentile_interval(r)
    assert dg.lower[1] == pytest.approx(dg_of(upper[1]), abs=2e-3)
    assert dg.upper[1] == pytest.approx(dg_of(lower[1]), abs=2e-3)
    flipped = free_energy_differences(r, KT, reference=1)
    np.testing.assert_allclose(flipped.values[0], -dg.values[1])
    np.testing.assert_allclose(flipped.replicates[:, 0], -dg.replicates[:, 1])


def test_absent_state_pseudocount():
    rng = np.random.default_rng(7)
    d = markov_two_state(rng, [0, 1], 1000, 0.05)
    r = population_estimate(d, 3, rng, n_boot=200)
    assert r.populations[2] == 0.0 and np.all(r.replicates[:, 2] == 0.0)
    dg = free_energy_differences(r, KT)
    n_ref = np.bincount(d.ravel()).max()
    # -kT ln((0 + 0.5) / (n_ref + 0.5)): 0.5 pseudocounts, common denominator cancels.
    assert dg.values[2] == pytest.approx(-KT * np.log(0.5 / (n_ref + 0.5)))
    assert np.all(np.isfinite(dg.replicates)) and dg.lower[2] > 0


def test_split_rhat_hand_computation():
    # Chains [0 1 1 1], [0 0 0 1] split into [0 1] [1 1] [0 0] [0 1] (n = 2):
    # chain means 1/2 1 0 1/2, variances 1/2 0 0 1/2 -> W = 1/4,
    # B = n var(means) = 2 * (1/2) / 3 = 1/3, var+ = (n-1)/n W + B/n = 7/24,
    # R = sqrt(var+ / W) = sqrt(7/6)  (classic split R-hat, Gelman et al., BDA3 eq. 11.4).
    # Binary draws: rank normalisation is affine, so Vehtari et al. (2021) give the same.
    assert split_rhat(np.array([[0, 1, 1, 1], [0, 0, 0, 1]])) == pytest.approx(np.sqrt(7 / 6))


def test_split_rhat_rank_normalised_by_hand():
    # Chains [1 2 3 4], [5 6 7 8]: split chains [1 2] [3 4] [5 6] [7 8], ranks
    # equal the values; normal scores z = Phi^-1((r - 3/8) / (S + 1/4)), S = 8
    # (Vehtari et al. 2021, eq. 14).  Folded |x - 4.5| has average ranks
    # [7.5 5.5] [3.5 1.5] [1.5 3.5] [5.5 7.5].  Result = max(bulk, tail).
    def gelman_rubin(z):  # BDA3 eq. 11.3-11.4, n = 2 draws per chain
        w = z.var(axis=1, ddof=1).mean()
        b = 2 * z.mean(axis=1).var(ddof=1)
        return np.sqrt((w / 2 + b / 2) / w)

    def scores(r):
        return stats.norm.ppf((np.array(r) - 0.375) / 8.25)

    bulk = gelman_rubin(scores([[1, 2], [3, 4], [5, 6], [7, 8]]))
    tail = gelman_rubin(scores([[7.5, 5.5], [3.5, 1.5], [1.5, 3.5], [5.5, 7.5]]))
    chains = np.array([[1.0, 2, 3, 4], [5, 6, 7, 8]])
    assert split_rhat(chains) == pytest.approx(max(bulk, tail))
    assert split_rhat(np.exp(chains)) == pytest.approx(max(bulk, tail))


def test_split_rhat_mixing():
    rng = np.random.default_rng(8)
    assert split_rhat(rng.standard_normal((4, 2000))) < 1.01
    assert split_rhat((rng.random((4, 2000)) < 0.3).astype(int)) < 1.01
    assert split_rhat(markov_two_state(rng, [0, 1, 0, 1], 2000, 2e-3)) > 1.1
    assert split_rhat(np.repeat([[0], [1]], 10, axis=1)) == np.inf
    assert np.isnan(split_rhat(np.ones((3, 10))))


def test_kish_ess():
    assert kish_ess(np.full(250, -3.7)) == pytest.approx(250.0)
    assert kish_ess(np.r_[0.0, np.full(99, -np.inf)]) == pytest.approx(1.0)
    assert kish_ess(np.r_[800.0, np.full(99, 0.0)]) == pytest.approx(1.0)
    w = np.random.default_rng(9).random(50)
    # Direct (sum w)^2 / sum w^2 (Kish 1965); a log-weight offset must not matter.
    assert kish_ess(np.log(w) + 900.0) == pytest.approx(w.sum() ** 2 / (w**2).sum())


GEN = np.random.default_rng(0)
GOOD = np.zeros((2, 10), dtype=int)


@pytest.mark.parametrize(
    "call",
    [
        lambda: population_estimate(np.array([[0, -1, 0, 1]]), 2, GEN),
        lambda: population_estimate(np.array([[0, 2, 0, 1]]), 2, GEN),
        lambda: population_estimate(np.array([0, 1, 0, 1]), 2, GEN),
        lambda: population_estimate(np.zeros((2, 2, 5), dtype=int), 2, GEN),
        lambda: population_estimate(GOOD.astype(float), 2, GEN),
        lambda: population_estimate(GOOD, 2, GEN, n_boot=0),
        lambda: population_estimate(GOOD, 2, GEN, confidence=1.5),
        lambda: population_estimate(GOOD, 2, 42),
        lambda: population_estimate(GOOD, 0, GEN),
        lambda: population_estimate(GOOD, 2, GEN, block_length=0),
        lambda: statistical_inefficiency(np.zeros((3, 3))),
        lambda: statistical_inefficiency([1.0, np.nan]),
        lambda: count_transitions(np.zeros((2, 2), dtype=int)),
        lambda: split_rhat(np.zeros(10)),
        lambda: kish_ess([0.0, np.nan]),
        lambda: kish_ess([-np.inf, -np.inf]),
        lambda: jeffreys_interval([0.5], 0.0, 0.95),
        lambda: jeffreys_interval([1.5], 10.0, 0.95),
        lambda: free_energy_differences(population_estimate(GOOD, 2, GEN, n_boot=5), -1.0),
        lambda: free_energy_differences(population_estimate(GOOD, 2, GEN, n_boot=5), KT, 2),
    ],
)
def test_bad_input_raises(call):
    with pytest.raises(ValueError):
        call()


def test_blockwise_importance_matches_exact_mixture():
    # Exact reference by construction: kept coordinates r in {0, 1} with p(r) = (0.3, 0.7),
    # conditional state probabilities p(s | r) known; proposals uniform over 3 states, so the
    # true importance weight is p(s | r) / (1/3) up to a per-block constant, which must cancel.
    rng = np.random.default_rng(11)
    p_r = np.array([0.3, 0.7])
    p_s_given_r = np.array([[0.6, 0.3, 0.1], [0.1, 0.2, 0.7]])
    n_blocks, k = 4000, 16
    r = rng.choice(2, size=n_blocks, p=p_r)
    s = rng.integers(0, 3, size=(n_blocks, k))
    offset = rng.normal(0, 5, size=(n_blocks, 1))  # arbitrary per-block normalisation
    log_w = np.log(p_s_given_r[r[:, None], s]) + offset
    blocks = np.repeat(np.arange(n_blocks), k)
    result = blockwise_importance_populations(
        s.ravel(), log_w.ravel(), blocks, 3, rng, n_boot=400)
    exact = p_r @ p_s_given_r
    # Self-normalisation within blocks of 16 has O(1/k) bias; the bound allows it and noise.
    np.testing.assert_allclose(result.populations, exact, atol=0.02)
    assert np.all(result.lower <= exact + 0.02) and np.all(exact - 0.02 <= result.upper)
    assert 0 < result.ess <= s.size
