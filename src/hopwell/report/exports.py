"""The files a report writes beside the page: summary.json, populations.csv, the production
ensemble (DCD with a CSV index) and one representative structure per state."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import mdtraj as md
import numpy as np
from rdkit import Chem

from hopwell.analysis.summary import public
from hopwell.atomic import atomic_write_bytes
from hopwell.report.page import html_page
from hopwell.report.viewer import read_structures
from hopwell.sampling.shards import iter_pooled_chunks
from hopwell.sampling.store import RunStore


def write_report(run_dir: Path, summary: dict) -> Path:
    """Write ``summary.json``, ``populations.csv``, the ensemble and state files, and ``report.html``
    (which shows the state files in 3D) into the run directory."""
    run_dir = Path(run_dir)
    structures = read_structures(write_ensemble(run_dir, summary))  # the state files just written
    atomic_write_bytes(run_dir / "report.html", html_page(summary, structures).encode())
    summary = public(summary)
    atomic_write_bytes(run_dir / "summary.json", json.dumps(summary, indent=2).encode())
    out = io.StringIO()
    writer = csv.writer(out)
    writer.writerow(["state", "population", "ci95_low", "ci95_high", "dG_kJ_per_mol",
                     "dG_ci95_low", "dG_ci95_high", "all_states_ci95_low", "all_states_ci95_high"])
    for s in summary["states"]:
        writer.writerow([s["name"], f"{s['population']:.5f}", f"{s['ci95'][0]:.5f}",
                         f"{s['ci95'][1]:.5f}", f"{s['dG_kJ_per_mol']:.3f}",
                         f"{s['dG_ci95'][0]:.3f}", f"{s['dG_ci95'][1]:.3f}",
                         f"{s['ci95_all_states'][0]:.5f}", f"{s['ci95_all_states'][1]:.5f}"])
    atomic_write_bytes(run_dir / "populations.csv", out.getvalue().encode())
    return run_dir / "report.html"


def write_ensemble(run_dir: Path, summary: dict) -> list[Path]:
    """Write the production ensemble and one representative structure per state.

    ``ensemble.dcd`` holds every production sample in the order of ``ensemble.csv`` (walker,
    cycle, move, state, energy); ``state-<k>.sdf`` (small molecules) or ``state-<k>.pdb``
    (peptides) is the lowest-energy sample of state k. Reads the store chunk by chunk.
    """
    store = RunStore.open(Path(run_dir))
    labels = np.asarray(summary["_labels"])
    names = [s["name"] for s in summary["states"]]
    topology = md.load_topology(str(store.path / "topology.pdb"))
    best = {}
    rows = io.StringIO()
    table = csv.writer(rows)
    table.writerow(["frame", "walker", "cycle", "move", "state", "energy_kj_per_mol"])
    tmp = store.path / ".ensemble.dcd.tmp"
    frame = 0
    with md.formats.DCDTrajectoryFile(str(tmp), "w", force_overwrite=True) as dcd:
        for chunk in iter_pooled_chunks(store):  # a sharded run's shards too, in the report's order
            keep = chunk["state_production"].astype(bool)
            if not keep.any():
                continue
            xyz = chunk["state_positions_nm"][keep]
            energy = chunk["state_energy_kj"][keep]
            dcd.write(xyz * 10.0)  # DCD stores Angstrom
            for k in range(len(xyz)):
                state = int(labels[frame])
                table.writerow([frame, int(chunk["state_walker"][keep][k]), int(chunk["state_cycle"][keep][k]),
                                int(chunk["state_move"][keep][k]), names[state], f"{energy[k]:.4f}"])
                if state not in best or energy[k] < best[state][0]:
                    best[state] = (float(energy[k]), xyz[k].astype(float))
                frame += 1
    tmp.replace(store.path / "ensemble.dcd")
    atomic_write_bytes(store.path / "ensemble.csv", rows.getvalue().encode())
    written = [store.path / "ensemble.dcd", store.path / "ensemble.csv"]
    mol = next(iter(Chem.SDMolSupplier(str(store.path / "molecule.sdf"), removeHs=False)))
    for state, (energy, xyz) in sorted(best.items()):
        if store.config().get("kind") == "peptide":
            path = store.path / f"state-{state}.pdb"
            md.Trajectory(xyz[None], topology).save_pdb(str(path.with_suffix(".tmp.pdb")))
            path.with_suffix(".tmp.pdb").replace(path)
        else:
            path = store.path / f"state-{state}.sdf"
            m = Chem.Mol(mol)
            conf = m.GetConformer()
            for i, row in enumerate(xyz * 10.0):
                conf.SetAtomPosition(i, row.tolist())
            m.SetProp("_Name", f"{names[state]} (E = {energy:.2f} kJ/mol)")
            atomic_write_bytes(path, (Chem.MolToMolBlock(m) + "$$$$\n").encode())
        written.append(path)
    if len(summary.get("_found_positions_nm", [])):
        written.append(write_found_basins(store.path / "found-basins.sdf", mol, summary))
    return written


def write_found_basins(path: Path, mol: Chem.Mol, summary: dict) -> Path:
    """The basin probes' minima as one SDF record each, named by when they were found: seeds
    for the next run (``hopwell run found-basins.sdf`` or with the original input)."""
    records = []
    for found, xyz in zip(summary["found_basins"], summary["_found_positions_nm"]):
        m = Chem.Mol(mol)
        conf = m.GetConformer()
        for i, row in enumerate(np.asarray(xyz) * 10.0):
            conf.SetAtomPosition(i, row.tolist())
        phase = "production" if found["production"] else "training"
        m.SetProp("_Name", f"found in {phase} at cycle {found['cycle']}"
                           f" ({found['above_lowest_kj']:.1f} kJ/mol above the lowest known minimum)")
        records.append(Chem.MolToMolBlock(m) + "$$$$\n")
    atomic_write_bytes(path, "".join(records).encode())
    return path
