"""Methods head to head: each sampling method, several seeds, one molecule, equal budgets.

Every run is an ordinary run directory (``DIR/runs/<method>-<repeat>``), sampled for the same
wall-clock budget. All runs are then read with one state model (a user's states file, the
backbone regions for a peptide, or torsion wells found in the pooled samples of every run), and
for each method the comparison gives:

* the running population of each state over sampling time (pooled over walkers, samples up to
  that time) and, with a reference, its error against the reference;
* the time to a stated error: the first time from which the running error stays within the
  tolerance to the end of the budget (a run that merely crosses the reference on its way does
  not count);
* the final populations with their 95% intervals (:func:`hopwell.analysis.summary.analyse`), effective
  samples per second of sampling time, and the acceptance of the method's moves.

A reference file (TOML) names sums of states and their reference populations::

    [[reference]]
    states = ["C7ax", "alphaL"]     # state names of the state model; their populations add
    population = 0.031
    ci95 = [0.026, 0.037]           # optional
    source = "umbrella sampling + MBAR, python -m hopwell.bench.umbrella ..."
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass, replace
from pathlib import Path

import mdtraj as md
import numpy as np
from rdkit import Chem

from hopwell.analysis import states as st
from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.store import RunStore

METHODS = ("flow", "md", "remd")
TIME_POINTS = 120  # points of the running estimates over the budget (10 s apart over 20 minutes)
TRAINING_SHARE = 0.3  # as `hopwell run --hours`: the flow trains for this share of the budget
ERROR_FLOOR_POINTS = 0.01  # errors are drawn on a log axis, clipped below at this


@dataclass(frozen=True)
class Reference:
    """One reference population: the summed population of ``states``."""

    states: tuple
    population: float
    ci95: tuple | None = None
    source: str = ""

    @property
    def label(self) -> str:
        return "+".join(self.states)


def read_reference(path) -> list[Reference]:
    """Parse a reference TOML file (see the module docstring); InputError on any problem."""
    try:
        with open(path, "rb") as handle:
            data = tomllib.load(handle)
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: cannot read reference file: {exc}") from None
    entries = data.get("reference")
    if not isinstance(entries, list) or not entries:
        raise InputError(f"{path}: no [[reference]] tables")
    out = []
    for number, entry in enumerate(entries, start=1):
        names, population = entry.get("states"), entry.get("population")
        if (not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names)
                or not isinstance(population, (int, float)) or not 0 <= population <= 1):
            raise InputError(f"{path}: reference {number} needs states = [names] and a population in [0, 1]")
        ci = entry.get("ci95")
        out.append(Reference(tuple(names), float(population), tuple(map(float, ci)) if ci else None,
                             str(entry.get("source", ""))))
    return out


def time_to_tolerance(times_s: np.ndarray, errors: np.ndarray, tolerance: float) -> float | None:
    """First time from which every later error is within ``tolerance``; None if never."""
    inside = np.asarray(errors) <= tolerance
    if not inside[-1]:
        return None
    outside = np.flatnonzero(~inside)
    return float(times_s[0] if len(outside) == 0 else times_s[outside[-1] + 1])


def running_populations(labels: np.ndarray, time_s: np.ndarray, n_states: int,
                        times_s: np.ndarray) -> np.ndarray:
    """Population of each state from the samples recorded up to each time, ``(n_times, n_states)``.

    NaN where no sample was recorded yet.
    """
    order = np.argsort(time_s, kind="stable")
    labels, time_s = labels[order], time_s[order]
    counts = np.cumsum(np.eye(n_states)[labels], axis=0)
    upto = np.searchsorted(time_s, times_s, side="right")
    out = np.full((len(times_s), n_states), np.nan)
    seen = upto > 0
    out[seen] = counts[upto[seen] - 1] / upto[seen, None]
    return out


# -- running the methods --------------------------------------------------------------------
def _run_one(job: dict) -> str:
    """Worker: one run directory (module level, so that it pickles into a Dask task)."""
    import torch

    from hopwell.sampling.run import start_run
    from hopwell.sampling.sampler import Budget

    torch.set_num_threads(1)
    start_run(job["input"], Path(job["dir"]), job["build"], job["settings"], Budget(seconds=job["seconds"]))
    return job["dir"]


def plan_runs(input_spec: str, out_dir: Path, methods, repeats: int, budget_s: float, build_options,
              settings) -> list[dict]:
    """One job per (repeat, method): run directory, settings with the repeat's seed."""
    jobs = []
    for repeat in range(repeats):  # methods interleaved, so that they share the machine's load alike
        for method in methods:
            flow = method == "flow"
            job_settings = replace(
                settings, method=method, seed=settings.seed + repeat,
                training_cycles=10**9 if flow else 0,
                training_seconds=TRAINING_SHARE * budget_s if flow else None,
            )
            jobs.append({"input": input_spec, "dir": str(out_dir / "runs" / f"{method}-{repeat}"),
                         "build": build_options, "settings": job_settings, "seconds": budget_s,
                         "method": method, "repeat": repeat})
    return jobs


