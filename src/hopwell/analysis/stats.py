"""Statistics for conformer populations sampled by several walkers.

All arrays are batch-first: ``states`` has shape ``(n_walkers, n_samples)``
(or is a list of 1-D walker series of unequal length) and holds integer state
indices ``0 .. n_states - 1``.  Error bars come from bootstrap replicas that are
kept in the result, so derived quantities (free-energy differences) are
computed from the very same replicas.
"""

from dataclasses import dataclass

import numpy as np
from scipy import fft, special, stats

#: Block length of the block bootstrap, in units of the statistical
#: inefficiency g.  For blocks of length b the bootstrap variance of a walker
#: mean is biased low by roughly g / (2 b) (correlations cut at block joins)
#: plus b / n (centring on the walker's own mean, n samples); b = 10 g keeps
#: the first term near 5 % for walkers of a few hundred g or more.
BLOCK_FACTOR = 10.0

#: Pseudocount added to every state before taking logarithms in free-energy
#: differences (Jeffreys-style smoothing); never applied to populations.
PSEUDOCOUNT = 0.5

_CHUNK = 1 << 22  # maximum number of array elements built per bootstrap chunk


@dataclass(frozen=True)
class PopulationResult:
    """Populations of discrete states with bootstrap error bars.

    Attributes
    ----------
    populations : ndarray, shape (n_states,)
        Pooled fraction (or self-normalised weight) of samples in each state.
    lower, upper : ndarray, shape (n_states,)
        Interval at level ``confidence``: the percentile bootstrap interval, widened by
        :func:`floored_interval` where :func:`population_estimate` or the reweighting made it.
    replicates : ndarray, shape (n_boot, n_states)
        Bootstrap replicate populations; each row sums to one.
    confidence : float
        Coverage level of ``lower``/``upper``.
    n_samples : int
        Total number of samples pooled over walkers.
    statistical_inefficiency : float
        Inefficiency g that set the block length (1 for independent samples).
    block_length : int
        Bootstrap block length (1 for independent samples).
    ess : float
        Effective sample size, ``n_samples / g`` or Kish's ESS for weights.
    """

    populations: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    replicates: np.ndarray
    confidence: float
    n_samples: int
    statistical_inefficiency: float
    block_length: int
    ess: float


@dataclass(frozen=True)
class FreeEnergyResult:
    """Free-energy differences ``dG_i = G_i - G_ref`` in kJ/mol.

    Attributes
    ----------
    values, lower, upper : ndarray, shape (n_states,)
        Estimate and percentile interval; zero for the reference state.
    replicates : ndarray, shape (n_boot, n_states)
        Free-energy differences of each bootstrap replica.
    reference : int
        Index of the reference state.
    """

    values: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    replicates: np.ndarray
    reference: int


