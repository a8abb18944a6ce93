"""Each rule of the convergence verdict made to fire alone, and all of them silent on clean data.

The state series are constructed so that exactly one rule fires; where isolating a rule needs a
particular construction, the test says why. Figures used throughout (approximations, derived
here for stationary chains): a walker half of n/2 samples of a state indicator with variance s^2
and statistical inefficiency g has a mean of variance about s^2 g / (n/2), so the split R-hat
of W walkers obeys R^2 - 1 ~ 2 g / n = 2 W / ESS (ESS = W n / g). Hence on a random series an
ESS below 100 or a block (10 g) longer than the walkers makes R-hat exceed 1.01 as well, and
the ESS and block rules fire alone only on series whose halves agree exactly (periodic ones).
"""

import numpy as np
import pytest

from hopwell.analysis.stats import population_estimate
from hopwell.analysis.verdict import (
    MIN_ESS,
    MIN_TRANSITIONS,
    RHAT_MAX,
    first_entered_in_production,
    judge,
)

# One fragment of each reason's text, by rule.
REASONS = {
    "one walker": "was seen by one walker only",
    "split R-hat": "split R-hat",
    "transitions": "transitions between states",
    "block": "shorter than one bootstrap block",
    "ess": "effective sample size",
    "one state": "every sample is in state",
}


def verdict_of(series, n_states, named=None, importance=None):
    """The verdict of ``series`` (states named s0, s1, ...) and its population estimate."""
    estimate = population_estimate(series, n_states, np.random.default_rng(0), n_boot=200)
    names = [f"s{k}" for k in range(n_states)]
    return judge(series, estimate, names, named or [False] * n_states, importance), estimate


def rules_fired(verdict):
    """The rules behind the verdict's reasons; every reason must belong to exactly one rule."""
    for reason in verdict.reasons:
        assert sum(fragment in reason for fragment in REASONS.values()) == 1, reason
    return {rule for rule, fragment in REASONS.items() if any(fragment in r for r in verdict.reasons)}


def transitions(series):
    """Changes of state along each walker, summed (counted here with numpy, not hopwell)."""
    return int(np.count_nonzero(np.diff(series, axis=1)))


def iid_series(seed, n_walkers=4, n_samples=5000, n_states=3):
    """Independent uniform draws: well mixed by construction."""
    return np.random.default_rng(seed).integers(0, n_states, size=(n_walkers, n_samples))


def test_clean_iid_series_is_converged():
    series = iid_series(1)
    verdict, estimate = verdict_of(series, 3)
    assert verdict.reasons == [] and verdict.warnings == [] and verdict.converged
    assert verdict.label == "converged"
    assert verdict.walkers_seen == [4, 4, 4] and verdict.transitions == transitions(series)
    assert max(verdict.split_rhat.values()) < RHAT_MAX and estimate.ess > MIN_ESS


def test_state_seen_by_one_walker_only():
    # Two walkers share states 0 and 1; walker 0 alone visits state 2, every 80th sample
    # (1.25% of its samples, 0.6% pooled, above the 0.5% population floor). The split halves'
    # state-2 means are f, f, 0, 0 (f = 1/80), so R^2 - 1 ~ 2 f / (3 (1 - f)) = 0.008 and
    # R-hat stays near 1.004: the rule is isolated only because the state is rare (with two
    # walkers, for f above about 3% R-hat fires too).
    series = np.random.default_rng(2).integers(0, 2, size=(2, 10000))
    series[0, ::80] = 2
    verdict, _ = verdict_of(series, 3)
    assert rules_fired(verdict) == {"one walker"}
    assert verdict.reasons == ["state s2 was seen by one walker only"]
    assert verdict.walkers_seen == [2, 2, 1]
    assert verdict.split_rhat["s2"] < RHAT_MAX


def test_split_rhat_of_a_slowly_mixing_series():
    # Eight two-state Markov chains switching with probability 1/600 per step (g ~ 600),
    # 20000 steps each: ESS ~ 270 and about 270 transitions, but R^2 - 1 ~ 2 W / ESS ~ 0.06.
    rng = np.random.default_rng(3)
    flips = rng.random((8, 20000)) < 1.0 / 600.0
    flips[:, 0] = False
    series = (np.arange(8)[:, None] % 2 + np.cumsum(flips, axis=1)) % 2
    verdict, estimate = verdict_of(series, 2)
    assert rules_fired(verdict) == {"split R-hat"}
    worst = max(verdict.split_rhat, key=verdict.split_rhat.get)
    assert verdict.reasons == [f"split R-hat {verdict.split_rhat[worst]:.3f} > {RHAT_MAX} for state {worst}"]
    assert verdict.split_rhat[worst] > 1.02
    assert estimate.ess > MIN_ESS and estimate.block_length < series.shape[1]


def test_too_few_transitions():
    # Two walkers cycle 4 times through 20 states, 50 samples in each: 2 (20 x 4 - 1) = 158
    # transitions, fewer than 10 per populated state (200). For such regular cycles the ESS is
    # about T K / (K - 1) (T transitions, K states; it is half that for random dwell times), so
    # with fewer than about 10 states "too few transitions" cannot fire without "ESS < 100":
    # the rule is isolated here by the number of states.
    walker = np.repeat(np.tile(np.arange(20), 4), 50)
    series = np.stack([walker, walker])
    verdict, estimate = verdict_of(series, 20)
    assert rules_fired(verdict) == {"transitions"}
    assert transitions(series) == 158 < MIN_TRANSITIONS * 20
    assert verdict.reasons == ["only 158 transitions between states"]
    assert estimate.ess > MIN_ESS