def run_jobs(jobs: list[dict], workers: int, progress=None) -> None:
    """Run the jobs, ``workers`` at a time (one: in this process, in order).

    Several workers: one Dask task per job on a LocalCluster of ``workers`` single-threaded
    processes (:func:`hopwell.sampling.shards.dask_client`, the engine of sharded production).
    ``progress(job)`` is called as each job finishes. The first job that fails cancels the rest
    and raises, naming its run directory (see :func:`hopwell.sampling.shards.run_tasks`).
    """
    from hopwell.sampling.shards import dask_client, run_tasks

    if workers <= 1:
        for job in jobs:
            _run_one(job)
            if progress:
                progress(job)
        return
    with dask_client(workers) as client:
        run_tasks(client, _run_one, [(job,) for job in jobs], [job["dir"] for job in jobs],
                  on_done=(lambda k, _result: progress(jobs[k])) if progress else None)


# -- reading them back ----------------------------------------------------------------------
def _production_dihedrals(run_dir: Path, topology: md.Topology, torsions) -> tuple[np.ndarray, np.ndarray]:
    dihedrals, times = [], []
    for chunk in RunStore.open(run_dir).iter_chunks(damaged=[]):  # as the report, skip damaged chunks
        keep = chunk["state_production"].astype(bool)
        if keep.any():
            dihedrals.append(st.dihedrals(chunk["state_positions_nm"][keep], topology, torsions))
            times.append(chunk["state_time_s"][keep])
    if not dihedrals:
        return np.zeros((0, len(torsions))), np.zeros(0)
    return np.concatenate(dihedrals), np.concatenate(times)


def common_model(run_dirs: list[Path], states_file=None):
    """The state model every run is read with, and the torsions it needs."""
    first = RunStore.open(run_dirs[0])
    mol = next(iter(Chem.SDMolSupplier(str(first.path / "molecule.sdf"), removeHs=False)))
    topology = md.load_topology(str(first.path / "topology.pdb"))
    if states_file is not None:
        return st.read_user_states(states_file, mol)
    if first.config().get("kind") == "peptide":
        model = st.backbone_model(topology)
        if model is not None:
            return model
    torsions = st.state_torsions(mol)
    pooled = np.concatenate([_production_dihedrals(d, topology, torsions)[0] for d in run_dirs])
    if len(pooled) == 0:
        raise InputError("no run recorded production samples; give a longer --budget")
    return st.torsion_model(mol, pooled)


def _acceptance(run_dir: Path, method: str) -> dict:
    state = RunStore.open(run_dir).read_state()
    saved = json.loads(str(state["stats"])) if state is not None else {}

    def rate(name):
        s = saved.get(name)
        return s["accepted"] / s["proposed"] if s and s["proposed"] else None

    if method == "flow":
        return {"flow": rate("production"), "one_torsion": rate("single"), "dart": rate("dart")}
    if method == "remd":
        exchange = saved.get("exchange") or {}
        attempts, accepted = np.sum(exchange.get("attempted", [0])), np.sum(exchange.get("accepted", [0]))
        return {"exchange": float(accepted / attempts) if attempts else None}
    return {}


