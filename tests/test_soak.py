"""The kill soak (:mod:`hopwell.bench.soak`): its bookkeeping checks, and a short soak.

The short soak kills a real n-butane run once in each phase (start-up, training, the switch to
production, production, a chunk write, a checkpoint write, a report) with SIGKILL, resumes after
each, and compares the result with an uninterrupted run of the same budget. The full soak
(``--kills 100``) is a benchmark; its figures are in DEVELOPERS.md.
"""

from __future__ import annotations

import math
from collections import Counter

import pytest

from hopwell.bench import soak
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN


def _keys(cycles: int, walkers: int) -> Counter:
    return Counter((c, w, m) for c in range(cycles) for w in range(walkers) for m in (MOVE_LANGEVIN, MOVE_FLOW))


def test_lost_and_doubled_records_are_counted():
    keys = _keys(5, 2)
    assert soak.lost_and_doubled(keys, 5, 2) == (0, 0)
    del keys[(3, 1, MOVE_FLOW)]
    keys[(0, 0, MOVE_LANGEVIN)] += 1
    keys[(9, 0, MOVE_LANGEVIN)] += 1  # a cycle past the checkpoint's: doubled work
    assert soak.lost_and_doubled(keys, 5, 2) == (1, 2)


def test_agreement_takes_the_worst_state_in_standard_errors():
    # 95% half-widths 0.0196 on both sides: one combined standard error is 0.01 * sqrt(2).
    a = {"x": (0.50, 0.4804, 0.5196), "y": (0.50, 0.4804, 0.5196)}
    b = {"x": (0.51, 0.4904, 0.5296), "y": (0.46, 0.4404, 0.4796), "z": (0.03, 0.0, 0.05)}
    diff, allowed = soak.agreement(a, b)
    assert diff == pytest.approx(0.04)  # y, 2.8 standard errors, beats x (0.7) and z (2.4)
    assert allowed == pytest.approx(soak.ALLOWANCE_SE * 0.01 * math.sqrt(2.0))


def test_short_soak_loses_and_doubles_nothing(tmp_path):
    row = soak.soak("CCCC", len(soak.PHASES),
                    ["--samples", "400", "--training-cycles", "20", "--seed", "3", "--langevin-steps", "50",
                     "--proposals", "8"], tmp_path, seed=3)
    assert row["kills"] >= len(soak.PHASES) - 1, row  # a phase may be over before its kill lands
    assert row["lost"] == 0 and row["doubled"] == 0, row
    assert row["samples"] == row["reference_samples"] == 400, row
    assert soak.soak_passed(row), row
