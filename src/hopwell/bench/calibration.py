"""How honest are the verdict and the 95% intervals? Many short runs on systems whose truth is known.

Run ``python -m hopwell.bench.calibration --out calibration.jsonl`` (in the background: it takes
tens of minutes) and read the table with ``python -m hopwell.bench.calibration --table-only
calibration.jsonl``. Runs go one after another on one core; each run's result is one JSON line,
and the file is rewritten atomically after every run, so a stopped job keeps what it finished and
a restart with the same ``--out`` skips the runs already there.

Systems, and where their truth comes from:

* ``chain``: the four-atom chain of :mod:`hopwell.bench.chain` (the tests' chain), three walkers
  seeded one per well. Its torsion marginal is exactly exp(-V(phi)/kT) (the density factorizes
  in internal coordinates; see :func:`hopwell.bench.chain.exact_populations`), so the well
  populations are ratios of scipy.integrate.quad integrals, independent of hopwell's sampling.
* ``chain-one-well``: the same chain, three walkers all seeded in the -60 well (the flow and the
  basin probes must find the other two).
* ``chain-one-well-md``: the same one-well seeding with the local segments alone
  (``method="md"``): the barriers are 11.6-12.5 kT, so the run cannot leave the seed well and
  should be flagged "not converged".
* ``nma-trans``: N-methylacetamide (MMFF94, vacuum, 300 K) seeded in trans only; truth the cis
  population of the shipped umbrella-sampling reference ``systems/nma_reference.toml``.
* ``ace-one-seed``: Ace-Ala-NMe (amber14, vacuum) from its single input structure, no backbone
  seeds; truth the phi > 0 population of ``systems/ace_ala_nme_reference.toml``. Its interval
  is the block bootstrap of :func:`hopwell.analysis.stats.population_estimate` on the run's own
  state series with the phi > 0 regions merged (the report gives intervals per region only).

The table: per system, the runs, their verdicts, the share of "converged" verdicts in which some
true population lies outside its 95% interval (the false-"converged" share, target at most 5%),
the same share judged by the intervals that hold all states at once
(:func:`hopwell.analysis.stats.joint_interval`; the states' own 95% intervals miss together
about one time in ten for three states, so a statement about all of them needs these), and how
many runs with a miss were flagged "not converged"; then the coverage of each state's own
interval (target 90-98%).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import sys
import tempfile
import time
import tomllib
import traceback
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np

from hopwell.atomic import atomic_write_bytes
from hopwell.bench import chain, print_table

REPOSITORY = Path(__file__).resolve().parents[3]
SYSTEMS_DIR = REPOSITORY / "systems"
NUMBER = re.compile(r"(?<![A-Za-z0-9.])[0-9]+(\.[0-9]+)?")  # grouping reasons that differ in figures only
SYSTEMS = ("chain", "chain-one-well", "chain-one-well-md", "nma-trans", "ace-one-seed")

CHAIN_WELLS = ("minus60", "plus60", "anti")  # the order of chain.exact_populations


def chain_files(folder: Path) -> tuple[dict, Path]:
    """The run-directory files analyse needs (molecule.sdf, topology.pdb) and a states TOML of the wells."""
    import mdtraj
    from rdkit import Chem

    mol = chain.chain_mol()
    conformer = Chem.Conformer(4)
    for i, row in enumerate(chain.chain_positions_nm(180.0) * 10.0):  # SDF keeps Angstrom
        conformer.SetAtomPosition(i, row.tolist())
    mol.AddConformer(conformer)
    topology = mdtraj.Topology()
    residue = topology.add_residue("CHN", topology.add_chain())
    atoms = [topology.add_atom(f"C{i + 1}", mdtraj.element.carbon, residue) for i in range(4)]
    for a, b in zip(atoms, atoms[1:]):
        topology.add_bond(a, b)
    pdb = folder / "chain.pdb"
    mdtraj.Trajectory(chain.chain_positions_nm(180.0)[None], topology).save_pdb(str(pdb))
    edges = np.degrees(chain.well_edges_rad())
    ranges = [(edges[0], edges[1]), (edges[1], edges[2]), (edges[2], edges[0])]  # the last wraps
    states = folder / "states.toml"
    states.write_text("".join(
        f'[[state]]\nname = "{name}"\n[[state.torsion]]\natoms = [1, 2, 3, 4]\n'
        f"range = [{float(lo)!r}, {float(hi)!r}]\n" for name, (lo, hi) in zip(CHAIN_WELLS, ranges)))
    files = {"molecule.sdf": (Chem.MolToMolBlock(mol) + "$$$$\n").encode(), "topology.pdb": pdb.read_bytes()}
    return files, states


# ---------------------------------------------------------------------------------------------
# One run of each system: returns the record (verdict, states with truth) written to the file.


def chain_settings(seed: int, seconds: float, method: str):
    """The chain's settings: the small flow of tests/test_sampler_exact.py, time-budgeted training."""
    from hopwell.sampling.sampler import SamplerSettings

    flow = method == "flow"
    return SamplerSettings(
        temperature_K=chain.TEMPERATURE_K, method=method, langevin_steps=50, proposals_per_cycle=16,
        single_moves_per_cycle=0, training_cycles=10**9 if flow else 0,
        training_seconds=0.3 * seconds if flow else None, fit_every=4, fit_steps=40, flow_layers=2,
        flow_hidden=16, cycles_per_chunk=20, seed=seed)


