"""Time-step bias of the local move: unadjusted Langevin at several steps against exact GHMC.

Run ``python -m hopwell.bench.timestep [INPUT] [--seconds S]`` (default n-butane, MMFF94).
Prints the mean potential energy <U> with its 95% interval for LangevinMiddleIntegrator at
0.5, 1 (the default) and 2 fs and for GHMC at 1 fs, which is exact; the difference between
Langevin and GHMC is the bias of the configurational distribution. Intervals use the
statistical inefficiency of each U series.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from hopwell.analysis.observables import series_mean
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator

SETTINGS = (("langevin", 0.5), ("langevin", 1.0), ("langevin", 2.0), ("ghmc", 1.0))


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input", nargs="?", default="CCCC")
    parser.add_argument("--seconds", type=float, default=60.0, help="wall time per setting")
    args = parser.parse_args(argv)
    molsys = build(args.input, BuildOptions(n_seeds=1))
    print(f"{'local move':<10} {'dt fs':>5} {'frames':>7} {'<U> kJ/mol':>11} {'95% interval':>20} {'accept':>7}")
    for move, dt_fs in SETTINGS:
        evaluator = EnergyEvaluator(molsys.system, 300.0, timestep_ps=dt_fs * 1e-3, seed=11, local_move=move)
        x, v = molsys.seeds_nm[0], None
        x, v, _ = evaluator.langevin(x, 5000, v)  # equilibrate
        energies, start = [], time.perf_counter()
        while time.perf_counter() - start < args.seconds:
            x, v, e = evaluator.langevin(x, 20, v)
            energies.append(e)
        mean, low, high = series_mean(np.array(energies)[None])
        accept = evaluator.local_acceptance()
        print(f"{move:<10} {dt_fs:>5.1f} {len(energies):>7} {mean:>11.3f} {f'{low:.3f} - {high:.3f}':>20}"
              f" {'-' if accept is None else f'{accept:.3f}':>7}")


if __name__ == "__main__":
    main()
