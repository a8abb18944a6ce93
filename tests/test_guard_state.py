"""The clash/stereo guard on chain states, not only on proposals, and the Langevin rollback count.

* Seeds that fail the guard are refused with one line (exit code 2 from the CLI, no run
  directory left behind): a clash, and a stereocentre inverted against the first seed's, the
  inversion confirmed by RDKit's own CIP labels from 3D.
* In production the Langevin move counts the states it leads to that fail the guard: 0 for the
  four-atom chain with the sampler's guard; on a constructed strict guard, exactly the states
  whose 1-4 distance (mdtraj) is below the threshold.
* A segment that explodes is rolled back and counted; both counts reach the summary's numbers
  (summed over shards), default to 0 for checkpoints written before them, and become warnings.
"""

from __future__ import annotations

import json

import mdtraj
import numpy as np
import pytest
import torch
from chain_systems import (
    BOND_NM,
    TEMPERATURE_K,
    chain_mol,
    chain_positions_nm,
    chain_system,
    new_store,
)
from click.testing import CliRunner
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.analysis.stats import population_estimate
from hopwell.analysis.summary import local_move_counts
from hopwell.analysis.verdict import judge
from hopwell.cli import main
from hopwell.coords.guards import (
    ClashGuard,
    ProposalGuard,
    StereoGuard,
    refuse_failing_seeds,
)
from hopwell.errors import InputError
from hopwell.moves.base import RandomStreams, Walkers
from hopwell.moves.langevin import LangevinCounters, LangevinSegment
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.sampling.store import MOVE_LANGEVIN
from hopwell.systems.energy import EnergyEvaluator

torch.set_num_threads(1)


def chain_with_angles_nm(phi_deg: float, angle_deg: float) -> np.ndarray:
    """The chain with both bond angles ``angle_deg``, dihedral ``phi_deg`` and bonds BOND_NM."""
    phi, a = np.radians(phi_deg), np.radians(angle_deg)
    s, c = np.sin(np.pi - a), np.cos(np.pi - a)
    x1, x2 = np.zeros(3), np.array([BOND_NM, 0.0, 0.0])
    x0 = x1 + BOND_NM * np.array([-c, s, 0.0])
    x3 = x2 + BOND_NM * np.array([c, s * np.cos(phi), s * np.sin(phi)])
    return np.stack([x0, x1, x2, x3])


def distance_14_nm(positions_nm: np.ndarray) -> np.ndarray:
    traj = mdtraj.Trajectory(np.asarray(positions_nm, dtype=np.float32).reshape(-1, 4, 3), None)
    return mdtraj.compute_distances(traj, np.array([[0, 3]]))[:, 0].astype(float)


def test_a_clashing_seed_is_refused_with_the_pair_named():
    good = chain_positions_nm(180.0)
    bad = chain_with_angles_nm(0.0, 90.0)  # cis with right angles: atoms 1 and 4 one bond length apart
    d = distance_14_nm(bad)[0]
    assert d < ClashGuard.from_mol(chain_mol()).threshold_nm[0]  # 0.55 of the Bondi sum 3.4 A
    guard = ProposalGuard.from_mol(chain_mol(), good)
    refuse_failing_seeds(guard, good[None])  # a passing seed is not refused
    with pytest.raises(InputError) as caught:
        refuse_failing_seeds(guard, np.stack([good, bad]))
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith("seed structure 2 of 2 fails the clash/stereo check")
    assert "atoms 1 and 4" in message and f"{10 * d:.2f} A apart" in message


def test_a_sampler_refuses_a_seed_that_fails_the_guard(tmp_path):
    settings = SamplerSettings(temperature_K=TEMPERATURE_K, langevin_steps=5, training_cycles=0,
                               flow_layers=2, flow_hidden=16, darts_per_cycle=0)
    seeds = np.stack([chain_positions_nm(180.0), chain_with_angles_nm(0.0, 90.0)])
    with pytest.raises(InputError, match="seed structure 2 of 2"):
        Sampler(chain_mol(), chain_system(), seeds, settings, new_store(tmp_path / "run", settings),
                platform="Reference")


def chiral_mol_and_mirror():
    """CHFClBr-like (S)-1-chloro-1-fluoroethane with one embedded conformer, and its mirror image."""
    mol = Chem.AddHs(Chem.MolFromSmiles("C[C@H](F)Cl"))
    AllChem.EmbedMolecule(mol, randomSeed=7)
    AllChem.MMFFOptimizeMolecule(mol)
    x = 0.1 * mol.GetConformer().GetPositions()
    return mol, x, x * np.array([-1.0, 1.0, 1.0])