def run_chain(folder: Path, seed: int, seconds: float, one_well: bool, method: str) -> dict:
    """A chain run (one walker per well, or three in the -60 well) and its analysis."""
    from hopwell.analysis.summary import analyse
    from hopwell.sampling.sampler import Budget, Sampler
    from hopwell.sampling.store import RunStore

    settings = chain_settings(seed, seconds, method)
    files, states_file = chain_files(folder)
    store = RunStore.create(folder / "run", {"sampler": asdict(settings)}, files)
    angles = (-60.0, -60.0, -60.0) if one_well else (-60.0, 60.0, 180.0)
    seeds = np.stack([chain.chain_positions_nm(p) for p in angles])
    Sampler(chain.chain_mol(), chain.chain_system(), seeds, settings, store, n_walkers=3, platform="Reference").run(
        Budget(seconds=seconds))
    summary = analyse(store.path, rng_seed=seed, states_file=states_file)
    truth = dict(zip(CHAIN_WELLS, chain.exact_populations()))
    return summary_record(summary, truth)


def reference_population(path: Path) -> tuple[list[str], float, list[float]]:
    """States, population and 95% interval of the first ``[[reference]]`` of a reference TOML."""
    with open(path, "rb") as handle:
        ref = tomllib.load(handle)["reference"][0]
    return list(ref["states"]), float(ref["population"]), [float(x) for x in ref["ci95"]]


def amide_trans(molsys) -> object:
    """``molsys`` with only its trans seeds (|C-C(=O)-N-C| > 90 degrees, mdtraj dihedral)."""
    import mdtraj
    from rdkit import Chem

    quad = molsys.mol.GetSubstructMatch(Chem.MolFromSmarts("[CH3][CX3][NX3][CH3]"))
    omega = mdtraj.compute_dihedrals(mdtraj.Trajectory(molsys.seeds_nm.astype(np.float32), None),
                                     np.array([quad]))[:, 0]
    keep = np.abs(omega) > math.pi / 2
    if not keep.any():
        raise RuntimeError("no trans seed among the embedded conformers")
    return replace(molsys, seeds_nm=molsys.seeds_nm[keep])


def molecule_settings(seed: int, seconds: float):
    """Default settings with training for 30% of the time budget, as ``hopwell run --hours`` does."""
    from hopwell.sampling.sampler import SamplerSettings

    return SamplerSettings(seed=seed, training_cycles=10**9, training_seconds=0.3 * seconds)


