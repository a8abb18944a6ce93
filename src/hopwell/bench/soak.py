"""Kill soak: ``kill -9`` at many instants over every phase of a run, resuming after each.

Run ``python -m hopwell.bench.soak CCCC --kills 100``. A run of INPUT is started with the CLI
(``hopwell run``), killed with SIGKILL, resumed (``hopwell resume``), killed again, and so on
until ``--kills`` kills have landed; then it is resumed to its end. Each kill aims at one phase,
taken in turn:

* ``start-up``: a random instant in the first seconds (imports, building, seeding, creating
  the directory, checkpoint zero);
* ``training`` and ``production``: a random instant after the checkpoint shows that phase;
* ``switch``: just after the checkpoint that ends training;
* ``chunk`` and ``checkpoint``: while a chunk or the checkpoint is being written atomically (a
  temporary file is present), after a random extra delay of up to a few milliseconds;
* ``report``: ``hopwell report`` killed at a random instant, once sampling is done.

After every kill the files under their final names must load whole (chunks, checkpoint, flow
file, ``run.toml``). At the end: every recorded chain sample is identified by (cycle, walker,
move), so a lost or doubled sample shows as a missing or repeated key; the production count
must equal that of an uninterrupted run of the same budget (``reference/``); ``hopwell
report`` must read the soaked directory; and the two runs' populations, read with one state
model, must agree within ``ALLOWANCE_SE`` combined standard errors (a resume draws fresh
Langevin noise, so the runs agree statistically, not sample by sample).

The table gives kills per phase, samples, lost and doubled records, and the largest population
difference against its allowance.
"""

from __future__ import annotations

import argparse
import math
import os
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import numpy as np

from hopwell.bench import print_table
from hopwell.sampling.files import DamagedFile, read_npz, read_weights
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore

PHASES = ("start-up", "training", "switch", "production", "chunk", "checkpoint", "report")
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "OPENMM_CPU_THREADS": "1"}
HOPWELL = [sys.executable, "-m", "hopwell.cli"]
POLL_S = 0.001


def _state(run_dir: Path) -> dict | None:
    """The checkpoint's arrays now, or None while there is none (or it is being replaced)."""
    try:
        return read_npz(run_dir / "state.npz")
    except DamagedFile:
        return None


def _temp_files(run_dir: Path, folder: str) -> bool:
    try:
        return any(n.endswith(".tmp") for n in os.listdir(run_dir / folder))
    except FileNotFoundError:
        return False


def _armed(run_dir: Path, phase: str, start_cycle: int) -> bool:
    """Whether the run has reached the moment that ``phase`` aims at."""
    state = _state(run_dir)
    if phase == "training":
        return state is not None and int(state["training_end_cycle"]) < 0 and int(state["cycle"]) > start_cycle
    if phase == "switch":
        return state is not None and int(state["training_end_cycle"]) >= 0
    if phase == "production":
        return state is not None and int(state["training_end_cycle"]) >= 0 and int(state["cycle"]) > start_cycle
    if phase == "chunk":
        return _temp_files(run_dir, "chunks")
    if phase == "checkpoint":
        return _temp_files(run_dir, ".")
    return True


def kill_during(proc: subprocess.Popen, run_dir: Path, phase: str, delay_s: float, limit_s: float) -> int:
    """SIGKILL ``proc`` ``delay_s`` after ``phase`` is reached (or at ``limit_s``); its exit status."""
    start = time.perf_counter()
    state = _state(run_dir)
    start_cycle = int(state["cycle"]) if state is not None else -1
    fire_at = None
    while proc.poll() is None:
        now = time.perf_counter()
        if fire_at is None and _armed(run_dir, phase, start_cycle):
            fire_at = now + delay_s
        if (fire_at is not None and now >= fire_at) or now - start > limit_s:
            proc.send_signal(signal.SIGKILL)
            break
        time.sleep(POLL_S)
    return proc.wait(timeout=120)


def check_whole(run_dir: Path) -> None:
    """Every file under its final name loads whole (raises DamagedFile otherwise)."""
    store = RunStore(run_dir)
    if (run_dir / "run.toml").exists():
        store.config()
    if (run_dir / "chunks").is_dir():
        for _ in store.iter_chunks():  # without ``damaged``, the first bad chunk raises
            pass
    if (run_dir / "state.npz").exists():
        read_weights(run_dir / str(read_npz(run_dir / "state.npz")["flow_file"]))


