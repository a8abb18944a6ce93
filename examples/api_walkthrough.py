"""hopwell from Python: build a molecule, sample it, read the populations.

Run from the repository root::

    python examples/api_walkthrough.py            # about 10 minutes
    python examples/api_walkthrough.py --quick    # a short run (what the tests do)
"""

import argparse
import tempfile
from pathlib import Path

import torch

from hopwell.analysis.summary import analyse
from hopwell.report import write_report
from hopwell.sampling.run import start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.systems.builder import BuildOptions, build

parser = argparse.ArgumentParser()
parser.add_argument("--quick", action="store_true")
parser.add_argument("-o", "--output", default=None, help="run directory (default: a temp folder)")
args = parser.parse_args()
torch.set_num_threads(1)  # torch and OpenMM take turns: one thread each

# 1. Build: a SMILES string (or an SDF of known structures, or a peptide PDB).
smiles = "COc1ccccc1C(=O)NC"  # 2-methoxy-N-methylbenzamide
molsys = build(smiles, BuildOptions(forcefield="mmff94", solvent="obc2", n_seeds=20))
print(molsys.summary())

# 2. Sample: the budget is production samples here; use Budget(seconds=...) for wall time.
settings = SamplerSettings(training_cycles=30 if args.quick else 300,
                           langevin_steps=100 if args.quick else 250)
budget = Budget(samples=400 if args.quick else 20000)
run_dir = Path(args.output or tempfile.mkdtemp(prefix="hopwell-walkthrough-")) / "run"
start_run(smiles, run_dir, BuildOptions(forcefield="mmff94", solvent="obc2", n_seeds=20),
          settings, budget)

# 3. Report: the summary is a plain dict (the same as summary.json).
summary = analyse(run_dir)
write_report(run_dir, summary)
print("verdict:", summary["verdict"], summary["reasons"])
for state in summary["states"]:
    low, high = state["ci95"]
    print(f"{state['name']:>20}: {100 * state['population']:5.1f}%  [{100 * low:.1f}, {100 * high:.1f}]")
print("report:", run_dir / "report.html")
