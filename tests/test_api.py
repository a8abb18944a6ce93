"""The public Python API: one short run of n-butane through it, checked against the CLI's files."""

import json

import numpy as np
import pytest
import torch
from click.testing import CliRunner

import hopwell
from hopwell.cli import main
from hopwell.errors import InputError
from hopwell.sampling.store import RunStore

SAMPLES = 80  # two walkers record 4 production states per cycle: 20 production cycles
SETTINGS = {"training_cycles": 10, "langevin_steps": 50, "proposals_per_cycle": 8, "seed": 11}


@pytest.fixture(scope="module")
def api_run(tmp_path_factory):
    """One run through ``hopwell.sample`` on a built system, with the threads seen while sampling."""
    import hopwell.sampling.run as run_module

    molsys = hopwell.build("CCCC", n_seeds=4)
    threads_seen = set()
    before = torch.get_num_threads()
    torch.set_num_threads(2)  # the caller's own setting, restored afterwards
    original_build = run_module.build

    def no_second_build(*args, **kwargs):
        raise AssertionError("start_run built the system again")

    run_module.build = no_second_build
    try:
        run = hopwell.sample(molsys, tmp_path_factory.mktemp("api") / "run", samples=SAMPLES,
                             progress=lambda sampler: threads_seen.add(torch.get_num_threads()),
                             **SETTINGS)
        after = torch.get_num_threads()
    finally:
        run_module.build = original_build
        torch.set_num_threads(before)
    return run, threads_seen, after


def test_sampling_runs_torch_on_one_thread_and_restores_the_callers(api_run):
    _, threads_seen, after = api_run
    assert threads_seen == {1}
    assert after == 2


def test_populations_match_the_summary_json_of_hopwell_report(api_run):
    run, _, _ = api_run
    result = CliRunner().invoke(main, ["report", str(run.path)])
    assert result.exit_code == 0, result.output
    written = json.loads((run.path / "summary.json").read_text())["states"]
    rows = run.populations()
    assert [r["state"] for r in rows] == [s["name"] for s in written] and len(rows) >= 2
    for row, state in zip(rows, written):
        assert row["population"] == pytest.approx(state["population"], abs=1e-12)
        assert [row["ci95_low"], row["ci95_high"]] == pytest.approx(state["ci95"], abs=1e-12)
        assert row["dG_kJ_per_mol"] == pytest.approx(state["dG_kJ_per_mol"], abs=1e-9)
        assert [row["dG_ci95_low"], row["dG_ci95_high"]] == pytest.approx(state["dG_ci95"], abs=1e-9)
        assert [row["all_states_ci95_low"], row["all_states_ci95_high"]] == pytest.approx(
            state["ci95_all_states"], abs=1e-12)
        assert row["all_states_ci95_low"] <= row["ci95_low"] and row["ci95_high"] <= row["all_states_ci95_high"]
    assert sum(r["population"] for r in rows) == pytest.approx(1.0, abs=1e-9)


def test_status_counts_match_the_store_and_hopwell_status(api_run):
    run, _, _ = api_run
    status = run.status()
    chunks = list(RunStore.open(run.path).iter_chunks())
    production = np.concatenate([c["state_production"] for c in chunks]).astype(bool)
    cycles = np.concatenate([c["state_cycle"] for c in chunks])
    assert status["chunks"] == len(chunks)
    assert status["production_samples"] == int(production.sum()) >= SAMPLES
    assert status["cycle"] == int(cycles.max()) + 1
    assert status["phase"] == "production" and status["sampling_pid"] is None
    cli = CliRunner().invoke(main, ["status", str(run.path), "--json"])
    assert cli.exit_code == 0, cli.output
    assert json.loads(cli.output) == status


def test_open_run_resumes_to_a_larger_budget(api_run, tmp_path):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(api_run[0].path, copy)
    run = hopwell.open_run(copy)
    before = run.status()["production_samples"]
    run.resume(samples=before + 8)
    assert run.status()["production_samples"] == before + 8  # two walkers, 4 states per cycle
    assert run.report() == copy / "report.html" and (copy / "populations.csv").is_file()


@pytest.mark.parametrize("call", [
    lambda d: hopwell.sample("CCCC", d, samples=10, langevin_step=5),
    lambda d: hopwell.build("CCCC", solvnet="obc2"),
    lambda d: hopwell.sample(hopwell.build("CCCC", n_seeds=2), d, samples=10, solvent="obc2"),
])
def test_unknown_setting_names_raise_one_line_input_errors(call, tmp_path):
    with pytest.raises(InputError) as info:
        call(tmp_path / "run")
    assert "\n" not in str(info.value) and "unknown" in str(info.value)
    assert not (tmp_path / "run").exists()


def test_open_run_refuses_a_directory_without_a_run(tmp_path):
    with pytest.raises(InputError, match="not a hopwell run directory"):
        hopwell.open_run(tmp_path)
