"""How long ``hopwell report`` takes, and how much memory, on a large run directory.

Run ``python -m hopwell.bench.report_scale [--samples N]`` (default 10^6). It writes a store of
N production samples of a 54-atom molecule (seed structures plus Gaussian noise: timing data,
not physics) in the sampler's chunk format, then times the report and reads its peak memory.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np

from hopwell.analysis.summary import analyse
from hopwell.report import write_report
from hopwell.sampling.run import _molecule_sdf, _topology_pdb
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore
from hopwell.systems.builder import BuildOptions, build

# 54 atoms, 11 rotatable bonds (a made-up ether amide, for timing only).
SMILES = "CCCOc1ccc(CC(=O)N(C)CCCOC)cc1C(C)C"


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--samples", type=int, default=1_000_000)
    parser.add_argument("--chunk", type=int, default=2000, help="samples per chunk")
    args = parser.parse_args(argv)
    molsys = build(SMILES, BuildOptions(n_seeds=8))
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        store = RunStore.create(Path(tmp) / "run", {
            "input": SMILES, "kind": "small", "walkers": 4, "sampler": {"temperature_K": 300.0},
            "budget": {"samples": args.samples},
        }, {"molecule.sdf": _molecule_sdf(molsys), "topology.pdb": _topology_pdb(molsys)})
        start = time.perf_counter()
        for index in range(args.samples // args.chunk):
            n = args.chunk
            cycle = index * n // 8 + np.arange(n) // 8
            seeds = molsys.seeds_nm[rng.integers(0, len(molsys.seeds_nm), n)]
            store.write_chunk(index, {
                "positions_nm": (seeds + rng.normal(0, 0.01, seeds.shape)).astype(np.float32),
                "energy_kj": rng.normal(0, 10, n), "walker": (np.arange(n) // 2) % 4,
                "cycle": cycle, "move": np.where(np.arange(n) % 2, MOVE_FLOW, MOVE_LANGEVIN),
                "accepted": np.ones(n, bool), "production": np.ones(n, bool),
            }, {})
        written = time.perf_counter() - start
        start = time.perf_counter()
        summary = analyse(store.path, n_boot=1000)
        analysed = time.perf_counter() - start
        write_report(store.path, summary)
        reported = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{'samples':>9} {'atoms':>5} {'write s':>8} {'analyse s':>10} {'report s':>9} {'peak MB':>8}")
    print(f"{args.samples:>9} {molsys.n_atoms:>5} {written:>8.1f} {analysed:>10.1f} {reported:>9.1f} {peak_mb:>8.0f}")


if __name__ == "__main__":
    main()
