"""hopwell from Python: build a molecule, sample it, read the populations.

Run from the repository root::

    python examples/api_walkthrough.py            # about 10 minutes
    python examples/api_walkthrough.py --quick    # a short run (what the tests do)
"""

import argparse
import tempfile
from pathlib import Path

import hopwell

parser = argparse.ArgumentParser()
parser.add_argument("--quick", action="store_true")
parser.add_argument("-o", "--output", default=None, help="run directory (default: a temp folder)")
args = parser.parse_args()

# 1. Build: a SMILES string (or an SDF of known structures, or a peptide PDB).
smiles = "COc1ccccc1C(=O)NC"  # 2-methoxy-N-methylbenzamide
molsys = hopwell.build(smiles, forcefield="mmff94", solvent="obc2", n_seeds=20)
print(molsys.summary())

# 2. Sample the built system (not built again); the budget is production samples here, use
#    minutes=... for wall time. Settings carry the names written to run.toml.
run_dir = Path(args.output or tempfile.mkdtemp(prefix="hopwell-walkthrough-")) / "run"
run = hopwell.sample(molsys, run_dir, samples=400 if args.quick else 20000,
                     training_cycles=30 if args.quick else 300,
                     langevin_steps=100 if args.quick else 250)
print("status:", run.status()["phase"], run.status()["production_samples"], "production samples")

# 3. Report: the summary is a plain dict (the same as summary.json); populations one row per state.
summary = run.summary()
page = run.report()
print("verdict:", summary["verdict"], summary["reasons"])
for row in run.populations():
    print(f"{row['state']:>20}: {100 * row['population']:5.1f}%"
          f"  [{100 * row['ci95_low']:.1f}, {100 * row['ci95_high']:.1f}]")
print("report:", page)