def _inefficiency_rows(x):
    """Statistical inefficiency of each row of a ``(n_series, n)`` float array.

    Geyer's initial monotone sequence estimator (Geyer 1992, Statistical
    Science 7:473): g = -1 + 2 sum_k Gamma_k with Gamma_k = rho_2k + rho_2k+1,
    truncated before the first non-positive pair and forced non-increasing.
    Autocorrelations come from a zero-padded FFT.  Constant rows give 1.
    """
    n = x.shape[1]
    d = x - x.mean(axis=1, keepdims=True)
    nfft = fft.next_fast_len(2 * n)
    f = fft.rfft(d, nfft, axis=1)
    acov = fft.irfft(f * f.conj(), nfft, axis=1)[:, :n]
    var = acov[:, :1]
    rho = np.divide(acov, var, out=np.zeros_like(acov), where=var > 0)
    gam = rho[:, : 2 * (n // 2)].reshape(len(x), -1, 2).sum(axis=2)
    keep = np.cumprod(gam > 0, axis=1).astype(bool)
    gam = np.minimum.accumulate(np.where(keep, gam, 0.0), axis=1)
    g = -1.0 + 2.0 * gam.sum(axis=1)
    return np.where(var[:, 0] > 0, np.maximum(g, 1.0), 1.0)


def statistical_inefficiency(x):
    """Statistical inefficiency ``g = 1 + 2 sum_t rho_t`` of a series.

    Parameters
    ----------
    x : array_like, shape (n_samples,)
        Real-valued time series.

    Returns
    -------
    float
        g >= 1 (Geyer's initial monotone sequence truncation); 1 for a
        constant series.
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or x.size < 1 or not np.all(np.isfinite(x)):
        raise ValueError("x must be a non-empty 1-D array of finite numbers")
    return float(_inefficiency_rows(x[None, :])[0])


def integrated_autocorrelation_time(x):
    """Integrated autocorrelation time ``tau = (g - 1) / 2`` in samples.

    Parameters
    ----------
    x : array_like, shape (n_samples,)
        Real-valued time series.

    Returns
    -------
    float
        tau >= 0, so that g = 1 + 2 tau.
    """
    return (statistical_inefficiency(x) - 1.0) / 2.0


def count_transitions(states_1d):
    """Number of changes of state along one series.

    Parameters
    ----------
    states_1d : array_like of int, shape (n_samples,)

    Returns
    -------
    int
    """
    s = np.asarray(states_1d)
    if s.ndim != 1 or not np.issubdtype(s.dtype, np.integer):
        raise ValueError("states_1d must be a 1-D integer array")
    return int(np.count_nonzero(np.diff(s)))


def _walkers(states, n_states):
    """Validate states; return a list of 1-D integer walker series."""
    if not isinstance(n_states, (int, np.integer)) or n_states < 1:
        raise ValueError("n_states must be a positive integer")
    if isinstance(states, (list, tuple)):
        walkers = [np.asarray(s) for s in states]
        if not walkers or any(s.ndim != 1 for s in walkers):
            raise ValueError("a list of walkers must hold 1-D arrays")
    else:
        arr = np.asarray(states)
        if arr.ndim != 2:
            raise ValueError("states must have shape (n_walkers, n_samples)")
        walkers = list(arr)
    for s in walkers:
        if s.size < 1 or not np.issubdtype(s.dtype, np.integer):
            raise ValueError("each walker must be a non-empty integer series")
        if s.min() < 0 or s.max() >= n_states:
            raise ValueError(f"state indices must lie in 0..{n_states - 1}")
    return walkers


def _check_boot(rng, n_boot, confidence):
    if not isinstance(rng, np.random.Generator):
        raise ValueError("rng must be a numpy.random.Generator")
    if not isinstance(n_boot, (int, np.integer)) or n_boot < 1:
        raise ValueError("n_boot must be a positive integer")
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must lie strictly between 0 and 1")


def _interval(replicates, confidence):
    alpha = 1.0 - confidence
    return np.quantile(replicates, [alpha / 2.0, 1.0 - alpha / 2.0], axis=0)


def jeffreys_interval(populations, n_eff, confidence):
    """Jeffreys interval of binomial proportions observed on ``n_eff`` effective samples.

    The equal-tailed interval of the Beta(x + 1/2, n_eff - x + 1/2) posterior with
    x = ``populations * n_eff``, its lower bound set to 0 where x = 0 and its upper bound to 1
    where x = n_eff (Brown, Cai & DasGupta 2001, Statist. Sci. 16:101, section 4.1.2). A
    correlated series of n samples with statistical inefficiency g carries about as much
    information as n / g independent ones, so x need not be an integer.

    Parameters
    ----------
    populations : array_like, shape (n_states,)
        Observed fractions in [0, 1].
    n_eff : float or array_like, shape (n_states,)
        Effective sample size, > 0.
    confidence : float
        Level of the interval, strictly between 0 and 1.

    Returns
    -------
    lower, upper : numpy.ndarray, shape (n_states,)
    """
    p = np.asarray(populations, dtype=float)
    n_eff = np.asarray(n_eff, dtype=float)
    if not np.all(np.isfinite(n_eff) & (n_eff > 0)):
        raise ValueError(f"n_eff must be positive and finite; got {n_eff}")
    if not np.all(np.isfinite(p) & (p >= 0) & (p <= 1)):
        raise ValueError(f"populations must lie in [0, 1]; got {p}")
    alpha = 1.0 - confidence
    x = p * n_eff
    lower = np.where(p > 0, special.betaincinv(x + 0.5, n_eff - x + 0.5, alpha / 2.0), 0.0)
    upper = np.where(p < 1, special.betaincinv(x + 0.5, n_eff - x + 0.5, 1.0 - alpha / 2.0), 1.0)
    return lower, upper


def _variance_matched_size(populations, replicates, n_eff):
    """Per state, ``min(n_eff, p (1 - p) / var)`` with var the replicas' variance of p.

    p (1 - p) / var is the number of independent samples that would give a proportion the
    replicas' variance (the design-effect view of an effective sample size, common practice).
    It is smaller than ``n_eff`` where the bootstrap sees more noise than the inefficiency
    does (walkers that disagree, resampled as units). States with var = 0 keep ``n_eff``.
    """
    p = np.asarray(populations, dtype=float)
    var = np.var(replicates, axis=0)
    spread = var > 0
    return np.where(spread, np.minimum(n_eff, p * (1.0 - p) / np.where(spread, var, 1.0)), n_eff)


def floored_interval(populations, replicates, n_eff, confidence):
    """Percentile interval of bootstrap replicas, widened to hold a Jeffreys interval.

    A resampling interval collapses onto 0 (or 1) when most replicas miss a rare state (or
    hold nothing else), although the samples show that the state (or another) exists. Each
    bound here is the more cautious of the percentile bound and the bound of
    :func:`jeffreys_interval` on ``min(n_eff, p (1 - p) / var)`` samples (var: the replicas'
    variance of p), except that a percentile bound at 0 or 1 is replaced by the Jeffreys
    bound, which is 0 only for a state never seen and 1 only for a state holding every
    sample. The smaller size keeps the Jeffreys interval from being narrower than a
    bootstrap that saw more noise than ``n_eff`` implies; only a bound at 0 or 1 can move
    inwards (four walkers trapped two and two in two states, resampled as units: the
    bootstrap's [0, 1] becomes the Jeffreys interval on about 4 samples, [0.12, 0.88]).

    Parameters
    ----------
    populations : array_like, shape (n_states,)
        The estimate.
    replicates : array_like, shape (n_boot, n_states)
        Bootstrap replicas of the populations.
    n_eff : float or array_like, shape (n_states,)
        Effective sample size of the estimate (of each state's fraction).
    confidence : float

    Returns
    -------
    lower, upper : numpy.ndarray, shape (n_states,)
    """
    lower, upper = _interval(replicates, confidence)
    size = _variance_matched_size(populations, replicates, n_eff)
    j_lower, j_upper = jeffreys_interval(populations, size, confidence)
    return (np.where(lower > 0, np.minimum(lower, j_lower), j_lower),
            np.where(upper < 1, np.maximum(upper, j_upper), j_upper))


def joint_level(replicates, confidence):
    """The per-state level at which percentile intervals hold every state's replica at once.

    The smallest level L in [confidence, 1 - (1 - confidence) / n_states] such that a share of
    at least ``confidence`` of the bootstrap replicas lies inside the level-L percentile
    interval of every state simultaneously: the bootstrap version of a simultaneous
    confidence region, calibrated on the replicas' own joint distribution (the percentile
    counterpart of the sup-t band, Montiel Olea & Plagborg-Moller 2019, J. Appl. Econometrics
    34:1). Independent states give Sidak's level ``confidence ** (1 / n_states)`` (Sidak 1967,
    J. Am. Stat. Assoc. 62:626); states that move together need less. The upper end is
    Bonferroni's level, which holds by the union bound and is returned when the search
    cannot do better.

    Parameters
    ----------
    replicates : array_like, shape (n_boot, n_states)
    confidence : float
        Joint level, strictly between 0 and 1.

    Returns
    -------
    float
    """
    reps = np.asarray(replicates, dtype=float)
    if reps.ndim != 2 or len(reps) < 1:
        raise ValueError("replicates must have shape (n_boot, n_states) with n_boot >= 1")
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must lie strictly between 0 and 1")

    def joint(level):
        lower, upper = _interval(reps, level)
        return np.mean(np.all((reps >= lower) & (reps <= upper), axis=1))

    low, high = confidence, 1.0 - (1.0 - confidence) / reps.shape[1]
    if joint(low) >= confidence:
        return low
    for _ in range(40):  # bisection on a monotone step function; 40 halvings reach 1e-13
        middle = 0.5 * (low + high)
        low, high = (low, middle) if joint(middle) >= confidence else (middle, high)
    return high


def joint_interval(result):
    """Intervals that hold every state's population at once, with probability ``result.confidence``.

    Each state's interval of :func:`floored_interval` at the per-state level of
    :func:`joint_level`, so they are never narrower than the state's own interval. One
    population interval at 95% misses its truth one time in twenty; of three states' intervals,
    some miss about one time in ten (``1 - 0.95 ** 3`` for independent states), so a statement
    about all states together needs these.

    Parameters
    ----------
    result : PopulationResult

    Returns
    -------
    lower, upper : numpy.ndarray, shape (n_states,)
    level : float
        The per-state level used.
    """
    level = joint_level(result.replicates, result.confidence)
    lower, upper = floored_interval(result.populations, result.replicates, result.ess, level)
    return lower, upper, level


def circular_block_counts(onehot, block, n_rep, rng):
    """State counts of ``n_rep`` circular block resamples of one walker.

    Moving-block bootstrap (Künsch 1989, Ann. Stat. 17:1217) with the series
    wrapped on a circle (Politis & Romano 1992), so every sample is equally
    likely and the replica mean is centred on the walker mean.  Blocks of
    ``block`` consecutive samples are concatenated and the last one is cut
    so each resample keeps the walker's length.  ``onehot`` has shape
    (n, n_states); returns (n_rep, n_states).
    """
    n, n_states = onehot.shape
    wrapped = np.concatenate([onehot, onehot[: block - 1]])
    cs = np.concatenate([np.zeros((1, n_states)), np.cumsum(wrapped, axis=0)])
    n_blocks = -(-n // block)
    lengths = np.full(n_blocks, block)
    lengths[-1] = n - block * (n_blocks - 1)
    step = max(1, _CHUNK // (n_blocks * n_states))
    out = [np.zeros((0, n_states))]
    for start in range(0, n_rep, step):
        s = rng.integers(0, n, size=(min(step, n_rep - start), n_blocks))
        out.append((cs[s + lengths] - cs[s]).sum(axis=1))
    return np.concatenate(out)


def population_estimate(states, n_states, rng, n_boot=1000, confidence=0.95,
                        resample_walkers=False, block_length=None):
    """Pooled state populations with block-bootstrap intervals.

    The block length is ``ceil(BLOCK_FACTOR * g)`` (at least 1, at most the
    shortest walker), where g is the largest over states of the
    length-weighted mean over walkers of the statistical inefficiency of the
    state indicator series.  Each walker is resampled within itself by the
    circular moving-block bootstrap (Künsch 1989; Politis & Romano 1992), so
    every replica keeps each walker's length; this assumes independent walkers
    that each sample the same equilibrium.  Intervals are slightly narrower
    than nominal when walkers span only a few blocks (see ``BLOCK_FACTOR``).
    Each interval is then widened to hold a Jeffreys interval on at most
    ``n / g`` effective samples (:func:`floored_interval`), so a state seen at
    least once never gets a lower bound of 0, nor one that missed some samples
    an upper bound of 1.

    With ``resample_walkers=True`` (and at least two walkers) walkers are first
    drawn with replacement as units and blocks are then resampled within
    each drawn walker.  This two-stage scheme counts within-walker noise
    twice, so its intervals are conservative (wider than nominal) for
    well-mixed walkers, but it still reflects disagreement between walkers
    trapped in different states, which within-walker resampling cannot see.

    A state absent from a replica gets population 0 there; the pseudocount
    ``PSEUDOCOUNT`` is used only by :func:`free_energy_differences`.

    Parameters
    ----------
    states : array_like of int, shape (n_walkers, n_samples), or list of 1-D
        State index of every sample of every walker.
    n_states : int
        Number of states.
    rng : numpy.random.Generator
    n_boot : int
        Number of bootstrap replicas.
    confidence : float
        Level of the percentile intervals.
    resample_walkers : bool
        Use the two-stage (walkers, then blocks) scheme described above.
    block_length : int, optional
        Override the automatic block length.

    Returns
    -------
    PopulationResult
        ``ess = n_samples / g``.
    """
    walkers = _walkers(states, n_states)
    _check_boot(rng, n_boot, confidence)
    eye = np.eye(n_states)
    onehots = [eye[s] for s in walkers]
    lengths = np.array([len(s) for s in walkers])
    g_walk = np.array([_inefficiency_rows(oh.T) for oh in onehots])
    g = float(np.max(lengths @ g_walk / lengths.sum()))
    if block_length is None:
        block_length = int(np.ceil(BLOCK_FACTOR * g))
    elif not isinstance(block_length, (int, np.integer)) or block_length < 1:
        raise ValueError("block_length must be a positive integer")
    block = int(min(block_length, lengths.min()))
    n_walk = len(walkers)
    if resample_walkers and n_walk > 1:
        chosen = rng.integers(0, n_walk, size=(n_boot, n_walk))
    else:
        chosen = np.broadcast_to(np.arange(n_walk), (n_boot, n_walk))
    counts = np.zeros((n_boot, n_states))
    for j, oh in enumerate(onehots):
        rows = np.nonzero(chosen == j)[0]
        np.add.at(counts, rows, circular_block_counts(oh, block, len(rows), rng))
    reps = counts / counts.sum(axis=1, keepdims=True)
    n = int(lengths.sum())
    pooled = np.sum([oh.sum(axis=0) for oh in onehots], axis=0) / n
    lo, hi = floored_interval(pooled, reps, n / g, confidence)
    return PopulationResult(pooled, lo, hi, reps, confidence, n, g, block, n / g)


def kish_ess(log_weights):
    """Kish effective sample size ``(sum w)^2 / sum w^2`` from log-weights.

    Parameters
    ----------
    log_weights : array_like, shape (n_samples,)
        Unnormalised log-weights; ``-inf`` means zero weight.

    Returns
    -------
    float
        Between 1 and n_samples.
    """
    lw = np.asarray(log_weights, dtype=float)
    if lw.ndim != 1 or np.any(np.isnan(lw)) or np.any(lw == np.inf):
        raise ValueError("log_weights must be a 1-D array without nan or +inf")
    if not np.any(np.isfinite(lw)):
        raise ValueError("at least one log-weight must be finite")
    return float(np.exp(2.0 * special.logsumexp(lw) - special.logsumexp(2.0 * lw)))


def free_energy_differences(result, kT, reference=None):
    """Free-energy differences ``dG_i = -kT ln(p_i / p_ref)`` in kJ/mol.

    Populations are smoothed as ``(p N + PSEUDOCOUNT) / (N + PSEUDOCOUNT K)``
    (N = ``result.n_samples``, K states) in the estimate and in every replica,
    so a state never observed gets a finite, large dG instead of log(0).
    Intervals are percentiles over the replicas of ``result``.

    Parameters
    ----------
    result : PopulationResult
    kT : float
        Thermal energy in kJ/mol (divide results by 4.184 for kcal/mol).
    reference : int, optional
        Reference state; default the most populated one.

    Returns
    -------
    FreeEnergyResult
    """
    if not np.isfinite(kT) or kT <= 0:
        raise ValueError("kT must be a positive finite energy in kJ/mol")
    n_states = len(result.populations)
    ref = int(np.argmax(result.populations)) if reference is None else reference
    if not isinstance(ref, (int, np.integer)) or not 0 <= ref < n_states:
        raise ValueError(f"reference must be a state index in 0..{n_states - 1}")
    n = result.n_samples

    def dg(p):
        smooth = (p * n + PSEUDOCOUNT) / (n + PSEUDOCOUNT * n_states)
        return -kT * np.log(smooth / smooth[..., ref:ref + 1])

    reps = dg(result.replicates)
    lo, hi = _interval(reps, result.confidence)
    return FreeEnergyResult(dg(result.populations), lo, hi, reps, int(ref))


def _rhat_core(z):
    """Classic Gelman-Rubin R-hat of (n_chains, n_draws) draws."""
    n = z.shape[1]
    within = z.var(axis=1, ddof=1).mean()
    between = n * z.mean(axis=1).var(ddof=1)
    if within == 0:
        return np.nan if between == 0 else np.inf
    return float(np.sqrt(((n - 1) / n * within + between / n) / within))


def _rank_normalize(x):
    r = stats.rankdata(x, method="average").reshape(x.shape)
    return stats.norm.ppf((r - 0.375) / (x.size + 0.25))


def split_rhat(chains):
    """Rank-normalised split R-hat (Vehtari et al. 2021, Bayesian Anal. 16:667).

    Each chain is split in halves (the middle draw is dropped when the length
    is odd); the returned value is the larger of the bulk (rank-normalised)
    and tail (rank-normalised folded ``|x - median|``) split R-hat.  For 0/1
    indicator series rank normalisation is an affine map of the raw values,
    so the result equals the classic split R-hat of the raw indicators.

    Parameters
    ----------
    chains : array_like, shape (n_chains, n_draws)
        ``n_draws >= 4``.

    Returns
    -------
    float
        nan for constant input; inf when every split chain is constant but
        they disagree (chains stuck in different states).
    """
    x = np.asarray(chains, dtype=float)
    if x.ndim != 2 or x.shape[1] < 4 or not np.all(np.isfinite(x)):
        raise ValueError("chains must be a finite (n_chains, n_draws>=4) array")
    half = x.shape[1] // 2
    x = np.concatenate([x[:, :half], x[:, -half:]])
    bulk = _rhat_core(_rank_normalize(x))
    tail = _rhat_core(_rank_normalize(np.abs(x - np.median(x))))
    return float(np.fmax(bulk, tail))


def blockwise_importance_populations(states, log_weights, blocks, n_states, rng, n_boot=1000,
                                     confidence=0.95):
    """Populations from blocks of importance-weighted proposals, normalised within each block.

    Each block shares the coordinates a proposal keeps (a walker state); within a block the
    self-normalised weights estimate the conditional populations given those coordinates,
    and the blocks, whose kept coordinates follow the chain, are averaged with equal weight.
    A per-block constant in the log-weights therefore cancels. Intervals come from resampling
    whole blocks (the iid bootstrap over blocks).

    Parameters
    ----------
    states : array_like of int, shape (n_samples,)
    log_weights : array_like, shape (n_samples,)
        ``-inf`` for proposals with zero target density (guard rejections).
    blocks : array_like of int, shape (n_samples,)
        Block label of each proposal.
    n_states : int
    rng : numpy.random.Generator
    n_boot : int
    confidence : float

    Returns
    -------
    PopulationResult
        ``ess`` is the sum over blocks of Kish's effective sample size; ``n_samples`` counts
        blocks with any finite weight; ``statistical_inefficiency`` is n_proposals / ess.
    """
    s = np.asarray(states)
    lw = np.asarray(log_weights, dtype=float)
    b = np.asarray(blocks)
    if not (s.shape == lw.shape == b.shape) or s.ndim != 1:
        raise ValueError("states, log_weights and blocks must be 1-D arrays of equal length")
    (s,) = _walkers([s], n_states)
    _check_boot(rng, n_boot, confidence)
    _, block_index = np.unique(b, return_inverse=True)
    finite = np.isfinite(lw)
    block_max = np.full(block_index.max() + 1, -np.inf)
    np.maximum.at(block_max, block_index[finite], lw[finite])
    usable = np.isfinite(block_max)
    w = np.zeros(len(lw))
    w[finite] = np.exp(lw[finite] - block_max[block_index[finite]])
    per_block = np.zeros((len(block_max), n_states))
    np.add.at(per_block, (block_index, s), w)
    total = per_block.sum(1)
    sq = np.zeros(len(block_max))
    np.add.at(sq, block_index, w ** 2)
    per_block = per_block[usable] / total[usable, None]
    if len(per_block) == 0:
        raise ValueError("no block has a proposal with finite weight")
    ess = float(np.sum(total[usable] ** 2 / sq[usable]))
    picks = rng.integers(0, len(per_block), size=(n_boot, len(per_block)))
    replicates = per_block[picks].mean(1)
    lower, upper = _interval(replicates, confidence)
    return PopulationResult(per_block.mean(0), lower, upper, replicates, confidence,
                            int(len(per_block)), float(len(s) / ess), 1, ess)