def run_molecule(folder: Path, spec: str, options, molsys, seed: int, seconds: float) -> None:
    """Sample a built molecule into ``folder / "run"`` (as bench/moves.py does)."""
    from hopwell.sampling.run import start_run
    from hopwell.sampling.sampler import Budget

    start_run(spec, folder / "run", options, molecule_settings(seed, seconds), Budget(seconds=seconds),
              molsys=molsys)


def run_nma(folder: Path, seed: int, seconds: float) -> dict:
    """N-methylacetamide seeded in trans only, against the umbrella reference's cis population."""
    from hopwell.analysis.summary import analyse
    from hopwell.systems.builder import BuildOptions, build

    spec, options = "CC(=O)NC", BuildOptions(forcefield="mmff94", random_seed=seed)
    run_molecule(folder, spec, options, amide_trans(build(spec, options)), seed, seconds)
    summary = analyse(folder / "run", rng_seed=seed, states_file=SYSTEMS_DIR / "nma_states.toml")
    names, cis, _ = reference_population(SYSTEMS_DIR / "nma_reference.toml")
    return summary_record(summary, {names[0]: cis, "trans": 1.0 - cis})


def run_ace(folder: Path, seed: int, seconds: float) -> dict:
    """Ace-Ala-NMe from its one input structure, against the umbrella reference's phi > 0 population."""
    from hopwell.analysis import stats
    from hopwell.analysis.summary import analyse
    from hopwell.systems.builder import BuildOptions, build

    spec, options = str(SYSTEMS_DIR / "ace_ala_nme.pdb"), BuildOptions(backbone_seeds=False, random_seed=seed)
    run_molecule(folder, spec, options, build(spec, options), seed, seconds)
    summary = analyse(folder / "run", rng_seed=seed)
    names, truth, _ = reference_population(SYSTEMS_DIR / "ace_ala_nme_reference.toml")
    positive = np.isin(np.array([s["name"] for s in summary["states"]]), names)
    merged = positive[summary["_series"]].astype(np.int64)  # 1: phi > 0
    pops = stats.population_estimate(merged, 2, np.random.default_rng(seed))
    lower, upper, _ = stats.joint_interval(pops)
    record = summary_record(summary, {})
    record["states"] = [{"name": "phi>0", "population": float(pops.populations[1]),
                         "ci95": [float(pops.lower[1]), float(pops.upper[1])],
                         "ci95_all": [float(lower[1]), float(upper[1])], "truth": truth}]
    return record


def summary_record(summary: dict, truth: dict) -> dict:
    """What the table needs from a summary: verdict, reasons, and each state with its truth (or None)."""
    return {
        "verdict": summary["verdict"],
        "reasons": summary["reasons"],
        "warnings": summary["warnings"],
        "samples": summary["samples"],
        "effective_samples": summary["effective_samples"],
        "states": [{"name": s["name"], "population": s["population"], "ci95": s["ci95"],
                    "ci95_all": s["ci95_all_states"], "truth": truth.get(s["name"])}
                   for s in summary["states"]],
    }


def run_case(case: dict) -> dict:
    """One case (system, seed, seconds) in a temporary directory; the record, or the error."""
    system, seed, seconds = case["system"], case["seed"], case["seconds"]
    start = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        try:
            if system.startswith("chain"):
                record = run_chain(folder, seed, seconds, one_well="one-well" in system,
                                   method="md" if system.endswith("-md") else "flow")
            elif system == "nma-trans":
                record = run_nma(folder, seed, seconds)
            else:
                record = run_ace(folder, seed, seconds)
        except Exception as exc:  # a failed run is a row of the file, not the end of the job
            record = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
    return case | record | {"wall_s": time.monotonic() - start}


# ---------------------------------------------------------------------------------------------
# Aggregation: pure functions of the records (tests/test_calibration.py).


