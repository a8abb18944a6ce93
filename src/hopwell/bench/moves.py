"""Move-schedule variants of the flow method side by side, on one molecule and equal budgets.

Run ``python -m hopwell.bench.moves systems/ace_ala_nme.pdb --minutes 5``. Each variant is a
full run (training for 30% of the budget, then production) into a temporary directory; the table
gives acceptance by move type in production, proposals per second, effective samples per second
(:func:`hopwell.analysis.summary.analyse`) and the phi > 0 population where the molecule is a dipeptide.
Variants run one after another, so their ratios share the machine's load.

``--training-shares 0.05,0.1,0.3,0.6`` runs each variant with each share of the budget spent
training (30% by default, as ``hopwell run --hours``); the rows then say how much production
gains from a longer-trained flow, and the last column gives the training cycles reached.

``--against REV`` checks a change for behaviour: each variant runs on this tree and then on git
revision REV (checked out in a temporary worktree, run in a subprocess with that tree's
``src`` first on the path), alternating, and the table has a row ``NAME@REV`` under each row.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from dataclasses import replace
from pathlib import Path

import torch

from hopwell.analysis.summary import analyse
from hopwell.bench import print_table
from hopwell.sampling.run import start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.systems.builder import BuildOptions

# Defaults (flow over rotatable single-bond torsions given their bond angles, with darts);
# amide-like torsions in the flow too; an unconditional flow; flow and one-torsion moves over
# every moving torsion (methyl rotors too); no darts; torsion-pair moves added to the default, or
# in place of half the one-torsion moves (the same number of proposals); no ring flips.
VARIANTS = {
    "default": {},
    "stiff-in-flow": {"flow_stiff_torsions": True},
    "no-context": {"flow_context": False},
    "all-torsions": {"flow_torsions": "all"},
    "no-darts": {"darts_per_cycle": 0},
    "pairs": {"pair_moves_per_cycle": 8},
    "half-pairs": {"single_moves_per_cycle": 8, "pair_moves_per_cycle": 8},
    "no-ring-flips": {"ring_flips_per_cycle": 0},
}


def run_variant(spec: str, out: Path, overrides: dict, seconds: float, training_share: float = 0.3) -> dict:
    """One run with the given settings overrides; returns the row of the table."""
    settings = replace(SamplerSettings(training_cycles=10**9, training_seconds=training_share * seconds), **overrides)
    sampler = start_run(spec, out, BuildOptions(), settings, Budget(seconds=seconds))
    summary = analyse(out, n_boot=200)
    production_s = sampler.elapsed_s - seconds * training_share
    flow = sampler.stats["production"]
    row = {
        "flow_acceptance": flow.acceptance(),
        "one_torsion_acceptance": sampler.stats["single"].acceptance(),
        "pair_acceptance": sampler.stats["pair"].acceptance(),
        "ring_flip_acceptance": sampler.stats["ring"].acceptance(),
        "dart_acceptance": sampler.stats["dart"].acceptance(),
        "flow_proposals_per_s": flow.proposed / production_s,
        "ess_per_s": summary["effective_samples"] / production_s,
        "verdict": summary["verdict"],
    }
    names = [s["name"] for s in summary["states"]]
    if "C7ax" in names:
        row["phi>0"] = sum(s["population"] for s in summary["states"] if s["name"] in ("C7ax", "alphaL"))
    row["training_cycles"] = sampler.training_end_cycle
    return row


REPOSITORY = Path(__file__).resolve().parents[3]


def run_variant_at(revision_tree: Path, spec: str, name: str, minutes: float, out_json: Path) -> dict:
    """The same variant row from another checkout of hopwell, run in a subprocess."""
    env = os.environ | {"PYTHONPATH": str(revision_tree / "src")}
    subprocess.run([sys.executable, "-m", "hopwell.bench.moves", spec, "--minutes", str(minutes),
                    "--variants", name, "--json-out", str(out_json)], env=env, check=True,
                   stdout=subprocess.DEVNULL)
    return json.loads(out_json.read_text())[name]


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input")
    parser.add_argument("--minutes", type=float, default=5.0, help="budget per variant")
    parser.add_argument("--variants", default=",".join(VARIANTS), help="comma-separated names")
    parser.add_argument("--training-shares", default="0.3",
                        help="comma-separated shares of the budget spent training (each variant at each)")
    parser.add_argument("--json-out", type=Path, default=None)
    parser.add_argument("--against", metavar="REV", default=None,
                        help="also run each variant on this git revision, for an old/new table")
    args = parser.parse_args(argv)
    shares = [float(x) for x in args.training_shares.split(",")]
    if args.against and shares != [0.3]:
        parser.error("--against compares at the default training share only")
    torch.set_num_threads(1)
    rows = {}
    with tempfile.TemporaryDirectory() as tmp:
        other = Path(tmp) / "against"
        if args.against:
            subprocess.run(["git", "-C", str(REPOSITORY), "worktree", "add", "-q", "--detach", str(other),
                            args.against], check=True)
        try:
            for k, name in enumerate(args.variants.split(",")):
                for j, share in enumerate(shares):
                    row_name = name if len(shares) == 1 else f"{name} ({share:g})"
                    rows[row_name] = run_variant(args.input, Path(tmp) / f"v{k}-{j}", VARIANTS[name],
                                                 60.0 * args.minutes, share)
                if args.against:
                    rows[f"{name}@{args.against}"] = run_variant_at(other, args.input, name, args.minutes,
                                                                    Path(tmp) / f"v{k}.json")
        finally:
            if args.against:
                subprocess.run(["git", "-C", str(REPOSITORY), "worktree", "remove", "--force", str(other)],
                               check=False)
    print_table(rows, "variant", 14, 14, float_format=".3f")
    if args.json_out:
        args.json_out.write_text(json.dumps(rows, indent=2) + "\n")


if __name__ == "__main__":
    main()
