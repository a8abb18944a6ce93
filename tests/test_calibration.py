"""The calibration benchmark's aggregation (hopwell.bench.calibration) on constructed records.

Every expected count below is worked out by hand from the records; no sampling runs here.
"""

from __future__ import annotations

import json
import math

import pytest

from hopwell.bench import calibration as cal
from hopwell.bench import chain


def state(name, low, high, truth, population=None, joint=None):
    mid = 0.5 * (low + high) if population is None else population
    return {"name": name, "population": mid, "ci95": [low, high], "ci95_all": joint or [low, high], "truth": truth}


def record(system, verdict, *states, seed=1, seconds=10.0):
    return {"system": system, "seed": seed, "seconds": seconds, "verdict": verdict, "reasons": [],
            "states": list(states)}


# Four chain runs and one error:
#   r1 converged, both truths inside             -> no miss
#   r2 converged, state b's truth above its top  -> miss (a false "converged")
#   r3 not converged, state a's truth below      -> miss, flagged
#   r4 not converged, both inside, and a state without truth (ignored)
RECORDS = [
    record("chain", "converged", state("a", 0.1, 0.3, 0.2), state("b", 0.7, 0.9, 0.8)),
    record("chain", "converged", state("a", 0.1, 0.3, 0.2), state("b", 0.6, 0.75, 0.8)),
    record("chain", "not converged", state("a", 0.25, 0.4, 0.2), state("b", 0.6, 0.9, 0.8)),
    record("chain", "not converged", state("a", 0.1, 0.3, 0.2), state("b", 0.7, 0.9, 0.8),
           state("other", 0.0, 0.01, None)),
    {"system": "chain", "seed": 5, "seconds": 10.0, "error": "RuntimeError: boom"},
]


def test_state_covered_includes_the_ends():
    assert cal.state_covered(state("a", 0.1, 0.3, 0.1))
    assert cal.state_covered(state("a", 0.1, 0.3, 0.3))
    assert not cal.state_covered(state("a", 0.1, 0.3, 0.30001))
    assert not cal.state_covered(state("a", 0.1, 0.3, 0.09999))


def test_run_missed_ignores_states_without_truth():
    assert not cal.run_missed(RECORDS[3])
    assert cal.run_missed(RECORDS[1])
    assert not cal.run_missed(record("chain", "converged", state("other", 0.5, 0.6, None)))


def test_false_converged_counts_converged_runs_with_a_miss():
    # Converged: r1 and r2; of these r2 misses. The error record has no verdict.
    assert cal.false_converged(RECORDS) == (1, 2)
    assert cal.share(*cal.false_converged(RECORDS)) == 0.5


def test_false_converged_by_the_intervals_of_all_states_at_once():
    # r2's b misses its own interval (0.6-0.75) but not the joint one (0.55-0.85): no miss there.
    # A converged record without joint intervals (an older file) is left out of that count.
    wider = record("chain", "converged", state("a", 0.1, 0.3, 0.2, joint=[0.05, 0.35]),
                   state("b", 0.6, 0.75, 0.8, joint=[0.55, 0.85]))
    older = record("chain", "converged", state("a", 0.1, 0.3, 0.2))
    del older["states"][0]["ci95_all"]
    chosen = [RECORDS[0], wider, older]
    assert cal.false_converged(chosen) == (1, 3)
    assert cal.false_converged(chosen, "ci95_all") == (0, 2)
    assert cal.system_rows(chosen)["chain"]["false_conv_all"] == 0.0


def test_flagged_misses():
    # Runs with a miss: r2 (converged) and r3 (not converged): one of two flagged.
    assert cal.flagged_misses(RECORDS) == (1, 2)


def test_coverage_per_state():
    # a: inside in r1, r2, r4, outside in r3 -> 3 of 4; b: outside in r2 only -> 3 of 4;
    # "other" has no truth and is not counted.
    assert cal.coverage(RECORDS) == {("chain", "a"): (3, 4), ("chain", "b"): (3, 4)}


def test_system_rows_and_the_all_row():
    other = record("nma-trans", "converged", state("cis", 0.0, 0.009, 0.011), seed=2)
    rows = cal.system_rows(RECORDS + [other])
    assert rows["chain"] == {"runs": 4, "errors": 1, "converged": 2, "conv_missing": 1, "false_conv": 0.5,
                             "false_conv_all": 0.5, "runs_missing": 2, "flagged": 1, "flag_share": 0.5}
    assert rows["nma-trans"]["false_conv"] == 1.0
    assert rows["nma-trans"]["flag_share"] == 0.0
    # All: converged r1, r2, other (2 miss of 3); misses r2, r3, other (1 flagged of 3).
    assert rows["all"]["conv_missing"] == 2 and rows["all"]["converged"] == 3
    assert rows["all"]["flagged"] == 1 and rows["all"]["runs_missing"] == 3
    assert list(rows) == ["chain", "nma-trans", "all"]


def test_coverage_rows_width_and_error():
    rows = cal.coverage_rows(RECORDS)
    # Widths of a: 0.2, 0.2, 0.15, 0.2 -> mean 0.1875; |estimate - truth|: 0, 0, 0.125, 0.
    assert rows["chain/a"]["mean_width"] == pytest.approx(0.1875)
    assert rows["chain/a"]["mean_abs_err"] == pytest.approx(0.125 / 4)
    assert rows["chain/a"]["coverage"] == 0.75


def test_share_of_nothing_is_nan():
    assert math.isnan(cal.share(0, 0))
    assert cal.share(1, 4) == 0.25


def test_plan_is_round_robin_with_cycled_budgets():
    cases = cal.plan(["chain", "nma-trans"], 3, [15.0, 30.0], first_seed=7)
    assert [(c["system"], c["seed"], c["seconds"]) for c in cases] == [
        ("chain", 7, 15.0), ("nma-trans", 7, 15.0), ("chain", 8, 30.0), ("nma-trans", 8, 30.0),
        ("chain", 9, 15.0), ("nma-trans", 9, 15.0)]


def test_append_record_keeps_earlier_lines(tmp_path):
    path = tmp_path / "runs.jsonl"
    cal.append_record(path, RECORDS[0])
    cal.append_record(path, RECORDS[4])
    assert cal.read_records(path) == [RECORDS[0], RECORDS[4]]
    assert [json.loads(line) for line in path.read_text().splitlines()] == [RECORDS[0], RECORDS[4]]


def test_chain_truth_sums_to_one_and_orders_the_wells():
    # scipy.integrate.quad of exp(-V/kT) (hopwell.bench.chain.exact_populations):
    # the 180 well is deepest (B cos phi > 0 lowers it), -60 shallower than 60 (C sin phi).
    p = chain.exact_populations()
    assert p.sum() == pytest.approx(1.0, abs=1e-12)
    assert p[0] < p[1] < p[2]


@pytest.mark.parametrize("argv, message", [
    (["--table-only", "/nonexistent/runs.jsonl"], "no such file"),
    (["--systems", "chain,butane", "--out", "x.jsonl"], "systems among"),
])
def test_bad_input_is_one_line_and_exit_2(argv, message, capsys):
    with pytest.raises(SystemExit) as exc:
        cal.main(argv)
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1


def test_table_only_prints_both_tables(tmp_path, capsys):
    path = tmp_path / "runs.jsonl"
    for r in RECORDS:
        cal.append_record(path, r)
    cal.main(["--table-only", str(path)])
    out = capsys.readouterr().out
    assert "false_conv" in out and "chain/a" in out and "coverage" in out
