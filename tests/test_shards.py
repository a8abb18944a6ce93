"""Sharded production on a real Dask LocalCluster of two worker processes, on the four-atom chain.

The chain's torsion populations are exact ratios of scipy.integrate.quad integrals (see
tests/chain_systems.py). Training runs in this process; production runs in two shards on two
worker processes, one of them interrupted first (a checkpoint part-way and an uncounted chunk,
as a ``kill -9`` between a chunk and its checkpoint leaves it). A Dask worker process killed
while its shard samples makes the scheduler sample that shard again, from its last checkpoint.
"""

from __future__ import annotations

import io
import json
import os
import re
import shutil
import signal
import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict

import numpy as np
import openmm
import pytest
import torch
from chain_systems import (
    TEMPERATURE_K,
    assign_wells,
    chain_mol,
    chain_positions_nm,
    chain_system,
    dihedrals_rad,
    exact_populations,
    production_positions,
)
from rdkit import Chem

from hopwell.analysis.production import move_acceptance
from hopwell.analysis.stats import population_estimate, split_rhat
from hopwell.sampling.run import resume_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.sampling.shards import (
    create_shards,
    dask_client,
    iter_pooled_chunks,
    run_shards,
    sample_shard,
    shard_finished,
    shard_status,
    shard_stores,
    split_walkers,
    train_then_shard,
    write_plan,
)
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore

torch.set_num_threads(1)
MAX_WIDTH = 0.02  # as in tests/test_sampler_exact.py
N_WALKERS, SAMPLES = 4, 16000
SETTINGS = SamplerSettings(
    temperature_K=TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=16, single_moves_per_cycle=0,
    training_cycles=40, fit_every=4, fit_steps=40, flow_layers=2, flow_hidden=16,
    cycles_per_chunk=50, seed=5,
)


def _chain_run(path):
    """A run directory for the chain, as ``start_run`` writes one (no checkpoint yet)."""
    mol = chain_mol()
    out = io.StringIO()
    writer = Chem.SDWriter(out)
    conf = Chem.Conformer(4)
    for i, row in enumerate(chain_positions_nm(-60.0) * 10.0):  # every walker starts in one well
        conf.SetAtomPosition(i, row.tolist())
    mol.AddConformer(conf)
    writer.write(mol)
    writer.close()
    config = {"format": 2, "input": "chain", "sampler": asdict(SETTINGS), "walkers": N_WALKERS,
              "platform": "Reference", "kind": "molecule", "budget": {"samples": SAMPLES}}
    RunStore.create(path, config, {"molecule.sdf": out.getvalue().encode(),
                                   "system.xml": openmm.XmlSerializer.serialize(chain_system()).encode()})
    write_plan(path, 2)
    return path


def _records(store):
    chunks = list(store.iter_chunks())
    keys = [(int(c), int(w), int(m)) for ch in chunks
            for c, w, m in zip(ch["state_cycle"], ch["state_walker"], ch["state_move"])]
    production = np.concatenate([ch["state_production"] for ch in chunks]).astype(bool)
    return keys, production


def test_split_walkers():
    assert split_walkers(5, 2) == [(0, 3), (3, 2)]
    assert split_walkers(4, 4) == [(0, 1), (1, 1), (2, 1), (3, 1)]


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """The chain trained in this process; shards created, none sampled yet."""
    run_dir = _chain_run(tmp_path_factory.mktemp("sharded") / "run")
    resume_run(run_dir, Budget(training_only=True))
    create_shards(run_dir)
    return run_dir


def test_training_stops_at_its_end_and_shards_split_the_walkers(trained):
    state = RunStore.open(trained).read_state()
    assert int(state["training_end_cycle"]) == int(state["cycle"]) == SETTINGS.training_cycles
    assert int(state["production_samples"]) == 0
    _, production = _records(RunStore.open(trained))
    assert not production.any()
    stores = shard_stores(trained)
    assert [first for _, first in stores] == [0, 2]
    for store, first in stores:
        shard = store.read_state()
        np.testing.assert_array_equal(shard["positions_nm"], state["positions_nm"][first:first + 2])
        assert store.config()["budget"]["samples"] == SAMPLES // 2
    seeds = [s.config()["sampler"]["seed"] for s, _ in stores]
    assert len(set(seeds)) == 2 and SETTINGS.seed not in seeds
    assert create_shards(trained) == [s.path for s, _ in stores]  # idempotent: nothing rewritten


