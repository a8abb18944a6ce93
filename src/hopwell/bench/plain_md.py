"""Plain Langevin MD from each seed, for comparison with the sampler on the same molecule.

Run ``python -m hopwell.bench.plain_md systems/demo_amide.sdf --minutes 4``. Prints, per
walker, the frames spent in each well of each state torsion and the number of well changes:
what MD alone would have reported in the same wall time.
"""

from __future__ import annotations

import argparse
import time

import mdtraj as md
import numpy as np

from hopwell.analysis import states as st
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input")
    parser.add_argument("--minutes", type=float, default=4.0)
    parser.add_argument("--segment", type=int, default=200, help="Langevin steps per frame")
    args = parser.parse_args(argv)
    molsys = build(args.input, BuildOptions())
    evaluator = EnergyEvaluator(molsys.system, 300.0, seed=7)
    torsions = st.state_torsions(molsys.mol)
    topology = md.Topology.from_openmm(molsys.topology)
    seconds = args.minutes * 60.0 / len(molsys.seeds_nm)
    print(f"{'walker':>6} {'frames':>7} {'ns':>6}  torsion wells: fraction of frames (changes)")
    for walker, seed in enumerate(molsys.seeds_nm):
        x, frames, start = seed, [], time.perf_counter()
        while time.perf_counter() - start < seconds:
            x, _, _ = evaluator.langevin(x, args.segment)
            frames.append(x)
        d = st.dihedrals(np.stack(frames), topology, torsions)
        parts = []
        for t, (_, period) in enumerate(torsions):
            folded = np.degrees(st.fold(d[:, t], period))
            cis = np.abs(folded) < 90.0
            parts.append(f"t{t}: |phi|<90 {cis.mean():.3f} ({int(np.sum(cis[1:] != cis[:-1]))})")
        ns = len(frames) * args.segment * 1e-6
        print(f"{walker:>6} {len(frames):>7} {ns:>6.2f}  " + "  ".join(parts))


if __name__ == "__main__":
    main()