def test_series_shorter_than_one_block():
    # Forty walkers each 250 samples in state 0, 500 in state 1, 250 in state 0: both halves of
    # every walker have mean 1/2, so R-hat is below 1; the indicator's autocorrelation falls
    # to zero near lag n/5, so g ~ n/5 and the block (10 g) exceeds the walker, while the
    # forty walkers give an ESS near 200 and 80 transitions.
    walker = np.repeat([0, 1, 0], [250, 500, 250])
    series = np.stack([walker] * 40)
    verdict, estimate = verdict_of(series, 2)
    assert rules_fired(verdict) == {"block"}
    assert estimate.block_length == series.shape[1]
    assert estimate.ess > MIN_ESS and transitions(series) == 80


def test_too_few_effective_samples():
    # Two walkers, each six periods of a square wave (100 samples in state 0, 100 in state 1):
    # 22 transitions (at least 10 per state) and equal halves (R-hat below 1), but g ~ 50 (the
    # quarter period where the autocorrelation first vanishes), so ESS ~ 2400 / 50 < 100.
    walker = np.tile(np.repeat([0, 1], 100), 6)
    series = np.stack([walker, walker])
    verdict, estimate = verdict_of(series, 2)
    assert rules_fired(verdict) == {"ess"}
    assert estimate.ess < MIN_ESS and estimate.block_length < series.shape[1]
    assert verdict.reasons == [f"effective sample size {estimate.ess:.0f} < {MIN_ESS}"]


@pytest.mark.parametrize("named", [True, False])
def test_named_state_never_visited_is_a_warning(named):
    # The clean series with a fourth state nobody visits: warned about only when it was named
    # before the run; never a reason (its population is 0, below the floor of every rule).
    verdict, _ = verdict_of(iid_series(4), 4, named=[False, False, False, named])
    assert verdict.reasons == [] and verdict.walkers_seen[3] == 0
    expected = ("never visited: s3 (their populations are upper bounds only; seed a structure"
                " there if one is known)")
    assert verdict.warnings == ([expected] if named else [])


def test_every_sample_in_one_state():
    # Four walkers that never leave state 0 of a two-state model (an amide's trans with cis never
    # reached): only this rule fires; the same series with one visit to state 1 does not fire it.
    series = np.zeros((4, 2000), dtype=int)
    verdict, _ = verdict_of(series, 2)
    assert rules_fired(verdict) == {"one state"}
    assert verdict.reasons == ["every sample is in state s0: the other 1 state(s) were never visited,"
                               " so nothing bounds them"]
    series[2, 1000] = 1
    verdict, _ = verdict_of(series, 2)
    assert not any(r.startswith("every sample") for r in verdict.reasons)


def test_one_populated_state_with_rare_visits_needs_transitions():
    # The calibration's false "converged", rebuilt: four walkers in state 0, one sample of one
    # walker in state 1 (below the population floor, so the one-walker and R-hat rules skip
    # it), the indicator's inefficiency 1 and the ESS the sample count. Its 2 transitions must
    # make it "not converged"; the same series with 12 single-sample visits spread over the
    # walkers (24 transitions, still below the floor) must not.
    series = np.zeros((4, 2000), dtype=int)
    series[2, 1000] = 1
    verdict, estimate = verdict_of(series, 2)
    assert estimate.populations[1] < 0.005 and estimate.ess > MIN_ESS
    assert rules_fired(verdict) == {"transitions"}
    assert verdict.reasons == ["only 2 transitions between states"]
    for k in range(12):
        series[k % 4, 100 + 150 * k] = 1
    verdict, _ = verdict_of(series, 2)
    assert transitions(series) == 24 and verdict.reasons == []


def importance_like(estimate, shift=0.0, effective_samples=5000.0, proposals=10000):
    """An importance estimate whose intervals are the MCMC ones moved by ``shift``."""
    return {"populations": list(estimate.populations + shift),
            "ci95": [[lo + shift, hi + shift] for lo, hi in zip(estimate.lower, estimate.upper)],
            "effective_samples": effective_samples, "proposals": proposals}


def test_importance_warnings_each_alone():
    series = iid_series(5)
    _, estimate = verdict_of(series, 3)
    agree, _ = verdict_of(series, 3, importance=importance_like(estimate))
    assert agree.reasons == [] and agree.warnings == []
    # Shifted by 0.2, far beyond the intervals (about 0.01 wide) of every state.
    apart, _ = verdict_of(series, 3, importance=importance_like(estimate, shift=0.2))
    assert apart.reasons == []
    assert apart.warnings == ["MCMC and importance-sampling estimates disagree for s0, s1, s2"]
    heavy, _ = verdict_of(series, 3, importance=importance_like(estimate, effective_samples=900.0))
    assert heavy.reasons == []
    assert heavy.warnings == ["heavy-tailed importance weights (ESS 900 of 10000 proposals)"]


def test_states_first_entered_in_production_are_named_and_warned_about():
    names = ["A", "B", "C", "other"]
    production = np.array([0, 0, 1, 2, 3, 1])
    training = np.array([0, 0, 1, 3])
    # C (2) appears only in production; "other" (3) never counts; no training, no comparison.
    assert first_entered_in_production(production, training, names) == ["C"]
    assert first_entered_in_production(production, np.array([0, 1, 2]), names) == []
    assert first_entered_in_production(production, np.zeros(0, int), names) == []
    series = np.tile(np.array([0, 1] * 200), (2, 1))
    estimate = population_estimate(series, 4, np.random.default_rng(0))
    quiet = judge(series, estimate, names, [False] * 4)
    loud = judge(series, estimate, names, [False] * 4, late_states=["C"])
    assert not any("first entered in production" in w for w in quiet.warnings)
    assert any("first entered in production" in w and "C" in w for w in loud.warnings)
    assert loud.reasons == quiet.reasons  # a warning, not a reason
