"""Where production wall time goes: a cProfile of one run, summed into the sampler's parts.

Run ``python -m hopwell.bench.profile systems/ace_ala_nme.pdb --minutes 2``. The run (defaults
of ``hopwell run``, into a temporary directory) trains for 30% of the budget unprofiled; the
profiler is switched on when production starts and off when the run ends. The table gives each
part's share of that production wall time and its seconds per production cycle. A part is the
cumulative time of its entry functions (``PARTS``), counted only where the caller belongs to no
part, so a part's calls made inside another part count once, in the outer one; "rest" is the
remainder (the moves' own Python, the scheduler, torch and numpy glue, the profiler's overhead).
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import tempfile
import time
from pathlib import Path

import torch

from hopwell.bench import print_table
from hopwell.sampling.run import start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.systems.builder import BuildOptions

# part -> (file path suffix, function name) of its entry functions.
PARTS = {
    "OpenMM energies": [("systems/energy.py", "energies_kj")],
    "OpenMM dynamics": [("systems/energy.py", "langevin")],
    "flow sampling and scoring": [("flow/torsion.py", name) for name in (
        "sample", "sample_each", "log_prob", "base_log_prob", "marginal_sample", "marginal_log_prob")],
    "coordinate conversions": [("coords/internal.py", "cartesian_to_internal"),
                               ("coords/internal.py", "internal_to_cartesian"),
                               ("coords/rotate.py", "rotate_torsions"),
                               ("coords/rotate.py", "rotate_about_bond")],
    "guards": [("coords/guards.py", "__call__")],
    "store": [("sampling/sampler.py", "flush")],
}


def _part_of(key: tuple) -> str | None:
    filename, _, name = key
    path = filename.replace("\\", "/")
    for part, entries in PARTS.items():
        if any(path.endswith(suffix) and name == function for suffix, function in entries):
            return part
    return None


def part_seconds(stats: pstats.Stats) -> dict[str, float]:
    """Cumulative seconds of each part's entry functions, called from outside every part.

    Parameters
    ----------
    stats : pstats.Stats

    Returns
    -------
    dict
        ``{part: seconds}`` for every name in ``PARTS``.
    """
    out = dict.fromkeys(PARTS, 0.0)
    for key, (_, _, _, cumulative, callers) in stats.stats.items():
        part = _part_of(key)
        if part is None:
            continue
        # No callers: called from a frame entered before the profiler was switched on (the
        # sampler's run loop calls flush so), which belongs to no part.
        out[part] += (sum(ct for caller, (_, _, _, ct) in callers.items() if _part_of(caller) is None)
                      if callers else cumulative)
    return out


def profile_run(spec: str, out: Path, seconds: float) -> tuple[pstats.Stats, float, int]:
    """One run of ``seconds``; returns the production profile, its wall seconds and cycles."""
    profiler = cProfile.Profile()
    mark = {}

    def progress(sampler) -> None:
        if sampler.production and not mark:
            mark.update(start=time.perf_counter(), cycle=sampler.cycle)
            profiler.enable()

    settings = SamplerSettings(training_cycles=10**9, training_seconds=0.3 * seconds)
    try:
        sampler = start_run(spec, out, BuildOptions(), settings, Budget(seconds=seconds), progress=progress)
    finally:
        profiler.disable()
    if not mark:
        raise SystemExit("the run ended before production started; give it more --minutes")
    wall_s = time.perf_counter() - mark["start"]
    return pstats.Stats(profiler), wall_s, sampler.cycle - mark["cycle"]


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input")
    parser.add_argument("--minutes", type=float, default=2.0, help="sampling budget (30%% training)")
    parser.add_argument("--top", type=int, default=0, help="also print the N functions of most own time")
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    with tempfile.TemporaryDirectory() as tmp:
        stats, wall_s, cycles = profile_run(args.input, Path(tmp) / "run", 60.0 * args.minutes)
    parts = part_seconds(stats)
    parts["rest"] = max(wall_s - sum(parts.values()), 0.0)
    rows = {name: {"share": s / wall_s, "ms_per_cycle": 1e3 * s / max(cycles, 1)} for name, s in parts.items()}
    rows["total"] = {"share": 1.0, "ms_per_cycle": 1e3 * wall_s / max(cycles, 1)}
    print(f"production: {wall_s:.1f} s, {cycles} cycles")
    print_table(rows, "part", 26, 13, float_format=".3f")
    if args.top:
        stats.sort_stats("tottime").print_stats(args.top)


if __name__ == "__main__":
    main()
