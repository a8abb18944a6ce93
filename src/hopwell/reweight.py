"""Reweighting a run's production samples to another temperature or Hamiltonian.

Each stored sample x_i, drawn at temperature T from energy U, gets the importance weight
w_i = exp(-U'(x_i)/kT' + U(x_i)/kT) for the new state (U', T'). Populations are
self-normalised weighted fractions; intervals come from the iid bootstrap of the chain
thinned by its statistical inefficiency (every ceil(g)-th sample of each walker), so that the
resampled samples are close to independent.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from hopwell import stats
from hopwell.energy import EnergyEvaluator, kT_kj
from hopwell.errors import InputError
from hopwell.store import RunStore
from hopwell.systems.builder import BuildOptions, build

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

    The production positions are re-read chunk by chunk in the order the report gathers
    them, so the weights line up with ``energy_kj``.
    """
    config = store.config()
    options = replace(BuildOptions(**config["build"]), **overrides)
    molsys = build(config["input"], options)
    evaluator = EnergyEvaluator(molsys.system, temperature_K)
    if evaluator.n_atoms != len(next(iter(store.iter_chunks()))["state_positions_nm"][0]):
        raise InputError("the reweighting system has a different number of atoms from the run")
    new = []
    for chunk in store.iter_chunks():
        keep = chunk["state_production"].astype(bool)
        if keep.any():
            new.append(evaluator.energies_kj(chunk["state_positions_nm"][keep].astype(float)))
    new_kj = np.concatenate(new)
    if len(new_kj) != len(energy_kj):
        raise ValueError("reweighting energies and production samples are misaligned")
    return -(new_kj - energy_kj) / kT_kj(temperature_K)


def reweighted_populations(series: np.ndarray, log_w_series: np.ndarray, n_states: int,
                           inefficiency: float, rng: np.random.Generator, n_boot: int = 1000):
    """Weighted populations from per-walker series, shape ``(n_walkers, n_samples)`` each.

    Raises
    ------
    InputError
        When Kish's effective sample size of the thinned, weighted sample is below
        ``MIN_REWEIGHT_ESS``: the new state overlaps too little with the sampled one.
    """
    step = max(1, math.ceil(inefficiency))
    states = series[:, ::step].ravel()
    log_w = log_w_series[:, ::step].ravel()
    ess = stats.kish_ess(log_w)
    if ess < MIN_REWEIGHT_ESS:
        raise InputError(
            f"reweighting refused: effective sample size {ess:.0f} < {MIN_REWEIGHT_ESS}"
            " (too little overlap); sample the new conditions directly"
        )
    return stats.self_normalized_populations(states, log_w, n_states, rng, n_boot=n_boot)