def record_keys(run_dir: Path) -> tuple[Counter, int, int]:
    """(cycle, walker, move) counts over all chunks, the checkpoint's cycle and its production
    sample count."""
    store = RunStore(run_dir)
    keys: Counter = Counter()
    production = 0
    for chunk in store.iter_chunks():
        keys.update(zip(chunk["state_cycle"].tolist(), chunk["state_walker"].tolist(),
                        chunk["state_move"].tolist()))
        production += int(chunk["state_production"].sum())
    state = store.read_state()
    if production != int(state["production_samples"]):
        raise AssertionError(f"chunks hold {production} production samples, the checkpoint counts"
                             f" {int(state['production_samples'])}")
    return keys, int(state["cycle"]), production


def lost_and_doubled(keys: Counter, cycles: int, walkers: int) -> tuple[int, int]:
    """Records missing from, and records repeated in, the full set of (cycle, walker, move)."""
    expected = {(c, w, m) for c in range(cycles) for w in range(walkers) for m in (MOVE_LANGEVIN, MOVE_FLOW)}
    return len(expected - set(keys)), sum(n - 1 for n in keys.values() if n > 1) + len(set(keys) - expected)


# Each state's difference between the two runs is allowed 3 combined standard errors (the 95%
# half-widths stretched from 1.96 to 3), so that a handful of states compared at once stays
# quiet by chance in over 99% of soaks (Bonferroni bound).
ALLOWANCE_SE = 3.0


def populations(run_dir: Path, model=None) -> tuple[dict, object]:
    """``{state: (population, low, high)}`` of a run under ``model`` (default: the run's own
    automatic model), and the model used, for reading another run the same way."""
    from hopwell.analysis import states as st
    from hopwell.analysis.summary import analyse

    summary = analyse(run_dir, n_boot=400, model=model)
    if model is None and summary["state_model"] == "torsions":  # the model analyse built
        model = st.torsion_model(summary["_molecule"], summary["_dihedrals"])
    return {s["name"]: (s["population"], *s["ci95"]) for s in summary["states"]}, model


def agreement(pa: dict, pb: dict) -> tuple[float, float]:
    """The state whose populations differ most between two runs relative to its allowance
    (``ALLOWANCE_SE`` combined standard errors, from the 95% half-widths): (difference,
    allowance)."""
    rows = []
    for name in set(pa) | set(pb):
        p1, lo1, hi1 = pa.get(name, (0.0, 0.0, 0.0))
        p2, lo2, hi2 = pb.get(name, (0.0, 0.0, 0.0))
        se = math.hypot(0.5 * (hi1 - lo1), 0.5 * (hi2 - lo2)) / 1.96
        rows.append((abs(p1 - p2), ALLOWANCE_SE * se))
    return max(rows, key=lambda r: r[0] / r[1] if r[1] > 0 else (math.inf if r[0] > 0 else 0.0))


def _report(run_dir: Path, cwd: Path) -> None:
    result = subprocess.run(HOPWELL + ["report", str(run_dir)], check=False, capture_output=True, text=True, env=ENV,
                            cwd=cwd, timeout=600)
    if result.returncode != 0:
        raise AssertionError(f"hopwell report failed: {result.stderr.strip()}")


