"""The convergence verdict: rules that each make a run "not converged", and warnings.

Every rule reads the per-walker state series and the population estimate only, so each can be
made to fire, or stay silent, on a constructed series (``tests/test_verdict.py``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from hopwell.analysis import stats
from hopwell.analysis.states import POPULATION_FLOOR

RHAT_MAX = 1.01  # Vehtari et al. 2021 recommend trusting estimates only below 1.01
MIN_TRANSITIONS = 10  # per populated state, pooled over walkers (common practice, chosen)
MIN_ESS = 100
MIN_IS_ESS_FRACTION = 0.1  # importance ESS below 10% of proposals: weights too heavy-tailed
# A basin found in production is weighed against the lowest known minimum by its energy alone,
# times e^3 for what its vibrational entropy could add (about 6 cal/(mol K) in its favour: a
# chosen allowance, wider than the entropy differences between a molecule's own rotamers
# usually are, a judgement rather than a measured bound).
ENTROPY_ALLOWANCE = 3.0


@dataclass
class Verdict:
    """The verdict's reasons (each makes the run "not converged"), warnings and the figures
    behind them."""

    reasons: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    split_rhat: dict[str, float] = field(default_factory=dict)
    walkers_seen: list[int] = field(default_factory=list)
    transitions: int = 0

    @property
    def converged(self) -> bool:
        return not self.reasons

    @property
    def label(self) -> str:
        return "converged" if self.converged else "not converged"


def first_entered_in_production(production_labels: np.ndarray, training_labels: np.ndarray,
                                names: list[str]) -> list[str]:
    """States (not the last, "other") that production visited and training never did.

    Training starts from the seeds, so such a state was reached only by sampling, late: its
    basin was missing from the seeds and from the flow's training data. Empty when there was
    no training phase to compare with.
    """
    if len(training_labels) == 0:
        return []
    late = set(np.unique(production_labels).tolist()) - set(np.unique(training_labels).tolist())
    return [names[s] for s in sorted(late) if s != len(names) - 1]


def late_basin_bound(above_lowest_kj: list[float], kT_kj: float) -> float:
    """At most how much weight basins found in production can carry, by their energies.

    Each basin's Boltzmann factor relative to the lowest known minimum, ``exp(-dE / kT)``, times
    ``exp(ENTROPY_ALLOWANCE)`` for a vibrational entropy larger than the minimum's, summed over
    the basins. The whole distribution weighs at least as much as the lowest minimum's basin, so
    this bounds their share of it as far as the harmonic picture and the allowance hold.

    Parameters
    ----------
    above_lowest_kj : list of float
        Each basin's minimized energy above the lowest known minimum (kJ/mol).
    kT_kj : float
        kT at the run's temperature (kJ/mol).

    Returns
    -------
    float
    """
    above = np.asarray(above_lowest_kj, dtype=float)
    return float(np.exp(ENTROPY_ALLOWANCE - above / kT_kj).sum())


def judge(series: np.ndarray, estimate: stats.PopulationResult, names: list[str],
          named: list[bool], importance: dict | None = None, local_move: dict | None = None,
          found_basins: list[dict] | None = None, late_states: list[str] | None = None,
          kT_kj: float | None = None) -> Verdict:
    """Apply the verdict's rules to a run.

    Parameters
    ----------
    series : numpy.ndarray of int, shape ``(n_walkers, n_per_walker)``
        State labels per walker in time order.
    estimate : PopulationResult
        From :func:`hopwell.analysis.stats.population_estimate` on ``series``.
    names : list of str
        State names, indexed by label.
    named : list of bool
        Which states were named before the run (backbone regions, a user's states): one never
        visited is warned about, since a missed basin looks just like that.
    importance : dict, optional
        The frozen flow's importance estimate (``populations``, ``ci95``, ``effective_samples``,
        ``proposals``); its disagreements are warnings, not reasons, because blockwise
        normalization biases it by O(1 / block size) (DEVELOPERS.md).
    local_move : dict, optional
        ``segments``, ``rolled_back`` and ``states_failing_guard`` of the Langevin move
        (:func:`hopwell.analysis.summary.local_move_counts`): segments undone after the fact and
        production states outside the guard, where the Monte Carlo moves are not reversible, are
        warned about (both are expected to be 0).
    found_basins : list of dict, optional
        The basin probes' finds (:mod:`hopwell.sampling.probes`; ``production``,
        ``above_lowest_kj``): those found in production, which no move targets, make the run "not
        converged" unless ``kT_kj`` is given and :func:`late_basin_bound` puts their weight below
        the report's population floor, when they are a warning; those found in training (dart
        centres from then on) are a warning.
    late_states : list of str, optional
        States first entered in production (:func:`first_entered_in_production`): a warning,
        since their basins were missing from the seeds.
    kT_kj : float, optional
        The run's kT, to weigh the basins found in production by their energies.

    Returns
    -------
    Verdict
    """
    n_states = len(names)
    n_walkers = series.shape[0]
    out = Verdict()
    out.walkers_seen = [int((series == s).any(axis=1).sum()) for s in range(n_states)]
    out.transitions = int(sum(stats.count_transitions(row) for row in series))
    for s in range(n_states):
        if estimate.populations[s] < POPULATION_FLOOR:
            continue
        indicator = (series == s).astype(float)
        if series.shape[1] >= 4 and 0 < indicator.mean() < 1:
            out.split_rhat[names[s]] = float(stats.split_rhat(indicator))
        if n_walkers > 1 and out.walkers_seen[s] == 1:
            out.reasons.append(f"state {names[s]} was seen by one walker only")
    bad = {k: v for k, v in out.split_rhat.items() if not np.isfinite(v) or v > RHAT_MAX}
    if bad:
        worst = max(bad, key=lambda k: bad[k])
        out.reasons.append(f"split R-hat {bad[worst]:.3f} > {RHAT_MAX} for state {worst}")
    populated = int((estimate.populations >= POPULATION_FLOOR).sum())
    visited = [s for s in range(n_states) if out.walkers_seen[s] > 0]
    # With one populated state the rule still asks for MIN_TRANSITIONS once other states were
    # visited: a walker stuck in one well that stepped out once gives a state below the floor,
    # an ESS equal to the sample count (the indicators barely vary) and no other rule to fire.
    # Measured by bench.calibration: such a Langevin-only chain was judged converged.
    if len(visited) > 1 and out.transitions < MIN_TRANSITIONS * max(populated, 1):
        out.reasons.append(f"only {out.transitions} transitions between states")
    if estimate.block_length >= series.shape[1]:
        out.reasons.append("the series are shorter than one bootstrap block (10 x the statistical"
                           " inefficiency): the intervals are not defined")
    if estimate.ess < MIN_ESS:
        out.reasons.append(f"effective sample size {estimate.ess:.0f} < {MIN_ESS}")
    if n_states > 1 and len(visited) == 1:
        # Every sample in one state: its interval collapses to [100%, 100%] and no other rule can
        # fire, yet the model has other states (an amide's cis, a named region) that the run
        # never reached. Measured by bench.calibration: such runs were judged converged.
        out.reasons.append(f"every sample is in state {names[visited[0]]}: the other"
                           f" {n_states - 1} state(s) were never visited, so nothing bounds them")
    unseen = [names[s] for s in range(n_states) if named[s] and out.walkers_seen[s] == 0]
    if unseen:
        out.warnings.append(f"never visited: {', '.join(unseen)} (their populations are upper bounds"
                            " only; seed a structure there if one is known)")
    if importance is not None:
        apart = [names[s] for s in range(n_states)
                 if importance["ci95"][s][0] > estimate.upper[s] or importance["ci95"][s][1] < estimate.lower[s]]
        if apart:
            out.warnings.append(f"MCMC and importance-sampling estimates disagree for {', '.join(apart)}")
        if importance["effective_samples"] < MIN_IS_ESS_FRACTION * importance["proposals"]:
            out.warnings.append(f"heavy-tailed importance weights (ESS {importance['effective_samples']:.0f}"
                                f" of {importance['proposals']} proposals)")
    if local_move is not None and local_move.get("states_failing_guard", 0) > 0:
        out.warnings.append(f"{local_move['states_failing_guard']} production Langevin state(s) failed the"
                            " clash/stereo check; the Monte Carlo moves are exact only among states that pass it")
    if local_move is not None and local_move.get("rolled_back", 0) > 0:
        out.warnings.append(f"{local_move['rolled_back']} of {local_move['segments']} Langevin segments were"
                            " rolled back after an energy explosion (a veto after the fact biases the chain)")
    late = [b for b in found_basins or [] if b["production"]]
    early = [b for b in found_basins or [] if not b["production"]]
    if late:
        lowest = min(b["above_lowest_kj"] for b in late)
        found = (f"{len(late)} basin(s) found in production that no move targets (the lowest"
                 f" {lowest:.1f} kJ/mol above the known minima)")
        bound = late_basin_bound([b["above_lowest_kj"] for b in late], kT_kj) if kT_kj else None
        if bound is not None and bound < POPULATION_FLOOR:
            out.warnings.append(f"{found}: by their energies they hold at most {100 * bound:.2g}% in all,"
                                " below the report's floor; seed them next time (found-basins.sdf)")
        else:
            out.reasons.append(f"{found}: their population may be missing; seed them (found-basins.sdf)"
                               " and run again")
    if early:
        out.warnings.append(f"found during the run: {len(early)} basin(s) no seed was in (dart centres from"
                            " then on); seed them next time (found-basins.sdf)")
    if late_states:
        out.warnings.append(f"{len(late_states)} state(s) first entered in production, never in the seeds or"
                            f" training: {', '.join(late_states)}; the seeds may have missed their basins:"
                            " seed them next time (a structure in each)")
    return out
