"""From a run directory to the population table, the verdict and the files behind them.

The store is read chunk by chunk; only dihedrals, energies and bookkeeping are kept in memory
(never all positions), plus the lowest-energy structure of each state.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np
from rdkit import Chem

from hopwell import states as st
from hopwell import stats
from hopwell.atomic import atomic_write_bytes
from hopwell.energy import kT_kj
from hopwell.errors import InputError
from hopwell.observables import KARPLUS_HN_HA, j3_hn_ha, series_mean
from hopwell.reweight import hamiltonian_log_weights, reweighted_populations, temperature_log_weights
from hopwell.store import MOVE_FLOW, RunStore

KJ_PER_KCAL = 4.184
RHAT_MAX = 1.01  # Vehtari et al. 2021 recommend trusting estimates only below 1.01
MIN_TRANSITIONS = 10  # per populated state, pooled over walkers (common practice, chosen)
MIN_ESS = 100
MIN_IS_ESS_FRACTION = 0.1  # importance ESS below 10% of proposals: weights too heavy-tailed
ACCEPTANCE_WINDOWS = 50  # cycle windows over the whole run in the acceptance-over-time table


@dataclass
class CycleCounts:
    """Flow-move counts per cycle over the whole run, training included; index = cycle.

    The store records, per flow block (one walker, one cycle), whether any proposal was
    accepted, and in production every proposal; one-torsion moves and seed darts are not
    recorded per cycle.
    """

    blocks: np.ndarray  # (n_cycles,) flow blocks recorded
    blocks_accepted: np.ndarray  # (n_cycles,) blocks with at least one accepted proposal
    proposals: np.ndarray  # (n_cycles,) recorded proposals (production only)
    proposals_accepted: np.ndarray  # (n_cycles,)
    production: np.ndarray  # (n_cycles,) bool, the cycle's records are production


@dataclass
class Production:
    """What the report needs from the store, gathered in one pass over the chunks."""

    dihedrals_rad: np.ndarray  # (n, n_torsions)
    energy_kj: np.ndarray
    walker: np.ndarray
    order: np.ndarray  # (cycle * 2 + move): time order within a walker
    proposal_dihedrals_rad: np.ndarray  # (m, n_torsions), frozen-flow proposals
    proposal_log_weight: np.ndarray  # (m,) -u - log q; -inf where a guard rejected
    proposal_block: np.ndarray  # (m,) one block per (walker, cycle)
    flow_accepted: int
    acceptance: CycleCounts  # flow acceptance per cycle, training and production


def _per_cycle(cycles: np.ndarray, flags: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct cycles, records and flagged records per cycle of one chunk, each ``(n_distinct,)``."""
    distinct, index = np.unique(cycles, return_inverse=True)
    return (distinct, np.bincount(index, minlength=len(distinct)),
            np.bincount(index, weights=flags.astype(float), minlength=len(distinct)).astype(np.int64))


def _cycle_counts(n_cycles: int, block_parts: list, proposal_parts: list,
                  production_cycles: list) -> CycleCounts:
    """Sum the per-chunk :func:`_per_cycle` tallies into arrays of shape ``(n_cycles,)``."""
    def total(parts, column):
        out = np.zeros(n_cycles, dtype=np.int64)
        for part in parts:
            np.add.at(out, part[0], part[column])
        return out

    production = np.zeros(n_cycles, dtype=bool)
    for cycles in production_cycles:
        production[cycles] = True
    return CycleCounts(total(block_parts, 1), total(block_parts, 2), total(proposal_parts, 1),
                       total(proposal_parts, 2), production)