def soak(spec: str, kills: int, run_args: list[str], work: Path, seed: int) -> dict:
    """The soak on ``spec`` in ``work``; returns the table's row (raises if a check fails)."""
    rng = np.random.default_rng(seed)
    run_dir, reference = work / "soaked", work / "reference"
    per_phase: Counter = Counter()
    sampling_phases = [p for p in PHASES if p != "report"]
    landed, finished, round_ = 0, False, 0
    report_kills = max(1, kills // len(PHASES))
    while not finished:
        args = (["run", spec, *run_args, "-o", str(run_dir)] if not (run_dir / "run.toml").exists()
                else ["resume", str(run_dir)])
        state = _state(run_dir)
        in_production = state is not None and int(state["training_end_cycle"]) >= 0
        with open(work / "stderr.log", "a") as err:
            proc = subprocess.Popen(HOPWELL + args, stdout=subprocess.DEVNULL, stderr=err, env=ENV, cwd=work)
        if landed >= kills - report_kills:  # enough kills: let it finish
            if proc.wait() != 0:
                raise AssertionError(f"the final resume failed; see {work / 'stderr.log'}")
            break
        reachable = [p for p in sampling_phases if not (in_production and p in ("training", "switch"))]
        phase = reachable[round_ % len(reachable)]
        delay = rng.uniform(0.0, 4.0) if phase == "start-up" else rng.uniform(0.0, 0.3 if phase in (
            "training", "production") else 0.005)
        rc = kill_during(proc, run_dir, phase, delay, limit_s=60.0)
        round_ += 1
        if rc == -signal.SIGKILL:
            landed += 1
            per_phase[phase] += 1
            check_whole(run_dir)
        elif rc == 0:
            finished = True  # the budget ran out before the kills did: a larger --samples gives more
        else:
            raise AssertionError(f"run exited with {rc}; see {work / 'stderr.log'}")
    started = time.perf_counter()
    _report(run_dir, work)
    report_s = time.perf_counter() - started
    for _ in range(report_kills):  # kill instants spread over a report's own duration
        proc = subprocess.Popen(HOPWELL + ["report", str(run_dir)], stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL, env=ENV, cwd=work)
        if kill_during(proc, run_dir, "report", rng.uniform(0.1, 0.95) * report_s, 600.0) == -signal.SIGKILL:
            landed += 1
            per_phase["report"] += 1
        check_whole(run_dir)
    _report(run_dir, work)  # reads after the killed reports
    subprocess.run(HOPWELL + ["run", spec, *run_args, "-o", str(reference)], check=True, env=ENV, cwd=work,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    soaked_populations, model = populations(run_dir)
    reference_populations, _ = populations(reference, model)
    walkers = int(RunStore(run_dir).config()["walkers"])
    keys, cycles, production = record_keys(run_dir)
    lost, doubled = lost_and_doubled(keys, cycles, walkers)
    _, ref_cycles, ref_production = record_keys(reference)
    diff, allowed = agreement(soaked_populations, reference_populations)
    return {"kills": landed, **{p: per_phase[p] for p in PHASES}, "cycles": cycles,
            "reference_cycles": ref_cycles, "samples": production, "reference_samples": ref_production,
            "lost": lost, "doubled": doubled, "max_diff": round(diff, 4), "allowed": round(allowed, 4)}


def soak_passed(row: dict) -> bool:
    """The soak's pass criteria: nothing lost or doubled, the same sample count as the
    uninterrupted run, populations within their combined intervals."""
    return (row["lost"] == 0 and row["doubled"] == 0 and row["samples"] == row["reference_samples"]
            and row["max_diff"] <= row["allowed"])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("input", help="a molecule as hopwell run takes it (SMILES, SDF, PDB)")
    parser.add_argument("--kills", type=int, default=100)
    parser.add_argument("--samples", type=int, default=2000, help="production samples of each run")
    parser.add_argument("--training-cycles", type=int, default=20)
    parser.add_argument("--seed", type=int, default=1, help="seeds the kill instants and both runs")
    parser.add_argument("--out", type=Path, help="keep the run directories here (default: a temp folder)")
    args = parser.parse_args(argv)
    if args.kills < len(PHASES):
        parser.error(f"--kills must be at least {len(PHASES)} (one per phase)")
    run_args = ["--samples", str(args.samples), "--training-cycles", str(args.training_cycles),
                "--seed", str(args.seed), "--langevin-steps", "50", "--proposals", "8"]
    with tempfile.TemporaryDirectory() as tmp:
        work = args.out or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        start = time.perf_counter()
        row = soak(args.input, args.kills, run_args, work, args.seed)
        row["minutes"] = round((time.perf_counter() - start) / 60.0, 1)
    print_table({args.input: {**row, "passed": soak_passed(row)}}, "input", max(8, len(args.input)), 10)
    return 0 if soak_passed(row) else 1


if __name__ == "__main__":
    sys.exit(main())
