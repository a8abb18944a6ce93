"""Reweighting a run's production samples to another temperature or Hamiltonian.

Each stored sample x_i, drawn at temperature T from energy U, gets the importance weight
w_i = exp(-U'(x_i)/kT' + U(x_i)/kT) for the new state (U', T'). Populations are
self-normalised weighted fractions p_k = sum_i w_i [s_i = k] / sum_i w_i over every production
sample. Their intervals come from the circular moving-block bootstrap within each walker
(Kuensch 1989, Ann. Stat. 17:1217; Politis & Romano 1992), resampling (state, weight) pairs
in blocks of ceil(BLOCK_FACTOR g), where g is the largest statistical inefficiency over states
of the linearised ratio estimator's series w_i ([s_i = k] - p_k) (the delta method for a ratio
of means): it carries the correlation of the weights as well as of the states. As for
unweighted populations, each interval is widened to hold a Jeffreys interval
(:func:`hopwell.analysis.stats.floored_interval`), here on each state's delta-method effective
sample size p (1 - p) / var(p): Kish's ESS describes the weights, not a state's fraction, and
as the Jeffreys size it made intervals over-cover (99.5% for 95% intervals, measured on the
chain of tests/test_reweight_hamiltonian.py; 94.5-97% with the delta-method size).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from hopwell.analysis import stats
from hopwell.errors import InputError
from hopwell.sampling.store import RunStore
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator, kT_kj

# Temperatures further than this fraction from the run's are refused: the overlap of the
# energy distributions of a small molecule falls off within tens of kelvin (chosen).
TEMPERATURE_WINDOW = 0.2
MIN_REWEIGHT_ESS = 100


def temperature_log_weights(energy_kj: np.ndarray, temperature_K: float, new_temperature_K: float) -> np.ndarray:
    """log w = -U (1/kT' - 1/kT), shape like ``energy_kj``; refuses T' outside the window."""
    if not abs(new_temperature_K - temperature_K) <= TEMPERATURE_WINDOW * temperature_K:
        raise InputError(
            f"reweighting from {temperature_K:g} K to {new_temperature_K:g} K is outside the"
            f" {100 * TEMPERATURE_WINDOW:.0f}% window; run at the new temperature instead"
        )
    return -np.asarray(energy_kj) * (1.0 / kT_kj(new_temperature_K) - 1.0 / kT_kj(temperature_K))


def hamiltonian_log_weights(store: RunStore, overrides: dict, temperature_K: float,
                            energy_kj: np.ndarray) -> np.ndarray:
    """log w = -(U' - U)/kT with U' from the same input built with ``overrides``.

    The production positions are re-read chunk by chunk in the order the report gathers them
    (:func:`~hopwell.sampling.shards.iter_pooled_chunks`: a sharded run's shards too, damaged
    chunks skipped), so the weights line up with ``energy_kj``.
    """
    from hopwell.sampling.shards import iter_pooled_chunks

    config = store.config()
    options = replace(BuildOptions(**config["build"]), **overrides)
    molsys = build(config["input"], options)
    evaluator = EnergyEvaluator(molsys.system, temperature_K)
    new = []
    for chunk in iter_pooled_chunks(store):
        if chunk["state_positions_nm"].shape[1] != evaluator.n_atoms:
            raise InputError("the reweighting system has a different number of atoms from the run")
        keep = chunk["state_production"].astype(bool)
        if keep.any():
            new.append(evaluator.energies_kj(chunk["state_positions_nm"][keep].astype(float)))
    new_kj = np.concatenate(new)
    if len(new_kj) != len(energy_kj):
        raise ValueError("reweighting energies and production samples are misaligned")
    return -(new_kj - energy_kj) / kT_kj(temperature_K)


def _influence_inefficiencies(states: np.ndarray, weights: np.ndarray, populations: np.ndarray) -> np.ndarray:
    """Per state, the walker-averaged inefficiency of w_i ([s_i = k] - p_k), shape ``(n_states,)``.

    ``states`` and ``weights`` have shape ``(n_walkers, n_samples)``; constant series (a state
    never seen) count as g = 1. One state and one walker at a time, to keep memory flat.
    """
    return np.array([np.mean([stats.statistical_inefficiency(w * ((s == k) - p_k))
                              for s, w in zip(states, weights)])
                     for k, p_k in enumerate(populations)])


def _delta_method_sizes(states: np.ndarray, weights: np.ndarray, populations: np.ndarray,
                        g_states: np.ndarray, fallback: float) -> np.ndarray:
    """Per state, p (1 - p) / var(p), var from the delta method for a ratio of means.

    var(p_k) = g_k sum_i w_i^2 ([s_i = k] - p_k)^2 / (sum_i w_i)^2 (the linearised estimator's
    variance, its correlation counted by g_k): the number of independent unweighted samples
    that would pin p_k down as well. States with var = 0 (never seen, or holding every weight)
    get ``fallback``. Shape ``(n_states,)``.
    """
    sq = np.array([np.sum(weights ** 2 * ((states == k) - p_k) ** 2) for k, p_k in enumerate(populations)])
    var = g_states * sq / np.sum(weights) ** 2
    spread = (var > 0) & (populations > 0) & (populations < 1)
    return np.where(spread, populations * (1.0 - populations) / np.where(spread, var, 1.0), fallback)


def reweighted_populations(series: np.ndarray, log_w_series: np.ndarray, n_states: int,
                           rng: np.random.Generator, n_boot: int = 1000,
                           confidence: float = 0.95) -> stats.PopulationResult:
    """Self-normalised weighted populations with block-bootstrap intervals.

    Parameters
    ----------
    series : numpy.ndarray of int, shape ``(n_walkers, n_samples)``
        State index of each production sample, in time order within each walker.
    log_w_series : numpy.ndarray, shape ``(n_walkers, n_samples)``
        Log importance weight of each sample (up to a constant); -inf is weight zero.
    n_states : int
    rng : numpy.random.Generator
    n_boot : int
    confidence : float

    Returns
    -------
    hopwell.analysis.stats.PopulationResult
        ``statistical_inefficiency`` is g of the weighted series (see the module docstring),
        ``block_length`` the bootstrap block, ``ess`` Kish's effective sample size over g;
        ``lower`` and ``upper`` as from :func:`hopwell.analysis.stats.floored_interval`.

    Raises
    ------
    ValueError
        When the arrays differ in shape or are not 2-D, or a log weight is nan or +inf.
    InputError
        When the effective sample size is below ``MIN_REWEIGHT_ESS``: the new state overlaps
        too little with the sampled one.
    """
    states = np.asarray(series)
    log_w = np.asarray(log_w_series, dtype=float)
    if states.ndim != 2 or states.shape != log_w.shape:
        raise ValueError(f"series and log_w_series must be 2-D of one shape; got {states.shape}"
                         f" and {log_w.shape}")
    if np.any(np.isnan(log_w) | (log_w == np.inf)) or not np.any(np.isfinite(log_w)):
        raise ValueError("log_w_series must hold no nan or +inf and at least one finite value")
    weights = np.exp(log_w - log_w.max())
    per_state = np.bincount(states.ravel(), weights.ravel(), minlength=n_states)
    populations = per_state / per_state.sum()  # each part <= its total: populations stay in [0, 1]
    g_states = _influence_inefficiencies(states, weights, populations)
    g = float(g_states.max())
    ess = stats.kish_ess(log_w.ravel()) / g
    if ess < MIN_REWEIGHT_ESS:
        raise InputError(
            f"reweighting refused: effective sample size {ess:.0f} < {MIN_REWEIGHT_ESS}"
            " (too little overlap); sample the new conditions directly"
        )
    block = int(min(math.ceil(stats.BLOCK_FACTOR * g), states.shape[1]))
    eye = np.eye(n_states)
    totals = sum(stats.circular_block_counts(w[:, None] * eye[s], block, n_boot, rng)
                 for s, w in zip(states, weights))
    replicates = totals / totals.sum(axis=1, keepdims=True)
    sizes = _delta_method_sizes(states, weights, populations, g_states, ess)
    lower, upper = stats.floored_interval(populations, replicates, sizes, confidence)
    return stats.PopulationResult(populations, lower, upper, replicates, confidence,
                                  int(states.size), g, block, ess)
