"""From a run directory to the summary: populations, free energies, diagnostics and the verdict.

Rendering (HTML, plots, exported structures) lives in :mod:`hopwell.report`; this module only
computes numbers.

A damaged run directory is read as far as it can be: damaged chunks are skipped, a damaged
checkpoint gives way to the previous one (or to none: the move counters are then missing), and
a small molecule's missing topology.pdb is rebuilt (:mod:`hopwell.sampling.recovery`). Each
such finding is one line in ``summary["damage"]`` and among the warnings.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import mdtraj as md
import numpy as np
from rdkit import Chem

from hopwell.analysis import states as st
from hopwell.analysis import stats
from hopwell.analysis.labels import ATOM_NUMBERING, torsion_labels
from hopwell.analysis.observables import KARPLUS_HN_HA, j3_hn_ha, series_mean
from hopwell.analysis.pose import (
    PoseResult,
    near_pose,
    pose_images,
    pose_population,
    pose_states,
    read_pose,
)
from hopwell.analysis.production import (
    Production,
    acceptance_over_time,
    checkpoint_warnings,
    gather_run,
    move_acceptance,
    readable_state,
    walker_series,
)
from hopwell.analysis.reweight import (
    hamiltonian_log_weights,
    reweighted_populations,
    temperature_log_weights,
)
from hopwell.analysis.verdict import first_entered_in_production, judge
from hopwell.sampling.files import read_molecules
from hopwell.sampling.recovery import ensure_topology
from hopwell.sampling.shards import shard_stores
from hopwell.sampling.store import RunStore
from hopwell.systems.energy import kT_kj

KJ_PER_KCAL = 4.184


def _state_model(store: RunStore, mol: Chem.Mol, topology: md.Topology, states_file=None):
    if states_file is not None:
        return st.read_user_states(states_file, mol), None
    if store.config().get("kind") == "peptide":
        model = st.backbone_model(topology)
        if model is not None:
            return model, None
    return None, st.state_torsions(mol)


def analyse(run_dir: Path, rng_seed: int = 0, n_boot: int = 1000, reweight: dict | None = None,
            states_file: Path | None = None, model=None, pose_file: Path | None = None) -> dict:
    """Populations, free energies, diagnostics and the verdict of a run (the summary dict).

    Parameters
    ----------
    run_dir : Path
    rng_seed : int
        Seeds the bootstrap.
    n_boot : int
    reweight : dict, optional
        ``temperature_K`` and/or build overrides (``solvent``, ``forcefield``) to reweight the
        production samples to (see :mod:`hopwell.analysis.reweight`).
    states_file : Path, optional
        A user's states TOML (see :class:`hopwell.analysis.states.UserStates`); default automatic states.
    model : optional
        A state model to use instead (:mod:`hopwell.analysis.states`), e.g. one shared by several runs.
    pose_file : Path, optional
        One structure (SDF/MOL/MOL2) the user cares about, e.g. a bound pose: its population and
        conformational cost go under ``"pose"`` (:mod:`hopwell.analysis.pose`).
    """
    store = RunStore.open(Path(run_dir))
    config = store.config()
    mol = read_molecules(store.path / "molecule.sdf")[0]
    rebuilt = ensure_topology(store)
    topology = md.load_topology(str(store.path / "topology.pdb"))
    model, torsions = (model, None) if model is not None else _state_model(store, mol, topology, states_file)
    temperature = float(config["sampler"]["temperature_K"])
    kT = kT_kj(temperature)
    production = gather_run(store, topology, model.torsions if model else torsions, kT)  # shards pooled
    if model is None:
        model = st.torsion_model(mol, production.dihedrals_rad)
    labels = model.assign(production.dihedrals_rad)
    series = walker_series(labels, production)
    n_states = len(model.names)
    rng = np.random.default_rng(rng_seed)
    pops = stats.population_estimate(series, n_states, rng, n_boot=n_boot)
    dg = stats.free_energy_differences(pops, kT)
    all_lower, all_upper, all_level = stats.joint_interval(pops)
    importance = _importance(production, model, n_states, rng, n_boot)

    n_walkers = series.shape[0]
    named = [model.kind == "backbone" or (model.kind == "user" and s < n_states - 1) for s in range(n_states)]
    local_move = local_move_counts(store)
    found, found_positions_nm = found_basins(store)
    training = production.training_dihedrals_rad
    late = first_entered_in_production(labels, model.assign(training) if len(training) else np.zeros(0, int),
                                       model.names)
    verdict = judge(series, pops, model.names, named, importance, local_move, found, late, kT)
    damage = ([rebuilt] if rebuilt else []) + checkpoint_warnings(store) + [
        f"{exc}: skipped, its records are not in this report" for exc in production.damaged_chunks]
    summary = {
        "temperature_K": temperature,
        "verdict": verdict.label,
        "reasons": verdict.reasons,
        "warnings": damage + verdict.warnings,
        "damage": damage,
        "state_model": model.kind,
        "states": [
            {
                "name": name,
                "population": float(pops.populations[s]),
                "ci95": [float(pops.lower[s]), float(pops.upper[s])],
                "ci95_all_states": [float(all_lower[s]), float(all_upper[s])],
                "dG_kJ_per_mol": float(dg.values[s]),
                "dG_ci95": [float(dg.lower[s]), float(dg.upper[s])],
                "dG_kcal_per_mol": float(dg.values[s] / KJ_PER_KCAL),
                "walkers_seen": verdict.walkers_seen[s],
            }
            for s, name in enumerate(model.names)
        ],
        "dG_reference": model.names[int(dg.reference)],
        "all_states_level": float(all_level),
        "samples": int(series.size),
        "effective_samples": float(pops.ess),
        "statistical_inefficiency": float(pops.statistical_inefficiency),
        "walkers": int(n_walkers),
        "transitions": verdict.transitions,
        "split_rhat": verdict.split_rhat,
        "per_walker_populations": [
            [float(np.mean(row == s)) for s in range(n_states)] for row in series
        ],
        "transitions_per_walker": [int(stats.count_transitions(row)) for row in series],
        "flow_acceptance_production": (production.flow_accepted / len(production.proposal_block)
                                       if len(production.proposal_block) else None),
        # The share of Langevin segments rolled back joins the report's move acceptance line.
        "move_acceptance": move_acceptance(store) | {"langevin_rolled_back": (
            local_move["rolled_back"] / local_move["segments"] if local_move["segments"] else None)},
        "local_move": local_move,
        "found_basins": found,
        "first_entered_in_production": late,
        "_found_positions_nm": found_positions_nm,
        "importance_sampling": importance,
        # A run without flow proposals still records a (never accepted) flow-move state.
        "acceptance_over_time": (acceptance_over_time(production.acceptance)
                                 if config["sampler"].get("proposals_per_cycle", 1) else []),
    }
    shard_bounds = [first for _, first in shard_stores(store.path)] + [n_walkers]
    if len(shard_bounds) > 1:  # walkers are numbered over the shards, a shard's walkers consecutive
        summary["per_shard_populations"] = [[float(np.mean(series[a:b] == s)) for s in range(n_states)]
                                            for a, b in itertools.pairwise(shard_bounds)]
    if model.kind == "backbone":  # phi is the model's first dihedral
        phi = walker_series(production.dihedrals_rad[:, 0], production)
        summary["observables"] = {
            f"3J_HN_HA_Hz ({name})": dict(zip(("mean", "ci95_low", "ci95_high"), series_mean(j3_hn_ha(phi, name))))
            for name in KARPLUS_HN_HA
        }
    summary["_labels"] = labels
    summary["_series"] = series
    summary["_dihedrals"] = production.dihedrals_rad
    tags = torsion_labels(mol, model.torsions, backbone=model.kind == "backbone")
    summary["torsions"] = [{**tag.as_dict(), "numbering": ATOM_NUMBERING} for tag in tags]
    summary["_torsion_labels"] = tags
    summary["_molecule"] = mol
    if pose_file is not None:
        summary["pose"] = _pose(Path(pose_file), mol, topology, model, production, kT, rng, n_boot)
    if reweight:
        summary["reweighted"] = _reweighted(store, reweight, production, series, model, rng, n_boot)
    return summary


def _pose(path: Path, mol, topology, model, production: Production, kT: float, rng, n_boot: int) -> dict:
    """The pose's population and cost under the report's state model (see :mod:`hopwell.analysis.pose`)."""
    pose = read_pose(path)
    images = pose_images(pose, mol, model.torsions)
    pose_dihedrals = st.dihedrals(images, topology, model.torsions)
    near = walker_series(near_pose(model, pose_dihedrals, production.dihedrals_rad), production)
    p, ci, dg, dg_ci = pose_population(near, kT, rng, n_boot)
    result = PoseResult(pose_states(model, pose_dihedrals), p, ci, dg, dg_ci)
    return {"file": path.name, **result.as_dict()}


def local_move_counts(store: RunStore) -> dict:
    """Langevin segments run and rolled back, and production states failing the guard.

    Summed over a sharded run's training and shards (each shard starts from the training run's
    counters, so only what it added counts); a checkpoint older than a counter counts 0.
    """
    keys = {"segments": "proposed", "rolled_back": "rolled_back", "states_failing_guard": "outside_guard"}

    def counts(run: RunStore) -> dict:
        state = readable_state(run)
        saved = json.loads(str(state["stats"])).get("langevin", {}) if state is not None else {}
        return {name: int(saved.get(key, 0)) for name, key in keys.items()}

    own = counts(store)
    shards = [counts(shard) for shard, _ in shard_stores(store.path)]
    return {name: own[name] + sum(c[name] - own[name] for c in shards) for name in keys}


def found_basins(store: RunStore) -> tuple[list[dict], np.ndarray]:
    """The basin probes' finds (:mod:`hopwell.sampling.probes`) over a run and its shards.

    A shard starts from the training run's checkpoint, so a find is counted once by its cycle
    and energy. Returns the finds (``cycle``, ``production``, ``energy_kj``,
    ``above_lowest_kj``, ordered by cycle) and their minimized structures,
    shape ``(n_found, n_atoms, 3)``.
    """
    finds = {}
    for run in [store] + [shard for shard, _ in shard_stores(store.path)]:
        state = readable_state(run)
        if state is None or "found_basins" not in state:
            continue
        for found, positions_nm in zip(json.loads(str(state["found_basins"])), state["found_positions_nm"]):
            finds.setdefault((found["cycle"], round(found["energy_kj"], 6)), (found, np.array(positions_nm)))
    ordered = [finds[k] for k in sorted(finds)]
    return [f for f, _ in ordered], (np.stack([x for _, x in ordered]) if ordered else np.empty((0, 0, 3)))


def _reweighted(store, reweight, production, series, model, rng, n_boot) -> dict:
    temperature = float(store.config()["sampler"]["temperature_K"])
    new_temperature = float(reweight.get("temperature_K", temperature))
    log_w = temperature_log_weights(production.energy_kj, temperature, new_temperature) \
        if new_temperature != temperature else np.zeros(len(production.energy_kj))
    overrides = {k: v for k, v in reweight.items() if k != "temperature_K"}
    if overrides:
        log_w = log_w + hamiltonian_log_weights(store, overrides, new_temperature, production.energy_kj)
    result = reweighted_populations(series, walker_series(log_w, production), len(model.names), rng, n_boot)
    all_lower, all_upper, all_level = stats.joint_interval(result)
    return {
        "to": {"temperature_K": new_temperature, **overrides},
        "effective_samples": float(result.ess),
        "statistical_inefficiency": float(result.statistical_inefficiency),
        "states": [{"name": name, "population": float(result.populations[s]),
                    "ci95": [float(result.lower[s]), float(result.upper[s])],
                    "ci95_all_states": [float(all_lower[s]), float(all_upper[s])]}
                   for s, name in enumerate(model.names)],
        "all_states_level": float(all_level),
    }


def _importance(production: Production, model, n_states: int, rng, n_boot: int) -> dict | None:
    """The frozen flow's proposals as an importance sample, normalised per proposal block.

    A flow move keeps the walker's bonds, angles and offsets r and draws torsions t from q, so
    within one block the weights exp(-u) / q estimate p(t | r); averaging blocks over the
    chain's r gives populations independent of the chain's torsion mixing (see
    :func:`hopwell.analysis.stats.blockwise_importance_populations`).
    """
    if not len(production.proposal_block) or not np.isfinite(production.proposal_log_weight).any():
        return None
    labels = model.assign(production.proposal_dihedrals_rad)
    result = stats.blockwise_importance_populations(
        labels, production.proposal_log_weight, production.proposal_block, n_states, rng, n_boot=n_boot)
    return {
        "populations": [float(p) for p in result.populations],
        "ci95": [[float(a), float(b)] for a, b in zip(result.lower, result.upper)],
        "effective_samples": float(result.ess),
        "proposals": int(len(labels)),
        "blocks": int(result.n_samples),
    }


def public(summary: dict) -> dict:
    """The summary without its private bookkeeping (keys starting with an underscore)."""
    return {k: v for k, v in summary.items() if not k.startswith("_")}