def test_interrupted_shard_resumes_and_pooled_populations_match_quadrature(trained, tmp_path):
    run_dir = tmp_path / "run"
    shutil.copytree(trained, run_dir)
    shard0 = shard_stores(run_dir)[0][0]
    # Shard 0 is interrupted: it got part-way (a checkpoint), then wrote a chunk that no
    # checkpoint counts (killed between chunk and checkpoint).
    resume_run(shard0.path, Budget(samples=2000))
    counted = int(shard0.read_state()["next_chunk"])
    shutil.copy(shard0.chunk_path(counted - 1), shard0.chunk_path(counted))
    assert not shard_finished(shard0.path)
    before = [row["production_samples"] for row in shard_status(run_dir)]
    assert before == [2000, 0]

    results = train_then_shard(run_dir, workers=2)
    assert len(results) == 2
    assert "removed 1 chunk(s)" in (shard0.path / "progress.log").read_text()
    assert run_shards(run_dir, workers=2) == []  # finished shards are not sampled again

    training_end = SETTINGS.training_cycles
    series, pooled_positions = [], []
    for store, first in shard_stores(run_dir):
        state = store.read_state()
        keys, production = _records(store)
        assert production.all()
        counts = Counter(keys)
        assert max(counts.values()) == 1, "a record counted twice"
        last = int(state["cycle"])
        assert set(keys) == {(c, w, m) for c in range(training_end, last) for w in range(2)
                             for m in (MOVE_LANGEVIN, MOVE_FLOW)}, "records lost"
        assert int(state["production_samples"]) == len(keys) == SAMPLES // 2
        per_walker = production_positions(store, 2)
        pooled_positions.append(per_walker)
        series += [assign_wells(dihedrals_rad(x)) for x in per_walker]
    # Independent streams: the shards' first production states differ.
    assert not np.allclose(pooled_positions[0][0][:10], pooled_positions[1][0][:10])
    assert all(row["finished"] for row in shard_status(run_dir))

    # Exact reference: scipy.integrate.quad of exp(-V/kT) over each well (chain_systems.py).
    exact = exact_populations()
    result = population_estimate(series, 3, np.random.default_rng(5))
    # Within the 2-point width the issue asks of intervals. (The stricter "interval holds the
    # exact value" of test_sampler_exact.py misses by up to ~0.8 points on the -60 well for
    # fresh random streams from this trained flow, sharded or not: a sampler question, open.)
    assert np.all(np.abs(result.populations - exact) < MAX_WIDTH), (result.populations, exact)
    assert np.all(result.upper - result.lower < 2 * MAX_WIDTH), result.upper - result.lower
    # The shards agree with each other: split R-hat (Vehtari et al. 2021) of the well indicators
    # over all four walkers near 1.
    n = min(len(s) for s in series)
    for well in range(3):
        assert split_rhat(np.stack([(s[:n] == well).astype(float) for s in series])) < 1.05


def test_a_shards_recovery_is_told_to_the_caller(trained, tmp_path):
    run_dir = tmp_path / "run"
    shutil.copytree(trained, run_dir)
    shard0 = shard_stores(run_dir)[0][0]
    resume_run(shard0.path, Budget(samples=200))  # two checkpoints in the shard
    (shard0.path / "state.npz").write_bytes(b"")  # the newest one emptied
    result = sample_shard(str(shard0.path), samples=400)
    (line,) = result["notices"]
    assert "state.npz is damaged" in line and "previous checkpoint" in line
    assert result["production_samples"] >= 400


def _kill_worker_of(client, key_prefix: str, store: RunStore, timeout_s: float = 120.0) -> None:
    """SIGKILL the worker process sampling the task ``key_prefix...`` once ``store``'s checkpoint counts a chunk."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if int(store.read_state()["next_chunk"]) >= 1:
            busy = [worker for worker, keys in client.processing().items()
                    if any(str(key).startswith(key_prefix) for key in keys)]
            if busy:
                pid = client.run(os.getpid, workers=busy[:1])[busy[0]]
                os.kill(pid, signal.SIGKILL)
                return
        time.sleep(0.05)
    raise AssertionError(f"{store.path} checkpointed no chunk within {timeout_s} s")


def _counters(run_dir) -> dict:
    """The ``stats`` JSON of a run directory's checkpoint, read with numpy alone."""
    with np.load(run_dir / "state.npz") as state:
        return json.loads(str(state["stats"]))


