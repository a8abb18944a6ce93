"""hopwell batch: reading molecule lists, names, and a batch on a real Dask LocalCluster of two
worker processes with one bad molecule among good ones, killed with SIGKILL and resumed."""

from __future__ import annotations

import csv
import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.errors import InputError
from hopwell.sampling.batch import read_molecules

BINARY = Path(sys.executable).with_name("hopwell")
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "OPENMM_CPU_THREADS": "1"}
# Tiny budgets: 40 production samples over 2 walkers after 4 training cycles.
TINY = ["--samples", "40", "--training-cycles", "4", "--langevin-steps", "20", "--proposals", "4",
        "--walkers", "2", "--seeds", "3"]
MOLECULES = [("CCCC", "butane"), ("C1CC", "broken"), ("CCCO", "propanol"), ("CCOC", "methoxyethane")]


def _hopwell(cwd, *args, timeout=600):
    return subprocess.run([str(BINARY), *args], capture_output=True, text=True, env=ENV, cwd=cwd,
                          timeout=timeout, check=False)


def test_smiles_file_of_the_shipped_ligands(systems_dir):
    molecules = read_molecules(systems_dir / "ligands" / "ligands.smi")
    assert len(molecules) == 11
    assert (molecules[0].smiles, molecules[0].name) == ("CCCNC(=O)c1ccccc1OCC", "VLT-101")
    assert (molecules[-1].smiles, molecules[-1].name) == ("CCCC", "n-butane")


def test_csv_columns_found_by_name_in_any_case(tmp_path):
    path = tmp_path / "set.csv"
    path.write_text("notes,SMILES,Name\nfirst,CCO,ethanol\n,CCCC,butane\n")
    assert [(m.name, m.smiles) for m in read_molecules(path)] == [("ethanol", "CCO"), ("butane", "CCCC")]
    path.write_text("id,smiles\n1,CCO\n")
    with pytest.raises(InputError, match="'name'"):
        read_molecules(path)


def _sdf(path, records):
    writer = Chem.SDWriter(str(path))
    for smiles, name, n_conf in records:
        mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
        AllChem.EmbedMultipleConfs(mol, numConfs=n_conf, randomSeed=3)
        mol.SetProp("_Name", name)
        for conf in mol.GetConformers():
            writer.write(mol, confId=conf.GetId())
    writer.close()


def test_sdf_consecutive_records_with_one_title_are_one_molecule(tmp_path):
    path = tmp_path / "set.sdf"
    _sdf(path, [("CCCC", "butane", 2), ("CCO", "ethanol", 1)])
    butane, ethanol = read_molecules(path)
    assert (butane.name, ethanol.name) == ("butane", "ethanol")
    # RDKit reads the kept text back as the records written: two butane structures, one ethanol.
    supplier = Chem.SDMolSupplier()
    supplier.SetData(butane.sdf_text, removeHs=False)
    back = list(supplier)
    assert len(back) == 2 and all(m.GetNumAtoms() == 14 for m in back)
    _sdf(path, [("CCCC", "butane", 1), ("CCO", "ethanol", 1), ("CCCC", "butane", 1)])
    with pytest.raises(InputError, match="used twice"):
        read_molecules(path)


@pytest.mark.parametrize("name", ["a/b", "../up", ".hidden", "_batch", "overview.html", "Batch.JSON",
                                  "run.lock", "dot.", "x" * 65, "caf\u00e9"])
def test_unsafe_names_refused(tmp_path, name):
    path = tmp_path / "set.csv"
    with open(path, "w", newline="") as handle:
        csv.writer(handle).writerows([["name", "smiles"], ["fine", "CCO"], [name, "CCCC"]])
    with pytest.raises(InputError, match="cannot be a directory name"):
        read_molecules(path)


def test_names_differing_only_in_case_are_one_directory(tmp_path):
    path = tmp_path / "set.smi"
    path.write_text("CCO ligand-1\n# a comment\n\nCCCC Ligand-1\n")
    with pytest.raises(InputError, match="used twice.*line 1"):
        read_molecules(path)
    path.write_text("CCO\n")
    with pytest.raises(InputError, match="no name"):
        read_molecules(path)


def test_cli_refuses_bad_lists_with_one_line_and_creates_nothing(tmp_path):
    (tmp_path / "dup.smi").write_text("CCO a\nCCC a\n")
    (tmp_path / "unsafe.smi").write_text("CCO a/b\n")
    (tmp_path / "list.xyz").write_text("CCO a\n")
    for name in ("dup.smi", "unsafe.smi", "list.xyz", "missing.smi"):
        result = _hopwell(tmp_path, "batch", name, "-o", "out", "--samples", "10", timeout=120)
        assert result.returncode == 2, result.stderr
        assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.stderr
        assert not (tmp_path / "out").exists()


