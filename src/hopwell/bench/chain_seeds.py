"""The one-well chain run of the tests over many seeds: is there a bias, or only noise?

Run ``python -m hopwell.bench.chain_seeds --seeds 1-10 [--no-darts]``. Each seed runs the
configuration of ``tests/test_sampler_exact.py::test_one_well_seed_matches_quadrature`` (three
walkers seeded in the -60 well of :mod:`hopwell.bench.chain`, 40 training cycles, 26 000
production samples) and prints each well's population, its standard error (the 95% interval's
half-width / 1.96) and its z-score against the quadrature (:func:`hopwell.bench.chain.exact_populations`);
the last row gives the mean over seeds with its standard error. Honest intervals give z-scores
spread as N(0, 1) and a mean within its error of the quadrature value.
"""

from __future__ import annotations

import argparse
import tempfile
from dataclasses import asdict
from pathlib import Path

import numpy as np
import torch

from hopwell.analysis.stats import population_estimate
from hopwell.bench import chain, print_table
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.sampling.store import RunStore

SAMPLES = 26_000
WALKERS = 3


def well_series(store: RunStore) -> list[np.ndarray]:
    """Each walker's production well indices (0: -60, 1: 60, 2: 180) in recorded order."""
    chunks = list(store.iter_chunks())
    positions = np.concatenate([c["state_positions_nm"] for c in chunks])
    walker = np.concatenate([c["state_walker"] for c in chunks])
    production = np.concatenate([c["state_production"] for c in chunks]).astype(bool)
    edges = chain.well_edges_rad()
    out = []
    for w in range(WALKERS):
        phi = chain.dihedrals_rad(positions[production & (walker == w)])
        out.append(np.where((phi >= edges[0]) & (phi < edges[1]), 0,
                            np.where((phi >= edges[1]) & (phi < edges[2]), 1, 2)))
    return out


def run_seed(seed: int, darts: bool, folder: Path) -> tuple[np.ndarray, np.ndarray]:
    """Populations of the three wells and their standard errors for one seed."""
    settings = SamplerSettings(
        temperature_K=chain.TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=16, single_moves_per_cycle=0,
        training_cycles=40, fit_every=4, fit_steps=40, flow_layers=2, flow_hidden=16, cycles_per_chunk=100,
        seed=seed, **({} if darts else {"darts_per_cycle": 0}))
    store = RunStore.create(folder / f"seed-{seed}", {"sampler": asdict(settings)}, {})
    Sampler(chain.chain_mol(), chain.chain_system(), chain.chain_positions_nm(-60.0)[None], settings, store,
            n_walkers=WALKERS, platform="Reference").run(Budget(samples=SAMPLES))
    result = population_estimate(well_series(store), 3, np.random.default_rng(seed))
    return result.populations, (result.upper - result.lower) / (2 * 1.96)


def seed_range(text: str) -> list[int]:
    """``"1-6,11-16"``: comma-separated seeds and inclusive ranges, as a list of seeds."""
    seeds = []
    for part in text.split(","):
        low, _, high = part.partition("-")
        seeds += list(range(int(low), int(high or low) + 1))
    return seeds


def table_row(p: np.ndarray, se: np.ndarray, exact: np.ndarray) -> dict:
    """Each well's population, standard error and z-score against ``exact``."""
    return {f"{name} {kind}": float(value) for k, name in enumerate(("-60", "60", "180"))
            for kind, value in (("p", p[k]), ("se", se[k]), ("z", (p[k] - exact[k]) / se[k]))}


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=seed_range, default=seed_range("1-10"))
    parser.add_argument("--no-darts", action="store_true", help="runs without seed darts")
    args = parser.parse_args(argv)
    if len(args.seeds) < 2:
        parser.error("--seeds needs at least two seeds (the mean's error comes from their spread)")
    torch.set_num_threads(1)
    exact = chain.exact_populations()
    rows, estimates = {}, []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in args.seeds:
            p, se = run_seed(seed, not args.no_darts, Path(tmp))
            estimates.append(p)
            rows[f"seed {seed}"] = table_row(p, se, exact)
            print_table({f"seed {seed}": rows[f"seed {seed}"]}, "seed", 10, 9)
    error = np.std(estimates, axis=0, ddof=1) / np.sqrt(len(estimates))
    rows["mean"] = table_row(np.mean(estimates, axis=0), error, exact)
    print()
    print_table(rows, "seed", 10, 9)
    print(f"quadrature: {', '.join(f'{x:.4f}' for x in exact)}")


if __name__ == "__main__":
    main()
