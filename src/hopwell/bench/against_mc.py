"""A hopwell run's torsion wells and ring states against the independent Monte Carlo reference.

Run ``python -m hopwell.bench.against_mc RUN_DIR REFERENCE.json`` on a finished run of a molecule
and the JSON that ``python -m hopwell.bench.mmff_mc`` wrote for it (same force field and
temperature, vacuum; both are checked). Every torsion and ring substituent of the reference is
read from the run's production walker states with the reference's own definitions
(:func:`hopwell.bench.mmff_mc.well_index`, :func:`hopwell.bench.mmff_mc.ring_substituent_state`),
the reference's atoms found in the run's molecule by a substructure match. For each state the
table gives hopwell's pooled population with its block-bootstrap 95% interval
(:func:`hopwell.analysis.stats.population_estimate`, each walker a series), the reference with
1.96 standard errors over its chains, and two verdicts: ``inside`` (the reference lies in
hopwell's interval widened in quadrature by the reference's own 95% half-width) and ``2 pt``
(the difference is under 2 percentage points, the issue's tolerance).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
from rdkit import Chem

from hopwell.analysis.stats import population_estimate
from hopwell.bench.mmff_mc import RING_STATE_NAMES, WELL_NAMES, dihedrals_deg, ring_substituent_state, well_index
from hopwell.sampling.shards import iter_pooled_chunks
from hopwell.sampling.store import RunStore

TOLERANCE_POINTS = 2.0


def walker_positions(store: RunStore) -> list[np.ndarray]:
    """Production walker states of each walker (shards pooled), in recorded order, ``(n, N, 3)``."""
    pos, walker = [], []
    for chunk in iter_pooled_chunks(store):
        keep = chunk["state_production"].astype(bool)
        pos.append(chunk["state_positions_nm"][keep].astype(float))
        walker.append(chunk["state_walker"][keep])
    if not pos or not sum(len(w) for w in walker):
        raise SystemExit("the run has no production samples yet")
    pos, walker = np.concatenate(pos), np.concatenate(walker)
    return [pos[walker == w] for w in np.unique(walker)]


def atom_map(run_mol: Chem.Mol, smiles: str) -> np.ndarray:
    """Index in ``run_mol`` of each heavy atom of ``smiles`` (the reference's atom order)."""
    match = run_mol.GetSubstructMatch(Chem.MolFromSmiles(smiles), useChirality=True)
    if not match:
        raise SystemExit(f"the run's molecule is not {smiles}")
    return np.asarray(match)


def compare(run_dir: Path, reference: dict, seed: int = 0) -> list[dict]:
    """One row per (torsion or ring site, state): hopwell's estimate against the reference."""
    store = RunStore.open(run_dir)
    config = store.config()
    settings = reference["settings"]
    # No forcefield in run.toml means the default, MMFF94 for a small molecule.
    forcefield = str(config["build"].get("forcefield") or "mmff94").upper()
    if forcefield != settings["force_field"].upper() or config["build"]["solvent"] != "vacuum":
        raise SystemExit(f"the run is {forcefield}/{config['build']['solvent']}, the reference "
                         f"{settings['force_field']} in vacuum")
    if abs(float(config["sampler"]["temperature_K"]) - float(settings["temperature_K"])) > 1e-6:
        raise SystemExit("the run and the reference differ in temperature")
    run_mol = Chem.MolFromMolFile(str(store.path / "molecule.sdf"), removeHs=False)
    index = atom_map(run_mol, reference["molecule"]["smiles"])
    walkers = walker_positions(store)
    length = min(len(w) for w in walkers)  # equal-length series for the block bootstrap
    rng = np.random.default_rng(seed)
    items = [(t["label"], t["atoms_1based"], None, WELL_NAMES, t) for t in reference["torsions"]]
    items += [(f"ring site {s['atom_1based']} ({s['substituent_1based']})", None, s["torsions_1based"],
               RING_STATE_NAMES, s) for s in reference["ring_substituents"]]
    rows = []
    for label, quad, site, names, ref in items:
        quads = index[np.asarray([quad] if quad is not None else site) - 1]
        # Frame by frame with the reference's own dihedral function: the same definition exactly.
        torsions = [np.stack([dihedrals_deg(x, quads) for x in w[:length]]) for w in walkers]
        series = np.stack([well_index(t)[:, 0] if quad is not None else ring_substituent_state(t)
                           for t in torsions])
        est = population_estimate(series, len(names), rng)
        for k, name in enumerate(names):
            mc, se = ref["pooled"][name], ref["standard_error_over_chains"][name]
            p, low, high = (float(x[k]) for x in (est.populations, est.lower, est.upper))
            half = (high - p) if mc > p else (p - low)
            rows.append({"item": label, "state": name, "hopwell": p, "ci95": [low, high], "reference": mc,
                         "reference_se": se, "inside": bool(abs(mc - p) <= np.hypot(half, 1.96 * se)),
                         "within_2pt": bool(abs(mc - p) * 100 < TOLERANCE_POINTS)})
    return rows


def format_rows(rows: list[dict]) -> str:
    head = f"{'torsion or ring site':<28} {'state':<11} {'hopwell (95%)':>24} {'reference':>16} {'diff':>6} inside 2pt"
    lines = [head]
    for r in rows:
        low, high = r["ci95"]
        lines.append(f"{r['item'][:28]:<28} {r['state']:<11} "
                     f"{100 * r['hopwell']:6.2f} ({100 * low:5.2f}-{100 * high:6.2f}) "
                     f"{100 * r['reference']:7.2f} +- {196 * r['reference_se']:4.2f} "
                     f"{100 * (r['hopwell'] - r['reference']):+6.2f} {'yes' if r['inside'] else 'NO':>6} "
                     f"{'yes' if r['within_2pt'] else 'NO':>3}")
    n_in, n_2 = sum(r["inside"] for r in rows), sum(r["within_2pt"] for r in rows)
    lines.append(f"{n_in} of {len(rows)} states inside, {n_2} of {len(rows)} within {TOLERANCE_POINTS:g} points")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("run_dir", type=Path)
    p.add_argument("reference", type=Path, help="JSON written by python -m hopwell.bench.mmff_mc")
    p.add_argument("--json", type=Path, help="also write the rows here")
    args = p.parse_args(argv)
    rows = compare(args.run_dir, json.loads(args.reference.read_text()))
    print(format_rows(rows))
    if args.json:
        args.json.write_text(json.dumps(rows, indent=1) + "\n")


if __name__ == "__main__":
    main()