def cip_label(mol, positions_nm) -> str:
    """RDKit's CIP label of atom 1 read from the 3D structure (independent of hopwell's guard)."""
    m = Chem.Mol(mol)
    conf = m.GetConformer()
    for i, xyz in enumerate(10.0 * positions_nm):
        conf.SetAtomPosition(i, xyz.tolist())
    Chem.AssignStereochemistryFrom3D(m)
    return m.GetAtomWithIdx(1).GetProp("_CIPCode")


def test_a_seed_of_the_other_stereoisomer_is_refused():
    mol, x, mirror = chiral_mol_and_mirror()
    assert {cip_label(mol, x), cip_label(mol, mirror)} == {"R", "S"}
    guard = ProposalGuard.from_mol(mol, x)
    assert not np.asarray(guard.clash(mirror[None]))[0]  # a mirror image keeps every distance
    with pytest.raises(InputError, match="stereocentre at atom 2 unlike the reference"):
        refuse_failing_seeds(guard, np.stack([x, mirror]))


def test_cli_refuses_a_clashing_input_structure_before_making_a_run(tmp_path):
    mol = Chem.AddHs(Chem.MolFromSmiles("CCCC"))
    AllChem.EmbedMolecule(mol, randomSeed=3)
    AllChem.MMFFOptimizeMolecule(mol)
    conf = mol.GetConformer()
    h_first = next(n.GetIdx() for n in mol.GetAtomWithIdx(0).GetNeighbors() if n.GetAtomicNum() == 1)
    h_last = next(n.GetIdx() for n in mol.GetAtomWithIdx(3).GetNeighbors() if n.GetAtomicNum() == 1)
    # A hydrogen of C1 put 0.9 A from one of C4's (five bonds apart; clash below 1.32 A), on
    # the line towards C1 so that its bond to C1 stays shorter than inputs.MAX_BOND_A.
    last, c1 = np.array(conf.GetAtomPosition(h_last)), np.array(conf.GetAtomPosition(0))
    target = last + 0.9 * (c1 - last) / np.linalg.norm(c1 - last)
    conf.SetAtomPosition(h_first, target.tolist())
    sdf = tmp_path / "butane.sdf"
    writer = Chem.SDWriter(str(sdf))
    writer.write(mol)
    writer.close()
    out = tmp_path / "run"
    result = CliRunner().invoke(main, ["run", str(sdf), "-o", str(out), "--samples", "10",
                                       "--platform", "Reference"])
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.output, result.output
    assert lines[0].startswith("hopwell: error: seed structure 1 of 1 fails the clash/stereo check")
    assert f"atoms {min(h_first, h_last) + 1} and {max(h_first, h_last) + 1} are 0.90 A apart" in lines[0]
    assert not out.exists()


def strict_chain_guard() -> ProposalGuard:
    """A guard whose 1-4 threshold is the full Bondi sum, 3.4 A: gauche chains (~3.0 A) fail it,
    anti ones (~3.9 A) pass. A constructed case, not the sampler's thresholds."""
    mol = chain_mol()
    return ProposalGuard(clash=ClashGuard.from_mol(mol, scale=1.0),
                         stereo=StereoGuard.from_mol(mol, chain_positions_nm(180.0)))


@pytest.mark.parametrize("count_guard", [True, False])
def test_langevin_counts_the_states_that_fail_the_guard(count_guard):
    guard = strict_chain_guard()
    threshold_nm = float(guard.clash.threshold_nm[0])
    evaluator = EnergyEvaluator(chain_system(), TEMPERATURE_K, platform="Reference", seed=9)
    move = LangevinSegment([evaluator], 20, log=lambda message: None, guard=guard)
    move.count_guard = count_guard
    start = np.stack([chain_positions_nm(60.0), chain_positions_nm(180.0)])
    walkers = Walkers(start.copy(), evaluator.energies_kj(start))
    streams = RandomStreams.seeded(2)
    states = []
    for _ in range(40):
        move.apply(walkers, np.array([0, 1]), streams)
        states.append(walkers.positions_nm.copy())
    states = np.stack(states)  # (cycles, walkers, 4, 3)
    below = distance_14_nm(states).reshape(40, 2) < threshold_nm
    assert below[:, 0].all() and not below[:, 1].any()  # the gauche walker fails, the anti one passes
    assert move.counters.rolled_back == 0
    assert move.counters.outside_guard == (int(below.sum()) if count_guard else 0)