def test_worker_killed_mid_shard_resumes_from_its_checkpoint(trained, tmp_path):
    run_dir = tmp_path / "run"
    shutil.copytree(trained, run_dir)
    shard0 = shard_stores(run_dir)[0][0]
    per_shard = 1000  # 250 cycles of 2 walkers, 2 records each: 5 chunks of 50 cycles
    with dask_client(2) as client, ThreadPoolExecutor(1) as thread:
        running = thread.submit(run_shards, run_dir, scheduler=client.scheduler.address,
                                budget=Budget(samples=2 * per_shard))
        _kill_worker_of(client, "shard-0-", shard0)
        results = running.result(timeout=300)
    assert [r["production_samples"] for r in results] == [per_shard, per_shard]
    resumes = [int(c) for c in re.findall(r"resumed at cycle (\d+)", (shard0.path / "progress.log").read_text())]
    # Sampled twice: from the end of training, then again from a checkpoint part-way (not from the start).
    assert len(resumes) == 2 and resumes[0] == SETTINGS.training_cycles < resumes[1], resumes

    training_end = SETTINGS.training_cycles
    for store, _ in shard_stores(run_dir):
        state = store.read_state()
        assert store.chunk_indices() == list(range(int(state["next_chunk"]))), "chunk indices not contiguous"
        keys, production = _records(store)
        assert production.all() and max(Counter(keys).values()) == 1, "a record counted twice"
        assert set(keys) == {(c, w, m) for c in range(training_end, int(state["cycle"])) for w in range(2)
                             for m in (MOVE_LANGEVIN, MOVE_FLOW)}, "records lost"
        assert int(state["production_samples"]) == len(keys) == per_shard
    pooled = sum(int(c["state_production"].sum()) for c in iter_pooled_chunks(RunStore.open(run_dir)))
    assert pooled == 2 * per_shard  # the sum of the shards' budgets

    # Move acceptance pooled over the shards. The flow's production counters against the proposal
    # records of the chunks (an independent tally, kept apart from the checkpoints' counters) ...
    acceptance = move_acceptance(RunStore.open(run_dir))
    records = [(sum(int(c["proposal_accepted"].sum()) for c in store.iter_chunks()),
                sum(len(c["proposal_accepted"]) for c in store.iter_chunks())) for store, _ in shard_stores(run_dir)]
    assert acceptance["flow_production"] == pytest.approx(sum(a for a, _ in records) / sum(n for _, n in records))
    assert [row["flow_production"] for row in acceptance["per_shard"]] == pytest.approx([a / n for a, n in records])
    # ... and every move against the state.npz counters: the training run's, plus what each shard added.
    parent = _counters(run_dir)
    shards = [_counters(store.path) for store, _ in shard_stores(run_dir)]
    for key, label in (("training", "flow_training"), ("production", "flow_production"), ("dart", "dart")):
        accepted, proposed = (parent[key][field] + sum(s[key][field] - parent[key][field] for s in shards)
                              for field in ("accepted", "proposed"))
        assert proposed > 0 and acceptance[label] == pytest.approx(accepted / proposed), label
    assert acceptance["flow_training"] == pytest.approx(parent["training"]["accepted"] / parent["training"]["proposed"])


def test_cli_sharded_run_status_and_report(tmp_path):
    """The command line end to end on butane: train, two shards on two workers, status, report."""
    import subprocess
    import sys
    from pathlib import Path

    binary = Path(sys.executable).with_name("hopwell")
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENMM_CPU_THREADS": "1"}

    def hopwell(*args):
        return subprocess.run([str(binary), *args], capture_output=True, text=True, env=env, cwd=tmp_path,
                              timeout=300, check=False)

    run_dir = tmp_path / "run"
    result = hopwell("run", "CCCC", "-o", str(run_dir), "--samples", "120", "--training-cycles", "6",
                     "--langevin-steps", "20", "--proposals", "4", "--walkers", "3", "--workers", "2")
    assert result.returncode == 0, result.stderr
    status = json.loads(hopwell("status", str(run_dir), "--json").stdout)
    assert [row["walkers"] for row in status["shards"]] == [2, 1]
    assert all(row["finished"] for row in status["shards"])
    assert [row["production_samples"] for row in status["shards"]] == [80, 40]
    text = hopwell("status", str(run_dir)).stdout
    assert "shard 0" in text and "finished" in text
    report = hopwell("report", str(run_dir), "--json")
    assert report.returncode == 0, report.stderr
    summary = json.loads(report.stdout)
    assert summary["walkers"] == 3 and summary["samples"] == 120
    assert len(summary["per_shard_populations"]) == 2
    # Move acceptance pooled over the shards, against the checkpoints' counters read with numpy:
    # the training run's, plus what each shard added to the counters it started from.
    parent = _counters(run_dir)
    shards = [_counters(run_dir / "shards" / str(k)) for k in range(2)]
    for key, label in (("training", "flow_training"), ("production", "flow_production"),
                       ("single", "one_torsion"), ("dart", "dart")):
        accepted, proposed = (parent[key][field] + sum(s[key][field] - parent[key][field] for s in shards)
                              for field in ("accepted", "proposed"))
        expected = accepted / proposed if proposed else None
        assert summary["move_acceptance"][label] == pytest.approx(expected), label
    assert summary["move_acceptance"]["one_torsion"] is not None  # single moves ran in the shards
    own = [(s["production"]["accepted"], s["production"]["proposed"]) for s in shards]
    assert [row["flow_production"] for row in summary["move_acceptance"]["per_shard"]] == pytest.approx(
        [a / n for a, n in own])
    bad = hopwell("run", "CCCC", "-o", str(tmp_path / "bad"), "--samples", "10", "--walkers", "2",
                  "--shards", "3", "--workers", "1")
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1, bad.stderr
    assert not (tmp_path / "bad" / "run.toml").exists()