def _gather(store: RunStore, topology: md.Topology, torsions, kT: float) -> Production:
    parts = {k: [] for k in ("d", "e", "w", "o", "pd", "pw", "pb")}
    accepted = 0
    block_tallies, proposal_tallies, production_cycles = [], [], []
    n_cycles = 0
    for chunk in store.iter_chunks():
        keep = chunk["state_production"].astype(bool)
        n_cycles = max(n_cycles, 1 + int(chunk["state_cycle"].max(initial=-1)))
        flow = chunk["state_move"] == MOVE_FLOW
        block_tallies.append(_per_cycle(chunk["state_cycle"][flow], chunk["state_accepted"][flow]))
        production_cycles.append(np.unique(chunk["state_cycle"][keep]))
        if keep.any():
            parts["d"].append(st.dihedrals(chunk["state_positions_nm"][keep], topology, torsions))
            parts["e"].append(chunk["state_energy_kj"][keep])
            parts["w"].append(chunk["state_walker"][keep])
            parts["o"].append(chunk["state_cycle"][keep] * 2 + chunk["state_move"][keep])
        if "proposal_accepted" in chunk:
            accepted += int(chunk["proposal_accepted"].sum())
            energy = chunk["proposal_energy_kj"]
            ok = (chunk["proposal_rejected_by"] == 0) & np.isfinite(energy)
            parts["pd"].append(st.dihedrals(chunk["proposal_positions_nm"], topology, torsions))
            parts["pw"].append(np.where(ok, -np.where(ok, energy, 0.0) / kT - chunk["proposal_log_q"], -np.inf))
            parts["pb"].append(chunk["proposal_cycle"] * 1_000_000 + chunk["proposal_walker"])
            proposal_tallies.append(_per_cycle(chunk["proposal_cycle"], chunk["proposal_accepted"]))
    if not parts["e"]:
        raise InputError(f"{store.path}: no production samples yet; let the run go on or resume it")
    if not parts["pd"]:
        parts["pd"], parts["pw"], parts["pb"] = [np.zeros((0, len(torsions)))], [np.zeros(0)], [np.zeros(0, int)]
    return Production(*(np.concatenate(parts[k]) for k in ("d", "e", "w", "o", "pd", "pw", "pb")), accepted,
                      _cycle_counts(n_cycles, block_tallies, proposal_tallies, production_cycles))


def _fraction(numerator: int, denominator: int) -> float | None:
    return numerator / denominator if denominator else None


