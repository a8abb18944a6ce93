"""n-Butane's anti population from hopwell against an independent Monte Carlo reference, to 2 points.

The reference (systems/ligands/reference/n-butane_300K.json) is Metropolis Monte Carlo on
RDKit's own MMFF94 energy (``MMFFGetMoleculeForceField(...).CalcEnergy``, vacuum, dielectric 1,
300 K) with pivot, rotor and Cartesian moves, made by ``python -m hopwell.bench.mmff_mc n-butane
--steps 1500000 --chains 8 --temperature-K 300 --out ...``: anti (|C1-C2-C3-C4| > 120 degrees)
0.6719, standard error over the 8 chains 0.0013. That script shares no energy or move code
with the sampler (tests/test_mmff_mc.py checks it against quadrature on its own). The check
is two-sided in a useful way: the run's own 95% interval must be narrow enough (under
wide, 3.5 points) that a 2-point tolerance means something.
"""

from __future__ import annotations

import json
from pathlib import Path

import hopwell
from hopwell.bench.against_mc import compare

REFERENCE = Path(__file__).resolve().parents[1] / "systems" / "ligands" / "reference" / "n-butane_300K.json"


def test_butane_anti_population_matches_the_mmff_monte_carlo_reference(tmp_path):
    reference = json.loads(REFERENCE.read_text())
    assert reference["settings"]["temperature_K"] == 300.0 and reference["settings"]["force_field"] == "MMFF94"
    assert [t["atoms_1based"] for t in reference["torsions"]] == [[1, 2, 3, 4]]

    run = hopwell.sample("CCCC", tmp_path / "butane", samples=12000, temperature_K=300.0, training_cycles=60)
    # hopwell.bench.against_mc reads the run's walker states with the reference's own dihedral and
    # well definitions (anti: |C1-C2-C3-C4| > 120 degrees), pooled with block-bootstrap intervals.
    (anti,) = [row for row in compare(run.path, reference) if row["state"] == "anti"]
    low, high = anti["ci95"]
    assert high - low < 0.035, (low, high)
    assert abs(anti["hopwell"] - anti["reference"]) < 0.02, anti