def _outcomes(batch_dir):
    folder = batch_dir / "_batch" / "outcomes"
    return {p.stem: p.read_bytes() for p in folder.glob("*.json")} if folder.is_dir() else {}


def test_batch_killed_then_resumed_with_one_bad_molecule(tmp_path):
    (tmp_path / "set.smi").write_text("".join(f"{s} {n}\n" for s, n in MOLECULES))
    batch_dir = tmp_path / "batch"
    # Start on two worker processes; SIGKILL the whole process group (scheduler, nannies,
    # workers) as soon as the first molecule is done.
    proc = subprocess.Popen([str(BINARY), "batch", "set.smi", "-o", "batch", *TINY, "--workers", "2"],
                            cwd=tmp_path, env=ENV, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            start_new_session=True)
    deadline = time.monotonic() + 400
    while not any(json.loads(b)["status"] == "done" for b in _outcomes(batch_dir).values()):
        assert proc.poll() is None, proc.stderr.read().decode()
        assert time.monotonic() < deadline, "no molecule finished"
        time.sleep(0.1)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    proc.stderr.close()
    before = _outcomes(batch_dir)
    left = {n for _, n in MOLECULES} - set(before)
    assert left, "every molecule finished before the kill; nothing to resume"

    result = _hopwell(tmp_path, "resume", "batch", "--workers", "2")
    assert result.returncode == 0, result.stderr
    lines = result.stderr.splitlines()
    progress = [line for line in lines if line.startswith("batch: ")]
    assert progress and all(re.fullmatch(r"batch: \d/4 done, \d running, \d failed, \d waiting; dashboard \S+",
                                         line) for line in progress), progress
    assert any(re.match(r"batch: \d/4 done, [12] running", line) for line in progress), progress
    assert "batch finished: 3 done, 1 failed" in lines[-1]

    after = _outcomes(batch_dir)
    assert set(after) == {n for _, n in MOLECULES}
    for name, data in before.items():  # finished before the kill: not run again
        assert after[name] == data
        if json.loads(data)["status"] == "done":
            assert "resumed" not in (batch_dir / name / "progress.log").read_text()

    rows = json.loads((batch_dir / "overview.json").read_text())["molecules"]
    assert [row["name"] for row in rows] == [n for _, n in MOLECULES]
    broken = rows[1]
    assert broken["status"] == "failed" and broken["kind"] == "input" and "C1CC" in broken["error"]
    assert "\n" not in broken["error"] and not (batch_dir / "broken" / "run.toml").exists()
    with open(batch_dir / "overview.csv", newline="") as handle:
        table = {row["name"]: row for row in csv.DictReader(handle)}
    page = (batch_dir / "overview.html").read_text()
    for row in rows[:1] + rows[2:]:
        # The overview agrees with each molecule's own report (summary.json of its run directory).
        summary = json.loads((batch_dir / row["name"] / "summary.json").read_text())
        assert row["status"] == "done" and row["verdict"] == summary["verdict"]
        assert row["samples"] == summary["samples"] == 40  # each molecule's budget, as given
        ranked = sorted(summary["states"], key=lambda s: -s["population"])[:3]
        assert [(s["name"], s["population"], s["ci95"]) for s in row["states"]] == \
            [(s["name"], s["population"], s["ci95"]) for s in ranked]
        assert float(table[row["name"]]["population_1"]) == pytest.approx(ranked[0]["population"], abs=1e-5)
        assert f'href="{row["name"]}/report.html"' in page
        assert (batch_dir / row["name"] / "report.html").is_file()
    assert table["broken"]["error"] == broken["error"] and "unclosed ring" in page

    # Nothing left: a second resume starts no cluster; a second start and a new budget are refused.
    again = _hopwell(tmp_path, "resume", "batch")
    assert again.returncode == 0 and "dashboard" not in again.stderr, again.stderr
    assert "batch finished: 3 done, 1 failed" in again.stderr
    for args in (["batch", "set.smi", "-o", "batch", "--samples", "10"], ["resume", "batch", "--hours", "1"]):
        refused = _hopwell(tmp_path, *args, timeout=120)
        assert refused.returncode == 2 and len(refused.stderr.strip().splitlines()) == 1, refused.stderr