def acceptance_over_time(counts: CycleCounts, n_windows: int = ACCEPTANCE_WINDOWS) -> list[dict]:
    """Flow acceptance in windows of cycles, training and production apart.

    Parameters
    ----------
    counts : CycleCounts
    n_windows : int
        About this many windows of equal width span the run; a window never straddles the
        end of training, so each phase's last window may be shorter.

    Returns
    -------
    list of dict
        One per window with flow blocks, in cycle order: ``cycle_start`` (first cycle),
        ``cycle_end`` (one past the last), ``phase`` ("training" or "production"),
        ``flow_blocks``, ``flow_block_acceptance`` (fraction of blocks with an accepted
        proposal), ``flow_proposals`` and ``flow_proposal_acceptance`` (fraction of proposals
        accepted; None where proposals are not recorded, as in training).
    """
    n_cycles = len(counts.blocks)
    width = max(1, -(-n_cycles // n_windows))
    boundaries = np.flatnonzero(np.diff(counts.production.astype(int))) + 1
    windows = []
    for first, stop in zip(np.r_[0, boundaries], np.r_[boundaries, n_cycles]):
        for start in range(int(first), int(stop), width):
            end = min(start + width, int(stop))
            blocks = int(counts.blocks[start:end].sum())
            if not blocks:
                continue
            proposals = int(counts.proposals[start:end].sum())
            windows.append({
                "cycle_start": start, "cycle_end": end,
                "phase": "production" if counts.production[start] else "training",
                "flow_blocks": blocks,
                "flow_block_acceptance": int(counts.blocks_accepted[start:end].sum()) / blocks,
                "flow_proposals": proposals,
                "flow_proposal_acceptance": _fraction(int(counts.proposals_accepted[start:end].sum()), proposals),
            })
    return windows


def _series(values: np.ndarray, production: Production) -> np.ndarray:
    """Per-walker time series, shape ``(n_walkers, n_per_walker)`` (walkers truncated to equal)."""
    walkers = np.unique(production.walker)
    rows = []
    for w in walkers:
        mask = production.walker == w
        rows.append(values[mask][np.argsort(production.order[mask], kind="stable")])
    n = min(len(r) for r in rows)
    return np.stack([r[:n] for r in rows])


def _state_model(store: RunStore, mol: Chem.Mol, topology: md.Topology, states_file=None):
    if states_file is not None:
        return st.read_user_states(states_file, mol), None
    if store.config().get("kind") == "peptide":
        model = st.backbone_model(topology)
        if model is not None:
            return model, None
    return None, st.state_torsions(mol)


def analyse(run_dir: Path, rng_seed: int = 0, n_boot: int = 1000, reweight: dict | None = None,
            states_file: Path | None = None, model=None) -> dict:
    """Populations, free energies, diagnostics and the verdict of a run (the summary dict).

    Parameters
    ----------
    run_dir : Path
    rng_seed : int
        Seeds the bootstrap.
    n_boot : int
    reweight : dict, optional
        ``temperature_K`` and/or build overrides (``solvent``, ``forcefield``) to reweight the
        production samples to (see :mod:`hopwell.reweight`).
    states_file : Path, optional
        A user's states TOML (see :class:`hopwell.states.UserStates`); default automatic states.
    model : optional
        A state model to use instead (:mod:`hopwell.states`), e.g. one shared by several runs.
    """
    store = RunStore.open(Path(run_dir))
    config = store.config()
    mol = next(iter(Chem.SDMolSupplier(str(store.path / "molecule.sdf"), removeHs=False)))
    topology = md.load_topology(str(store.path / "topology.pdb"))
    model, torsions = (model, None) if model is not None else _state_model(store, mol, topology, states_file)
    temperature = float(config["sampler"]["temperature_K"])
    kT = kT_kj(temperature)
    production = _gather(store, topology, model.torsions if model else torsions, kT)
    if model is None:
        model = st.torsion_model(mol, production.dihedrals_rad)
    labels = model.assign(production.dihedrals_rad)
    series = _series(labels, production)
    n_states = len(model.names)
    rng = np.random.default_rng(rng_seed)
    pops = stats.population_estimate(series, n_states, rng, n_boot=n_boot)
    dg = stats.free_energy_differences(pops, kT)
    importance = _importance(production, model, n_states, rng, n_boot)

    reasons = []
    n_walkers = series.shape[0]
    seen_by = [(series == s).any(axis=1).sum() for s in range(n_states)]
    transitions = sum(stats.count_transitions(row) for row in series)
    rhats = {}
    for s in range(n_states):
        if pops.populations[s] < st.POPULATION_FLOOR:
            continue
        indicator = (series == s).astype(float)
        if series.shape[1] >= 4 and 0 < indicator.mean() < 1:
            rhats[model.names[s]] = float(stats.split_rhat(indicator))
        if n_walkers > 1 and seen_by[s] == 1:
            reasons.append(f"state {model.names[s]} was seen by one walker only")
    bad = {k: v for k, v in rhats.items() if not np.isfinite(v) or v > RHAT_MAX}
    if bad:
        worst = max(bad, key=lambda k: bad[k])
        reasons.append(f"split R-hat {bad[worst]:.3f} > {RHAT_MAX} for state {worst}")
    populated = int((pops.populations >= st.POPULATION_FLOOR).sum())
    if populated > 1 and transitions < MIN_TRANSITIONS * populated:
        reasons.append(f"only {transitions} transitions between states")
    if pops.block_length >= series.shape[1]:
        reasons.append("the series are shorter than one bootstrap block (10 x the statistical"
                       " inefficiency): the intervals are not defined")
    if pops.ess < MIN_ESS:
        reasons.append(f"effective sample size {pops.ess:.0f} < {MIN_ESS}")
    # The importance estimate normalizes within blocks of a few tens of proposals, which biases
    # it by O(1 / block size); its disagreements are warnings, not reasons (DEVELOPERS.md).
    warnings = []
    unseen = [model.names[s] for s in range(n_states)
              if seen_by[s] == 0 and (model.kind == "backbone" or (model.kind == "user" and s < n_states - 1))]
    if unseen:  # named in advance but never sampled: a missed basin looks just like this
        warnings.append(f"never visited: {', '.join(unseen)} (their populations are upper bounds only;"
                        " seed a structure there if one is known)")
    if importance is not None:
        apart = [model.names[s] for s in range(n_states)
                 if importance["ci95"][s][0] > pops.upper[s] or importance["ci95"][s][1] < pops.lower[s]]
        if apart:
            warnings.append(f"MCMC and importance-sampling estimates disagree for {', '.join(apart)}")
        if importance["effective_samples"] < MIN_IS_ESS_FRACTION * importance["proposals"]:
            warnings.append(f"heavy-tailed importance weights (ESS {importance['effective_samples']:.0f}"
                            f" of {importance['proposals']} proposals)")
    summary = {
        "temperature_K": temperature,
        "verdict": "not converged" if reasons else "converged",
        "reasons": reasons,
        "warnings": warnings,
        "state_model": model.kind,
        "states": [
            {
                "name": name,
                "population": float(pops.populations[s]),
                "ci95": [float(pops.lower[s]), float(pops.upper[s])],
                "dG_kJ_per_mol": float(dg.values[s]),
                "dG_ci95": [float(dg.lower[s]), float(dg.upper[s])],
                "dG_kcal_per_mol": float(dg.values[s] / KJ_PER_KCAL),
                "walkers_seen": int(seen_by[s]),
            }
            for s, name in enumerate(model.names)
        ],
        "dG_reference": model.names[int(dg.reference)],
        "samples": int(series.size),
        "effective_samples": float(pops.ess),
        "statistical_inefficiency": float(pops.statistical_inefficiency),
        "walkers": int(n_walkers),
        "transitions": int(transitions),
        "split_rhat": rhats,
        "per_walker_populations": [
            [float(np.mean(row == s)) for s in range(n_states)] for row in series
        ],
        "transitions_per_walker": [int(stats.count_transitions(row)) for row in series],
        "flow_acceptance_production": (production.flow_accepted / len(production.proposal_block)
                                       if len(production.proposal_block) else None),
        "move_acceptance": move_acceptance(store),
        "importance_sampling": importance,
        # A run without flow proposals still records a (never accepted) flow-move state.
        "acceptance_over_time": (acceptance_over_time(production.acceptance)
                                 if config["sampler"].get("proposals_per_cycle", 1) else []),
    }
    if model.kind == "backbone":  # phi is the model's first dihedral
        phi = _series(production.dihedrals_rad[:, 0], production)
        summary["observables"] = {
            f"3J_HN_HA_Hz ({name})": dict(zip(("mean", "ci95_low", "ci95_high"), series_mean(j3_hn_ha(phi, name))))
            for name in KARPLUS_HN_HA
        }
    summary["_labels"] = labels
    summary["_series"] = series
    summary["_dihedrals"] = production.dihedrals_rad
    summary["_torsion_names"] = (["phi", "psi"] if model.kind == "backbone" else
                                 ["-".join(str(a + 1) for a in atoms) for atoms, _ in model.torsions])
    if reweight:
        summary["reweighted"] = _reweighted(store, reweight, production, series, model, rng, n_boot)
    return summary


def _reweighted(store, reweight, production, series, model, rng, n_boot) -> dict:
    temperature = float(store.config()["sampler"]["temperature_K"])
    new_temperature = float(reweight.get("temperature_K", temperature))
    log_w = temperature_log_weights(production.energy_kj, temperature, new_temperature) \
        if new_temperature != temperature else np.zeros(len(production.energy_kj))
    overrides = {k: v for k, v in reweight.items() if k != "temperature_K"}
    if overrides:
        log_w = log_w + hamiltonian_log_weights(store, overrides, new_temperature, production.energy_kj)
    result = reweighted_populations(series, _series(log_w, production), len(model.names), rng, n_boot)
    return {
        "to": {"temperature_K": new_temperature, **overrides},
        "effective_samples": float(result.ess),
        "statistical_inefficiency": float(result.statistical_inefficiency),
        "states": [{"name": name, "population": float(result.populations[s]),
                    "ci95": [float(result.lower[s]), float(result.upper[s])]}
                   for s, name in enumerate(model.names)],
    }


def _importance(production: Production, model, n_states: int, rng, n_boot: int) -> dict | None:
    """The frozen flow's proposals as an importance sample, normalised per proposal block.

    A flow move keeps the walker's bonds, angles and offsets r and draws torsions t from q, so
    within one block the weights exp(-u) / q estimate p(t | r); averaging blocks over the
    chain's r gives populations independent of the chain's torsion mixing (see
    :func:`hopwell.stats.blockwise_importance_populations`).
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


def write_report(run_dir: Path, summary: dict) -> Path:
    """Write ``summary.json``, ``populations.csv`` and ``report.html`` into the run directory."""
    run_dir = Path(run_dir)
    write_ensemble(run_dir, summary)
    atomic_write_bytes(run_dir / "report.html", _html(summary).encode())
    summary = public(summary)
    atomic_write_bytes(run_dir / "summary.json", json.dumps(summary, indent=2).encode())
    out = io.StringIO()
    writer = csv.writer(out)
    writer.writerow(["state", "population", "ci95_low", "ci95_high", "dG_kJ_per_mol",
                     "dG_ci95_low", "dG_ci95_high"])
    for s in summary["states"]:
        writer.writerow([s["name"], f"{s['population']:.5f}", f"{s['ci95'][0]:.5f}",
                         f"{s['ci95'][1]:.5f}", f"{s['dG_kJ_per_mol']:.3f}",
                         f"{s['dG_ci95'][0]:.3f}", f"{s['dG_ci95'][1]:.3f}"])
    atomic_write_bytes(run_dir / "populations.csv", out.getvalue().encode())
    return run_dir / "report.html"


def write_ensemble(run_dir: Path, summary: dict) -> list[Path]:
    """Write the production ensemble and one representative structure per state.

    ``ensemble.dcd`` holds every production sample in the order of ``ensemble.csv`` (walker,
    cycle, move, state, energy); ``state-<k>.sdf`` (small molecules) or ``state-<k>.pdb``
    (peptides) is the lowest-energy sample of state k. Reads the store chunk by chunk.
    """
    store = RunStore.open(Path(run_dir))
    labels = np.asarray(summary["_labels"])
    names = [s["name"] for s in summary["states"]]
    topology = md.load_topology(str(store.path / "topology.pdb"))
    best = {}
    rows = io.StringIO()
    table = csv.writer(rows)
    table.writerow(["frame", "walker", "cycle", "move", "state", "energy_kj_per_mol"])
    tmp = store.path / ".ensemble.dcd.tmp"
    frame = 0
    with md.formats.DCDTrajectoryFile(str(tmp), "w", force_overwrite=True) as dcd:
        for chunk in store.iter_chunks():
            keep = chunk["state_production"].astype(bool)
            if not keep.any():
                continue
            xyz = chunk["state_positions_nm"][keep]
            energy = chunk["state_energy_kj"][keep]
            dcd.write(xyz * 10.0)  # DCD stores Angstrom
            for k in range(len(xyz)):
                state = int(labels[frame])
                table.writerow([frame, int(chunk["state_walker"][keep][k]), int(chunk["state_cycle"][keep][k]),
                                int(chunk["state_move"][keep][k]), names[state], f"{energy[k]:.4f}"])
                if state not in best or energy[k] < best[state][0]:
                    best[state] = (float(energy[k]), xyz[k].astype(float))
                frame += 1
    tmp.replace(store.path / "ensemble.dcd")
    atomic_write_bytes(store.path / "ensemble.csv", rows.getvalue().encode())
    written = [store.path / "ensemble.dcd", store.path / "ensemble.csv"]
    mol = next(iter(Chem.SDMolSupplier(str(store.path / "molecule.sdf"), removeHs=False)))
    for state, (energy, xyz) in sorted(best.items()):
        if store.config().get("kind") == "peptide":
            path = store.path / f"state-{state}.pdb"
            md.Trajectory(xyz[None], topology).save_pdb(str(path.with_suffix(".tmp.pdb")))
            path.with_suffix(".tmp.pdb").replace(path)
        else:
            path = store.path / f"state-{state}.sdf"
            m = Chem.Mol(mol)
            conf = m.GetConformer()
            for i, row in enumerate(xyz * 10.0):
                conf.SetAtomPosition(i, row.tolist())
            m.SetProp("_Name", f"{names[state]} (E = {energy:.2f} kJ/mol)")
            atomic_write_bytes(path, (Chem.MolToMolBlock(m) + "$$$$\n").encode())
        written.append(path)
    return written


def _population_plot(summary: dict) -> str:
    """A bar chart of populations with 95% intervals, as a base64 PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    shown = [s for s in summary["states"] if s["population"] > 0 or s["name"] != "other"]
    fig, ax = plt.subplots(figsize=(max(4, 0.9 * len(shown) + 2), 3.2), dpi=100)
    p = np.array([s["population"] for s in shown]) * 100
    lo = p - np.array([s["ci95"][0] for s in shown]) * 100
    hi = np.array([s["ci95"][1] for s in shown]) * 100 - p
    ax.bar(range(len(shown)), p, yerr=[lo, hi], capsize=4, color="#4c78a8")
    ax.set_xticks(range(len(shown)), [s["name"] for s in shown], rotation=30, ha="right")
    ax.set_ylabel("population (%)")
    ax.set_title("Populations with 95% intervals")
    return _png(fig)


def _png(fig) -> str:
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buffer, format="png")
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode()


def _running_plot(summary: dict) -> str:
    """Running population estimate of each populated state over production, base64 PNG."""
    import matplotlib.pyplot as plt

    series = summary["_series"]
    fig, ax = plt.subplots(figsize=(6, 3.2), dpi=100)
    pooled = series.T.ravel()  # walkers interleaved in time order
    n = np.arange(1, len(pooled) + 1)
    for s, state in enumerate(summary["states"]):
        if state["population"] >= st.POPULATION_FLOOR:
            ax.plot(n, 100 * np.cumsum(pooled == s) / n, label=state["name"])
    ax.set_xlabel("production samples (all walkers)")
    ax.set_ylabel("running population (%)")
    ax.legend(fontsize=7, loc="best")
    return _png(fig)


def _torsion_plot(summary: dict) -> str:
    """Free-energy profile of each state torsion (or the phi/psi map), base64 PNG."""
    import matplotlib.pyplot as plt

    d = np.degrees(summary["_dihedrals"])
    kT = kT_kj(summary["temperature_K"])
    names = summary["_torsion_names"]
    if summary["state_model"] == "backbone":
        fig, ax = plt.subplots(figsize=(4.2, 3.6), dpi=100)
        hist, xe, ye = np.histogram2d(d[:, 0], d[:, 1], bins=36, range=[[-180, 180], [-180, 180]])
        with np.errstate(divide="ignore"):
            g = -kT * np.log(hist / hist.max())
        mesh = ax.pcolormesh(xe, ye, g.T, cmap="viridis", vmax=20)
        fig.colorbar(mesh, ax=ax, label="G (kJ/mol)")
        ax.set_xlabel("phi (deg)")
        ax.set_ylabel("psi (deg)")
        return _png(fig)
    n = max(1, d.shape[1])
    fig, axes = plt.subplots(1, n, figsize=(2.6 * n + 1, 2.8), dpi=100, squeeze=False)
    for t in range(d.shape[1]):
        hist, edges = np.histogram(d[:, t], bins=72, range=(-180, 180))
        with np.errstate(divide="ignore"):
            g = -kT * np.log(hist / hist.max())
        axes[0, t].step(0.5 * (edges[1:] + edges[:-1]), g, where="mid")
        axes[0, t].set_xlabel(f"torsion {names[t]} (deg)")
        axes[0, t].set_ylim(0, 25)
    axes[0, 0].set_ylabel("G (kJ/mol)")
    return _png(fig)


def _acceptance_plot(windows: list[dict]) -> str:
    """Flow acceptance per cycle window, the end of training marked, as a base64 PNG."""
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 3.2), dpi=100)
    middle = np.array([0.5 * (w["cycle_start"] + w["cycle_end"]) for w in windows])
    blocks = np.array([100 * w["flow_block_acceptance"] for w in windows])
    ax.plot(middle, blocks, marker="o", markersize=3, label="flow blocks with an accepted proposal")
    proposals = np.array([np.nan if w["flow_proposal_acceptance"] is None else 100 * w["flow_proposal_acceptance"]
                          for w in windows])
    if np.isfinite(proposals).any():
        ax.plot(middle, proposals, marker="s", markersize=3, label="flow proposals accepted")
    production = [w["cycle_start"] for w in windows if w["phase"] == "production"]
    if production and windows[0]["phase"] == "training":
        ax.axvline(production[0], color="#555", linestyle="--", label="end of training")
    ax.set_xlabel("cycle")
    ax.set_ylabel("acceptance (%)")
    ax.set_ylim(-2, 102)  # keep 0% and 100% markers clear of the frame
    ax.legend(fontsize=7, loc="best")
    return _png(fig)