def compare_runs(jobs: list[dict], budget_s: float, references: list[Reference] | None,
                 tolerance: float, states_file=None) -> dict:
    """The comparison summary (what ``comparison.json`` holds)."""
    from hopwell.analysis.summary import analyse

    run_dirs = [Path(j["dir"]) for j in jobs]
    model = common_model(run_dirs, states_file)
    names = list(model.names)
    groups = []
    for ref in references or []:
        missing = [n for n in ref.states if n not in names]
        if missing:
            raise InputError(f"reference names unknown state(s) {', '.join(missing)}; states are {', '.join(names)}")
        groups.append((ref.label, [names.index(n) for n in ref.states], ref))
    if not groups:  # no reference: every state on its own
        groups = [(n, [i], None) for i, n in enumerate(names)]
    topology = md.load_topology(str(run_dirs[0] / "topology.pdb"))
    times = np.linspace(budget_s / TIME_POINTS, budget_s, TIME_POINTS)
    runs = []
    for job, run_dir in zip(jobs, run_dirs):
        dihedrals, time_s = _production_dihedrals(run_dir, topology, model.torsions)
        record = {"method": job["method"], "repeat": job["repeat"], "dir": str(run_dir),
                  "samples": int(len(time_s)), "acceptance": _acceptance(run_dir, job["method"])}
        if len(time_s) == 0:
            runs.append(record | {"running": None, "final": None})
            continue
        running = running_populations(model.assign(dihedrals), time_s, len(names), times)
        record["running"] = {label: [None if np.isnan(v) else float(v) for v in running[:, idx].sum(axis=1)]
                             for label, idx, _ in groups}  # None (valid JSON) before the first sample
        summary = analyse(run_dir, n_boot=500, model=model)
        record["verdict"] = summary["verdict"]
        record["effective_samples_per_s"] = summary["effective_samples"] / budget_s
        record["final"] = _final_groups(summary, groups, names, running[-1])
        runs.append(record)
    return {"budget_s": budget_s, "tolerance": tolerance, "times_s": times.tolist(), "states": names,
            "groups": [{"label": label, "states": [names[i] for i in idx],
                        "reference": None if ref is None else {"population": ref.population,
                                                               "ci95": ref.ci95, "source": ref.source}}
                       for label, idx, ref in groups],
            "runs": runs, "methods": _method_table(runs, groups, times, tolerance)}


def _final_groups(summary: dict, groups, names, last_running) -> dict:
    """Final population of each group: the report's own states when a group is one state."""
    by_name = {s["name"]: s for s in summary["states"]}
    out = {}
    for label, idx, _ in groups:
        if len(idx) == 1 and names[idx[0]] in by_name:
            s = by_name[names[idx[0]]]
            out[label] = {"population": s["population"], "ci95": s["ci95"]}
        else:  # a sum of states: the pooled point estimate (the report has no interval for it)
            out[label] = {"population": float(last_running[idx].sum()), "ci95": None}
    return out


def _method_table(runs: list[dict], groups, times: np.ndarray, tolerance: float) -> list[dict]:
    rows = []
    for method in dict.fromkeys(r["method"] for r in runs):
        mine = [r for r in runs if r["method"] == method and r["running"] is not None]
        for label, _, ref in groups:
            finals = np.array([r["running"][label][-1] for r in mine], dtype=float)
            row = {"method": method, "group": label, "repeats": len(mine),
                   "population_mean": float(finals.mean()) if len(finals) else None,
                   "population_spread": float(finals.std(ddof=1)) if len(finals) > 1 else None,
                   "effective_samples_per_s": float(np.mean([r["effective_samples_per_s"] for r in mine])) if mine else None}
            widths = [r["final"][label]["ci95"][1] - r["final"][label]["ci95"][0]
                      for r in mine if r["final"][label]["ci95"] is not None]
            row["ci95_width_mean"] = float(np.mean(widths)) if widths else None
            if ref is not None:
                # No sample yet counts as an infinite error, never as within tolerance.
                errors = [np.nan_to_num(np.abs(np.array(r["running"][label], dtype=float) - ref.population), nan=np.inf)
                          for r in mine]
                reached = [time_to_tolerance(times, e, tolerance) for e in errors]
                row["final_error_mean"] = float(np.mean([e[-1] for e in errors])) if errors else None
                row["time_to_tolerance_s"] = reached
                row["reached"] = int(sum(t is not None for t in reached))
            rows.append(row)
    return rows