def test_production_states_of_the_chain_pass_the_sampler_guard_and_reach_the_summary(tmp_path):
    settings = SamplerSettings(temperature_K=TEMPERATURE_K, langevin_steps=20, proposals_per_cycle=0,
                               single_moves_per_cycle=0, darts_per_cycle=4, training_cycles=5,
                               flow_layers=2, flow_hidden=16, cycles_per_chunk=20, seed=4)
    seeds = np.stack([chain_positions_nm(p) for p in (-60.0, 60.0, 180.0)])
    store = new_store(tmp_path / "run", settings)
    sampler = Sampler(chain_mol(), chain_system(), seeds, settings, store, platform="Reference")
    assert sampler.local.guard is sampler.guard
    sampler.run(Budget(samples=120))
    assert sampler.local.counters.proposed == 3 * sampler.cycle and sampler.local.counters.outside_guard == 0
    # Only production segments are checked; a strict guard put in now counts from here, exactly
    # the recorded production Langevin states whose 1-4 distance (mdtraj) is below 3.4 A.
    sampler.local.guard = strict_chain_guard()
    first_cycle = sampler.cycle
    sampler.run(Budget(samples=240))
    chunks = list(store.iter_chunks())
    moves, cycles = (np.concatenate([c[f"state_{k}"] for c in chunks]) for k in ("move", "cycle"))
    positions = np.concatenate([c["state_positions_nm"] for c in chunks]).astype(float)
    langevin_states = positions[(moves == MOVE_LANGEVIN) & (cycles >= first_cycle)]
    assert len(langevin_states) == 3 * (sampler.cycle - first_cycle)
    expected = int((distance_14_nm(langevin_states) < float(strict_chain_guard().clash.threshold_nm[0])).sum())
    assert expected > 0 and sampler.local.counters.outside_guard == expected
    assert local_move_counts(store) == {"segments": sampler.local.counters.proposed, "rolled_back": 0,
                                        "states_failing_guard": expected}


def test_an_exploding_segment_is_rolled_back_and_counted():
    # 20 fs steps on a bond of period 34 fs: the integration diverges within a few steps.
    evaluator = EnergyEvaluator(chain_system(), TEMPERATURE_K, platform="Reference", timestep_ps=0.02, seed=1)
    messages = []
    move = LangevinSegment([evaluator], 200, log=messages.append)
    start = chain_positions_nm(180.0)[None]
    walkers = Walkers(start.copy(), evaluator.energies_kj(start))
    result = move.apply(walkers, np.array([0]), RandomStreams.seeded(0))
    assert not result.accepted[0]
    np.testing.assert_array_equal(walkers.positions_nm, start)
    assert (move.counters.proposed, move.counters.accepted, move.counters.rolled_back) == (1, 0, 1)
    assert len(messages) == 1 and "rolled back" in messages[0]


def test_old_checkpoints_without_the_counters_read_as_zero(tmp_path):
    old = {"proposed": 7, "accepted": 7, "clash": 0, "stereo": 0, "recent": []}
    counters = LangevinCounters.from_json(old)
    assert (counters.proposed, counters.rolled_back, counters.outside_guard) == (7, 0, 0)
    settings = SamplerSettings(temperature_K=TEMPERATURE_K, langevin_steps=5)
    store = new_store(tmp_path / "run", settings)
    store.write_state({"stats": np.str_(json.dumps({"langevin": old}))})
    assert local_move_counts(store) == {"segments": 7, "rolled_back": 0, "states_failing_guard": 0}


def test_guard_failures_and_rollbacks_are_warnings_and_only_when_nonzero():
    rng = np.random.default_rng(0)
    series = np.stack([(rng.random(2000) < 0.5).astype(int) for _ in range(4)])
    estimate = population_estimate(series, 2, rng, n_boot=100)

    def warnings(local_move):
        return judge(series, estimate, ["a", "b"], [False, False], None, local_move).warnings

    clean = warnings({"segments": 100, "rolled_back": 0, "states_failing_guard": 0})
    assert clean == warnings(None)
    assert not any("clash/stereo" in w or "rolled back" in w for w in clean)
    failing = warnings({"segments": 100, "rolled_back": 0, "states_failing_guard": 3})
    assert [w for w in failing if w not in clean] == [
        ("3 production Langevin state(s) failed the clash/stereo check; the Monte Carlo moves are exact"
         " only among states that pass it")]
    rolled = warnings({"segments": 100, "rolled_back": 2, "states_failing_guard": 0})
    assert [w for w in rolled if w not in clean] == [
        ("2 of 100 Langevin segments were rolled back after an energy explosion (a veto after the fact"
         " biases the chain)")]


@pytest.mark.parametrize("smiles", ["C", "c1ccccc1"])
def test_cli_refuses_a_molecule_without_a_torsion_before_making_a_run(tmp_path, smiles):
    # Methane and benzene have no torsion about an acyclic bond: nothing to sample.
    out = tmp_path / "run"
    result = CliRunner().invoke(main, ["run", smiles, "-o", str(out), "--samples", "10",
                                       "--platform", "Reference"])
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "no torsion about an acyclic bond" in lines[0], result.output
    assert not out.exists()
