"""Energy-evaluation and Langevin throughput against platform, solvent and batch size.

Run ``python -m hopwell.bench.energy`` (``--quick`` for a shorter run). Prints one table:
energy calls per second for batches of conformers and Langevin steps per second, for a 22-atom
peptide and a drug-like molecule, on the Reference and CPU platforms, in vacuum and OBC2.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from hopwell.energy import EnergyEvaluator
from hopwell.systems.builder import BuildOptions, build

SYSTEMS = {
    "Ace-Ala-NMe (amber14)": str(Path(__file__).resolve().parents[3] / "systems" / "ace_ala_nme.pdb"),
    # A drug-like aryloxyacetamide with a tertiary amide (made up for benchmarking).
    "aryloxyacetamide (mmff94)": "COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1",
}


def _rate(fn, min_seconds: float) -> float:
    """Calls of ``fn`` per second, repeating until ``min_seconds`` have passed."""
    fn()  # warm up (context caches, JIT on the CPU platform)
    count, start = 0, time.perf_counter()
    while time.perf_counter() - start < min_seconds:
        fn()
        count += 1
    return count / (time.perf_counter() - start)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="shorter timings")
    args = parser.parse_args(argv)
    seconds = 0.3 if args.quick else 1.5
    rng = np.random.default_rng(0)
    header = f"{'system':<27} {'atoms':>5} {'solvent':<7} {'platform':<9} {'batch':>5} {'energies/s':>11} {'steps/s':>9}"
    print(header)
    print("-" * len(header))
    for label, spec in SYSTEMS.items():
        for solvent in ("vacuum", "obc2"):
            molsys = build(spec, BuildOptions(solvent=solvent, n_seeds=3))
            x0 = molsys.seeds_nm[0]
            for platform in ("Reference", "CPU"):
                evaluator = EnergyEvaluator(molsys.system, 300.0, platform=platform)
                steps = 100
                step_rate = steps * _rate(lambda: evaluator.langevin(x0, steps), seconds)
                for batch in (1, 64, 1024):
                    frames = x0 + rng.normal(0, 0.002, size=(batch, *x0.shape))
                    rate = batch * _rate(lambda: evaluator.energies_kj(frames), seconds)
                    print(f"{label:<27} {molsys.n_atoms:>5} {solvent:<7} {platform:<9} {batch:>5}"
                          f" {rate:>11.0f} {step_rate:>9.0f}")


if __name__ == "__main__":
    main()