def state_covered(state: dict, interval: str = "ci95") -> bool:
    """Whether a state's true population lies inside its 95% interval (ends included).

    ``interval`` names the record's interval: ``"ci95"`` the state's own, ``"ci95_all"`` the
    one that holds all states at once.
    """
    low, high = state[interval]
    return low <= state["truth"] <= high


def judged_states(record: dict) -> list[dict]:
    """The states of a record that have a truth."""
    return [s for s in record.get("states", []) if s.get("truth") is not None]


def run_missed(record: dict, interval: str = "ci95") -> bool:
    """Whether some true population of the run lies outside its 95% interval."""
    return not all(state_covered(s, interval) for s in judged_states(record))


def finished(records: list[dict]) -> list[dict]:
    """The records of runs that ended with a verdict (not an error)."""
    return [r for r in records if "verdict" in r]


def false_converged(records: list[dict], interval: str = "ci95") -> tuple[int, int]:
    """(runs judged "converged" with some truth outside its interval, runs judged "converged").

    Runs whose records lack ``interval`` (files written before it was recorded) are left out.
    """
    converged = [r for r in finished(records) if r["verdict"] == "converged"
                 and all(interval in s for s in judged_states(r))]
    return sum(run_missed(r, interval) for r in converged), len(converged)


def flagged_misses(records: list[dict]) -> tuple[int, int]:
    """(runs with a miss judged "not converged", runs with a miss)."""
    missed = [r for r in finished(records) if run_missed(r)]
    return sum(r["verdict"] != "converged" for r in missed), len(missed)


def coverage(records: list[dict]) -> dict[tuple[str, str], tuple[int, int]]:
    """``{(system, state): (intervals holding the truth, intervals)}`` over the finished runs."""
    out: dict[tuple[str, str], list[int]] = {}
    for record in finished(records):
        for state in judged_states(record):
            counts = out.setdefault((record["system"], state["name"]), [0, 0])
            counts[0] += state_covered(state)
            counts[1] += 1
    return {key: (hit, n) for key, (hit, n) in out.items()}


def share(part: int, whole: int) -> float:
    """``part / whole``, NaN when ``whole`` is 0."""
    return part / whole if whole else float("nan")


def system_rows(records: list[dict]) -> dict[str, dict]:
    """One table row per system (and one for all of them): verdicts, false-"converged" share, flags."""
    names = sorted({r["system"] for r in records}, key=lambda s: SYSTEMS.index(s) if s in SYSTEMS else 99)
    rows = {}
    for name in [*names, "all"]:
        chosen = [r for r in records if name in ("all", r["system"])]
        bad, converged = false_converged(chosen)
        bad_all, converged_all = false_converged(chosen, "ci95_all")
        flagged, missed = flagged_misses(chosen)
        rows[name] = {"runs": len(finished(chosen)), "errors": len(chosen) - len(finished(chosen)),
                      "converged": converged, "conv_missing": bad, "false_conv": share(bad, converged),
                      "false_conv_all": share(bad_all, converged_all),
                      "runs_missing": missed, "flagged": flagged, "flag_share": share(flagged, missed)}
    return rows


def coverage_rows(records: list[dict]) -> dict[str, dict]:
    """One table row per (system, state): intervals, coverage, mean width and mean |estimate - truth|."""
    rows = {}
    for (system, name), (hit, n) in coverage(records).items():
        states = [s for r in finished(records) if r["system"] == system for s in judged_states(r)
                  if s["name"] == name]
        rows[f"{system}/{name}"] = {
            "truth": states[0]["truth"], "intervals": n, "coverage": share(hit, n),
            "mean_width": float(np.mean([s["ci95"][1] - s["ci95"][0] for s in states])),
            "mean_abs_err": float(np.mean([abs(s["population"] - s["truth"]) for s in states]))}
    return rows


