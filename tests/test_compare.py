"""hopwell compare: equal-budget runs of several methods, read with one state model."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from hopwell.cli import main
from hopwell.errors import InputError
from hopwell.sampling.compare import (
    read_reference,
    running_populations,
    time_to_tolerance,
)

BUTANE_STATES = """
[[state]]
name = "anti"
[[state.torsion]]
smarts = "[CH3][CH2][CH2][CH3]"
range = [120, -120]

[[state]]
name = "gauche"
[[state.torsion]]
smarts = "[CH3][CH2][CH2][CH3]"
range = [-120, 120]
"""


def test_time_to_tolerance_needs_the_error_to_stay_small():
    times = np.array([10.0, 20.0, 30.0, 40.0])
    assert time_to_tolerance(times, np.array([0.5, 0.001, 0.5, 0.002]), 0.01) == 40.0
    assert time_to_tolerance(times, np.array([0.5, 0.001, 0.002, 0.003]), 0.01) == 20.0
    assert time_to_tolerance(times, np.array([0.0, 0.0, 0.0, 0.0]), 0.01) == 10.0
    assert time_to_tolerance(times, np.array([0.0, 0.0, 0.0, 0.5]), 0.01) is None


def test_running_populations_count_samples_up_to_each_time():
    rng = np.random.default_rng(4)
    labels = rng.integers(0, 3, 500)
    time_s = rng.uniform(0, 100, 500)
    grid = np.array([-1.0, 5.0, 50.0, 100.0])
    out = running_populations(labels, time_s, 3, grid)
    assert np.all(np.isnan(out[0]))
    for k, t in enumerate(grid[1:], start=1):  # direct count with numpy
        upto = labels[time_s <= t]
        np.testing.assert_allclose(out[k], np.bincount(upto, minlength=3) / len(upto))


def test_reference_file_errors_are_clear(tmp_path):
    bad = tmp_path / "ref.toml"
    bad.write_text('[[reference]]\nstates = ["a"]\npopulation = 1.5\n')
    with pytest.raises(InputError, match="population in"):
        read_reference(bad)
    good = tmp_path / "good.toml"
    good.write_text('[[reference]]\nstates = ["a", "b"]\npopulation = 0.25\nci95 = [0.2, 0.3]\n')
    (ref,) = read_reference(good)
    assert ref.label == "a+b" and ref.ci95 == (0.2, 0.3)


def test_compare_cli_end_to_end(tmp_path):
    states = tmp_path / "butane_states.toml"
    states.write_text(BUTANE_STATES)
    reference = tmp_path / "ref.toml"
    # An arbitrary reference: what is checked is that the errors are measured against it.
    reference.write_text('[[reference]]\nstates = ["gauche"]\npopulation = 0.3\n')
    out = tmp_path / "cmp"
    result = CliRunner().invoke(main, [
        "compare", "CCCC", "-o", str(out), "--budget", "0.15", "--repeats", "1", "--methods", "flow,md",
        "--jobs", "1", "--seeds", "4", "--states", str(states), "--reference", str(reference)])
    assert result.exit_code == 0, result.output
    comparison = json.loads((out / "comparison.json").read_text())
    assert {r["method"] for r in comparison["runs"]} == {"flow", "md"}
    for run in comparison["runs"]:
        assert run["samples"] > 0
        running = np.array(run["running"]["gauche"], dtype=float)
        done = np.isfinite(running)
        assert done[-1] and np.all((running[done] >= 0) & (running[done] <= 1))
    rows = {r["method"]: r for r in comparison["methods"]}
    for method, row in rows.items():
        final = [r["running"]["gauche"][-1] for r in comparison["runs"] if r["method"] == method]
        assert row["final_error_mean"] == pytest.approx(abs(final[0] - 0.3))
    assert (out / "comparison.png").stat().st_size > 1000
    assert "reference gauche: 30.00%" in result.output

    # Without a reference: every state on its own, with the runs' interval widths.
    from hopwell.sampling.compare import compare_runs

    jobs = [{"dir": r["dir"], "method": r["method"], "repeat": r["repeat"]} for r in comparison["runs"]]
    plain = compare_runs(jobs, comparison["budget_s"], None, 0.01, states)
    assert [g["label"] for g in plain["groups"]] == ["anti", "gauche", "other"]
    for row in plain["methods"]:
        assert "time_to_tolerance_s" not in row
        if row["group"] != "other":
            assert row["ci95_width_mean"] is not None and 0 <= row["ci95_width_mean"] < 1


def test_run_jobs_on_dask_report_each_run_and_a_failed_one_in_one_line(tmp_path, capfd):
    """Two workers: every run is done and reported once; a run that fails names itself, no hang."""
    from hopwell.sampling.compare import plan_runs, run_jobs
    from hopwell.sampling.sampler import SamplerSettings
    from hopwell.sampling.store import RunStore
    from hopwell.systems.builder import BuildOptions

    jobs = plan_runs("CCCC", tmp_path / "ok", ["md"], 2, 0.5, BuildOptions(n_seeds=4), SamplerSettings(seed=4))
    done = []
    run_jobs(jobs, 2, progress=done.append)
    assert sorted(job["dir"] for job in done) == sorted(job["dir"] for job in jobs)
    for job in jobs:
        assert int(RunStore.open(job["dir"]).read_state()["production_samples"]) > 0

    # A run that cannot start, next to one that would sample for a minute: the failure ends the
    # whole call at once, the other run cancelled.
    long_run = dict(jobs[0], dir=str(tmp_path / "bad" / "runs" / "md-0"), seconds=60.0)
    broken = dict(jobs[1], dir=str(tmp_path / "bad" / "runs" / "md-1"), input="C1CC")
    with pytest.raises(InputError, match=r"bad/runs/md-1: ") as failure:
        run_jobs([long_run, broken], 2)
    assert "\n" not in str(failure.value)
    assert "Compute Failed" not in capfd.readouterr().err  # the workers' own log lines kept quiet


@pytest.mark.parametrize("args, message", [
    (["--methods", "flow,mc"], "unknown method"),
    (["--budget", "0"], "must be positive"),
])
def test_compare_bad_options_exit_2(tmp_path, args, message):
    base = ["compare", "CCCC", "-o", str(tmp_path / "x"), "--budget", "1"]
    result = CliRunner().invoke(main, base + args)
    assert result.exit_code == 2 and message in result.output
