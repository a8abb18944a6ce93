"""Production effective samples per second with 1 Dask worker against N, one training shared.

Run ``python -m hopwell.bench.shards CCCC --walkers 4 --samples 4000 --workers 2``. The run is
trained once in this process; copies of the trained run are then sampled with 1 shard on 1
worker and with N shards on N workers (same walkers, same total samples). Production seconds
are wall-clock around :func:`~hopwell.sampling.shards.run_shards` (cluster start-up included);
effective samples are the report's (``effective_samples`` of :func:`~hopwell.analysis.summary.analyse`).
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import torch

from hopwell.analysis.summary import analyse
from hopwell.sampling.run import start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.sampling.shards import run_shards, write_plan
from hopwell.systems.builder import BuildOptions


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input")
    parser.add_argument("--walkers", type=int, default=4)
    parser.add_argument("--samples", type=int, default=4000)
    parser.add_argument("--training-cycles", type=int, default=40)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    settings = SamplerSettings(training_cycles=args.training_cycles, langevin_steps=100, proposals_per_cycle=16,
                               seed=3)
    base = Path(tempfile.mkdtemp(prefix="hopwell-bench-shards-"))
    trained = base / "trained"
    write_plan(trained, 1)
    start_run(args.input, trained, BuildOptions(), settings,
              Budget(samples=args.samples, training_only=True), n_walkers=args.walkers)
    rows = []
    for workers in (1, args.workers):
        run_dir = base / f"workers{workers}"
        shutil.copytree(trained, run_dir)
        write_plan(run_dir, workers)
        start = time.perf_counter()
        run_shards(run_dir, workers=workers)
        seconds = time.perf_counter() - start
        summary = analyse(run_dir, n_boot=200)
        rows.append((workers, seconds, summary["samples"], summary["effective_samples"]))
    print(f"{'workers':>7} {'shards':>6} {'prod s':>8} {'samples':>8} {'ESS':>8} {'ESS/s':>8} {'ratio':>6}")
    first = rows[0][3] / rows[0][1]
    for workers, seconds, samples, ess in rows:
        print(f"{workers:>7} {workers:>6} {seconds:>8.1f} {samples:>8} {ess:>8.0f} {ess / seconds:>8.1f}"
              f" {ess / seconds / first:>6.2f}")
    shutil.rmtree(base)


if __name__ == "__main__":
    main()
