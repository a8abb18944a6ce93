"""Cost per production sample and acceptance against molecule size, with the default settings.

Run ``python -m hopwell.bench.scale --minutes 3``. Each molecule is one flow run (30% of the
budget training) in its own process, one after another; the table gives atoms, rotatable
bonds, walkers, production samples, sampling seconds per production sample, acceptance by
move type in production, effective samples per second and the process's peak resident memory.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import resource
import tempfile
from pathlib import Path

from hopwell.bench import print_table

# Molecules of about 10, 20, 50 and 100 atoms (the last two made up for this benchmark).
MOLECULES = {
    "N-methylacetamide": "CC(=O)NC",
    "Ace-Ala-NMe": "systems/ace_ala_nme.pdb",
    "aryl amide (45 atoms)": "COc1ccc(CN(C)C(=O)CCN2CCOCC2)cc1",
    "peptidomimetic (97 atoms)": "CCOC(=O)c1ccc(cc1)NC(=O)[C@@H](CC(C)C)NC(=O)c1cc(OC)c(OC)c(OC)c1CCN(CC)CCOCCOC",
}


def measure(spec: str, seconds: float, solvent: str) -> dict:
    """One run in this process; returns the table row."""
    import torch

    from hopwell.analysis.summary import analyse
    from hopwell.sampling.run import start_run
    from hopwell.sampling.sampler import Budget, SamplerSettings
    from hopwell.systems.builder import BuildOptions, build

    torch.set_num_threads(1)
    options = BuildOptions(solvent=solvent)
    molsys = build(spec, options)
    settings = SamplerSettings(training_cycles=10**9, training_seconds=0.3 * seconds)
    with tempfile.TemporaryDirectory() as tmp:
        sampler = start_run(spec, Path(tmp) / "run", options, settings, Budget(seconds=seconds))
        summary = analyse(Path(tmp) / "run", n_boot=200)
    production_s = sampler.elapsed_s - 0.3 * seconds
    samples = sampler.production_samples
    return {
        "atoms": molsys.n_atoms,
        "rotatable": len(molsys.rotatable_bonds()),
        "walkers": sampler.n_walkers,
        "samples": samples,
        "s_per_sample": production_s / samples if samples else float("nan"),
        "flow_acc": sampler.stats["production"].acceptance(),
        "one_torsion_acc": sampler.stats["single"].acceptance(),
        "dart_acc": sampler.stats["dart"].acceptance(),
        "ess_per_s": summary["effective_samples"] / production_s,
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
    }


def _child(args):
    return measure(*args)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--minutes", type=float, default=3.0, help="budget per molecule")
    parser.add_argument("--solvent", default="vacuum", choices=["vacuum", "obc2"])
    parser.add_argument("--json-out", type=Path, default=None)
    args = parser.parse_args(argv)
    rows = {}
    context = multiprocessing.get_context("spawn")
    for name, spec in MOLECULES.items():
        with context.Pool(1) as pool:  # a fresh process each: peak memory is per molecule
            rows[name] = pool.apply(_child, ((spec, 60.0 * args.minutes, args.solvent),))
    print_table(rows, "molecule", 26, 15)
    if args.json_out:
        args.json_out.write_text(json.dumps(rows, indent=2) + "\n")


if __name__ == "__main__":
    main()