def print_tables(records: list[dict]) -> None:
    """The verdict table by system, then the coverage table by state."""
    if not finished(records):
        print("no finished runs yet")
        return
    print_table(system_rows(records), "system", 18, 12, float_format=".3f")
    print()
    print_table(coverage_rows(records), "system/state", 28, 11, float_format=".3f")
    reasons: dict[str, int] = {}
    for record in finished(records):
        for reason in record["reasons"]:
            key = f"{record['system']}: {NUMBER.sub('N', reason)[:70]}"
            reasons[key] = reasons.get(key, 0) + 1
    if reasons:
        print("\nreasons given (count):")
        for key, count in sorted(reasons.items()):
            print(f"  {count:3d}  {key}")


# ---------------------------------------------------------------------------------------------
# The job.


def plan(systems: list[str], replicates: int, budgets_s: list[float], first_seed: int) -> list[dict]:
    """The cases, round-robin over systems so a stopped job has some runs of each."""
    cases = []
    for k in range(replicates):
        for system in systems:
            cases.append({"system": system, "seed": first_seed + k, "seconds": budgets_s[k % len(budgets_s)]})
    return cases


def read_records(path: Path) -> list[dict]:
    """The records of a JSON-lines file (none when it does not exist)."""
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def append_record(path: Path, record: dict) -> None:
    """Add one record, rewriting the whole file atomically (a crash leaves the old file whole)."""
    lines = [json.dumps(r) for r in read_records(path)] + [json.dumps(record)]
    atomic_write_bytes(path, ("\n".join(lines) + "\n").encode())


def case_key(case: dict) -> tuple:
    return case["system"], case["seed"], float(case["seconds"])


def run_job(out: Path, cases: list[dict]) -> None:
    """Run the cases not yet in ``out``, one at a time, appending each record."""
    import torch

    torch.set_num_threads(1)
    done = {case_key(r) for r in read_records(out)}
    todo = [c for c in cases if case_key(c) not in done]
    for k, case in enumerate(todo):
        record = run_case(case)
        append_record(out, record)
        print(f"[{k + 1}/{len(todo)}] {case['system']} seed {case['seed']} {case['seconds']:g} s:"
              f" {record.get('verdict', record.get('error'))} ({record['wall_s']:.0f} s wall)", flush=True)


def parse_floats(text: str) -> list[float]:
    try:
        return [float(x) for x in text.split(",")]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated seconds, got {text!r}") from None


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, help="JSON-lines file of run records (appended to)")
    parser.add_argument("--table-only", type=Path, metavar="FILE", help="print the table of FILE and exit")
    parser.add_argument("--systems", default="chain,chain-one-well,chain-one-well-md,nma-trans",
                        help=f"comma-separated, of {', '.join(SYSTEMS)}")
    parser.add_argument("--replicates", type=int, default=10, help="runs per system")
    parser.add_argument("--budgets", type=parse_floats, default=[15.0, 30.0, 60.0],
                        help="seconds per run, cycled over the replicates")
    parser.add_argument("--first-seed", type=int, default=1)
    args = parser.parse_args(argv)
    if args.table_only is not None:
        if not args.table_only.is_file():
            print(f"error: {args.table_only}: no such file", file=sys.stderr)
            sys.exit(2)
        try:
            records = read_records(args.table_only)
        except json.JSONDecodeError as exc:
            print(f"error: {args.table_only}: not a JSON-lines file of records ({exc})", file=sys.stderr)
            sys.exit(2)
        print_tables(records)
        return
    systems = args.systems.split(",")
    unknown = [s for s in systems if s not in SYSTEMS]
    if args.out is None or unknown or args.replicates < 1 or min(args.budgets) <= 0:
        print("error: give --out FILE, systems among " + ", ".join(SYSTEMS)
              + ", replicates >= 1 and positive budgets", file=sys.stderr)
        sys.exit(2)
    run_job(args.out, plan(systems, args.replicates, args.budgets, args.first_seed))
    print_tables(read_records(args.out))


if __name__ == "__main__":
    main()