def move_acceptance(store: RunStore) -> dict:
    """Whole-run acceptance by move type, from the checkpoint's counters (None where unused)."""
    state = store.read_state()
    saved = json.loads(str(state["stats"])) if state is not None else {}
    names = {"training": "flow_training", "production": "flow_production", "single": "one_torsion",
             "dart": "dart"}
    out = {label: (saved[key]["accepted"] / saved[key]["proposed"]
                   if key in saved and saved[key]["proposed"] else None)
           for key, label in names.items()}
    exchange = saved.get("exchange")
    if exchange:  # replica exchange: per neighbour pair of the ladder
        out["exchange"] = sum(exchange["accepted"]) / max(1, sum(exchange["attempted"]))
        out["exchange_per_pair"] = [a / t if t else None for a, t in zip(exchange["accepted"], exchange["attempted"])]
        out["ladder_K"] = exchange["temperatures_K"]
    return out


def _acceptance_section(summary: dict) -> str:
    """The acceptance-over-time heading and plot; empty for runs without flow moves."""
    windows = summary["acceptance_over_time"]
    if not windows:
        return ""
    return f"""<h2>Acceptance over time</h2>
<p>Flow moves per window of cycles; one-torsion moves and seed darts are not recorded per
cycle, and single flow proposals only in production.</p>
<p><img id="acceptance-plot" alt="flow acceptance" src="data:image/png;base64,{_acceptance_plot(windows)}"></p>
"""