# -- output -----------------------------------------------------------------------------------
def format_table(comparison: dict) -> str:
    """The per-method table as text."""
    tol = 100 * comparison["tolerance"]
    lines = [f"{'method':<6} {'state':<22} {'population':>18} {'95% width':>9} {'ESS/s':>8}"
             + (f" {'error':>7} {'time to ' + format(tol, 'g') + ' pt':>16}" if comparison["groups"][0]["reference"] else "")]
    for row in comparison["methods"]:
        pop = "n/a" if row["population_mean"] is None else f"{100 * row['population_mean']:.2f}%"
        if row["population_spread"] is not None:
            pop += f" +- {100 * row['population_spread']:.2f}"
        ess = "n/a" if row["effective_samples_per_s"] is None else f"{row['effective_samples_per_s']:.2f}"
        width = "n/a" if row["ci95_width_mean"] is None else f"{100 * row['ci95_width_mean']:.2f}"
        line = f"{row['method']:<6} {row['group'][:22]:<22} {pop:>18} {width:>9} {ess:>8}"
        if "time_to_tolerance_s" in row:
            err = "n/a" if row["final_error_mean"] is None else f"{100 * row['final_error_mean']:.2f}"
            reached = [t for t in row["time_to_tolerance_s"] if t is not None]
            when = (f"{np.median(reached):.0f} s ({row['reached']}/{row['repeats']})" if reached
                    else f"never (0/{row['repeats']})")
            line += f" {err:>7} {when:>16}"
        lines.append(line)
    for group in comparison["groups"]:
        if group["reference"]:
            ref = group["reference"]
            ci = f" [{100 * ref['ci95'][0]:.1f}, {100 * ref['ci95'][1]:.1f}]" if ref["ci95"] else ""
            lines.append(f"reference {group['label']}: {100 * ref['population']:.2f}%{ci}")
    return "\n".join(lines)


def write_outputs(out_dir: Path, comparison: dict) -> list[Path]:
    """comparison.json, comparison.csv and comparison.png in ``out_dir``."""
    import csv
    import io

    out_dir = Path(out_dir)
    paths = [out_dir / "comparison.json", out_dir / "comparison.csv", out_dir / "comparison.png"]
    atomic_write_bytes(paths[0], (json.dumps(comparison, indent=2) + "\n").encode())
    text = io.StringIO()
    writer = csv.writer(text)
    keys = ["method", "group", "repeats", "population_mean", "population_spread", "ci95_width_mean",
            "effective_samples_per_s", "final_error_mean", "reached"]
    writer.writerow(keys)
    for row in comparison["methods"]:
        writer.writerow([row.get(k) for k in keys])
    atomic_write_bytes(paths[1], text.getvalue().encode())
    atomic_write_bytes(paths[2], _plot(comparison))
    return paths


def _plot(comparison: dict) -> bytes:
    import io

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    groups = comparison["groups"][:6]
    fig, axes = plt.subplots(1, len(groups), figsize=(4.2 * len(groups), 3.4), squeeze=False)
    times_min = np.array(comparison["times_s"]) / 60.0
    colours = {m: f"C{k}" for k, m in enumerate(METHODS)}
    for ax, group in zip(axes[0], groups):
        ref = group["reference"]
        for run in comparison["runs"]:
            if run["running"] is None:
                continue
            values = 100 * np.array(run["running"][group["label"]], dtype=float)
            y = np.maximum(np.abs(values - 100 * ref["population"]), ERROR_FLOOR_POINTS) if ref else values
            ax.plot(times_min, y, color=colours.get(run["method"], "k"), alpha=0.8,
                    label=run["method"] if run["repeat"] == 0 else None)
        if ref:
            ax.axhline(100 * comparison["tolerance"], color="grey", ls="--", lw=1)
            ax.set_yscale("log")
            ax.set_ylim(bottom=ERROR_FLOOR_POINTS)
        ax.set_title(group["label"][:40], fontsize=9)
        ax.set_xlabel("sampling time (min)")
        ax.set_ylabel("error (points)" if ref else "population (%)")
        ax.legend(fontsize=8)
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    plt.close(fig)
    return buffer.getvalue()