def _html(summary: dict) -> str:
    verdict = summary["verdict"]
    colour = "#2e7d32" if verdict == "converged" else "#c62828"
    reasons = "".join(f"<li>{html.escape(r)}</li>" for r in summary["reasons"])
    reasons += "".join(f"<li>warning: {html.escape(w)}</li>" for w in summary["warnings"])
    rows = "".join(
        f"<tr><td>{html.escape(s['name'])}</td><td>{100 * s['population']:.1f}</td>"
        f"<td>{100 * s['ci95'][0]:.1f} - {100 * s['ci95'][1]:.1f}</td>"
        f"<td>{s['dG_kJ_per_mol']:.2f}</td><td>{s['dG_ci95'][0]:.2f} - {s['dG_ci95'][1]:.2f}</td></tr>"
        for s in summary["states"]
    )
    acceptance = summary["flow_acceptance_production"]
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>hopwell report</title>
<style>body{{font-family:sans-serif;max-width:900px;margin:2em auto;color:#222}}
table{{border-collapse:collapse}}td,th{{border:1px solid #ccc;padding:4px 10px;text-align:right}}
td:first-child,th:first-child{{text-align:left}}.verdict{{color:{colour};font-size:1.4em}}</style>
</head><body>
<h1>Conformer populations</h1>
<p class="verdict" id="verdict">Verdict: {html.escape(verdict)}</p>
<ul>{reasons}</ul>
<p>{summary['temperature_K']:.1f} K; {summary['samples']} production samples from {summary['walkers']}
walker(s); effective samples {summary['effective_samples']:.0f}; {summary['transitions']} transitions;
flow acceptance {"-" if acceptance is None else f"{100 * acceptance:.1f}%"}; over the whole run:
{", ".join(f"{k.replace('_', ' ')} {100 * v:.1f}%" for k, v in summary["move_acceptance"].items()
           if isinstance(v, float)) or "-"}.</p>
<table id="populations"><tr><th>state</th><th>population (%)</th><th>95% interval (%)</th>
<th>dG (kJ/mol) vs {html.escape(summary['dG_reference'])}</th><th>dG 95% interval</th></tr>{rows}</table>
{"".join(f"<p>{html.escape(k)}: {v['mean']:.2f} (95% {v['ci95_low']:.2f} - {v['ci95_high']:.2f})</p>"
         for k, v in summary.get("observables", {}).items())}
<h2>Walkers</h2>
<table id="walkers"><tr><th>walker</th>{"".join(f"<th>{html.escape(s['name'])} (%)</th>" for s in summary["states"])}<th>transitions</th></tr>
{"".join(f"<tr><td>{w}</td>" + "".join(f"<td>{100 * p:.1f}</td>" for p in row) + f"<td>{t}</td></tr>"
         for w, (row, t) in enumerate(zip(summary["per_walker_populations"], summary["transitions_per_walker"])))}
</table>
<p><img id="population-plot" alt="populations" src="data:image/png;base64,{_population_plot(summary)}"></p>
<h2>Free energy along the state torsions</h2>
<p><img id="torsion-plot" alt="torsion free energies" src="data:image/png;base64,{_torsion_plot(summary)}"></p>
<h2>Running estimates</h2>
<p><img id="running-plot" alt="running populations" src="data:image/png;base64,{_running_plot(summary)}"></p>
{_acceptance_section(summary)}<p>Populations are properties of the force field and solvent model; an unconverged run
misleads; results inform research and do not replace experiment.</p>
</body></html>
"""


def format_table(summary: dict) -> str:
    """The population table as plain text, for the terminal."""
    lines = [f"verdict: {summary['verdict']}"] + [f"  - {r}" for r in summary["reasons"]]
    lines += [f"  warning: {w}" for w in summary["warnings"]]
    lines.append(f"{'state':<24} {'population':>10} {'95% interval':>17} {'dG kJ/mol':>10}")
    for s in summary["states"]:
        lines.append(f"{s['name']:<24} {100 * s['population']:>9.1f}% "
                     f"{100 * s['ci95'][0]:>7.1f}-{100 * s['ci95'][1]:<6.1f}% {s['dG_kJ_per_mol']:>10.2f}")
    for name, value in summary.get("observables", {}).items():
        lines.append(f"{name}: {value['mean']:.2f} ({value['ci95_low']:.2f}-{value['ci95_high']:.2f})")
    if "reweighted" in summary:
        rw = summary["reweighted"]
        target = ", ".join(f"{k} {v}" for k, v in rw["to"].items())
        lines.append(f"reweighted to {target} (effective samples {rw['effective_samples']:.0f}):")
        for s in rw["states"]:
            lines.append(f"{s['name']:<24} {100 * s['population']:>9.1f}% "
                         f"{100 * s['ci95'][0]:>7.1f}-{100 * s['ci95'][1]:<6.1f}%")
    return "\n".join(lines)
