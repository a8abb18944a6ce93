"""The ring-flip move: which rings it flips, its acceptance rule, and the sampler using it.

The reflection's involution and unit Jacobian are checked numerically in tests/test_mmff_mc.py
(the RDKit Monte Carlo reference uses the same map). Here: the move accepts a flip with
probability min(1, exp(-du/kT)), the Metropolis rule (Metropolis et al. 1953, J. Chem. Phys.
21:1087), judged by a binomial test (scipy); the way back lands on the start exactly; RDKit's
own stereo perception sees the same stereoisomer after a flip; and a run schedules the move.
"""

import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem
from scipy import stats as sps

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.ring_flip import flippable_rings, reflect_ring
from hopwell.moves.base import RandomStreams, Walkers
from hopwell.moves.ring_flip import RingFlip
from hopwell.sampling.run import run_status, start_run
from hopwell.sampling.sampler import Budget, SamplerSettings
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator


def _mol(smiles):
    return Chem.AddHs(Chem.MolFromSmiles(smiles))


def test_flippable_rings_are_isolated_saturated_five_to_seven_rings():
    ring, = flippable_rings(_mol("CC1CCCCC1"))
    assert len(ring.ring) == 6
    # Every other atom hangs off exactly one ring atom.
    assert sorted(np.concatenate([ring.ring, *ring.branches]).tolist()) == list(range(21))
    pyrrolidine, = flippable_rings(_mol("COc1ccc(cc1)C(=O)N1CCC[C@H]1CO"))  # VLT-104: the benzene is not saturated
    assert len(pyrrolidine.ring) == 5
    assert flippable_rings(_mol("C1CCC2CCCCC2C1")) == []  # decalin: fused
    assert flippable_rings(_mol("C1CC1")) == [] and flippable_rings(_mol("C1CCCCCCC1")) == []  # sizes 3 and 8


def test_reflection_keeps_rdkit_stereo_labels_and_ring_cis_trans():
    # VLT-205 of systems/ligands: trans-4-methylcyclohexyl amide.
    mol = _mol("C[C@H]1CC[C@@H](CC1)NC(=O)COc1ccccc1")
    AllChem.EmbedMolecule(mol, randomSeed=3)
    ring, = flippable_rings(mol)
    flipped = Chem.Mol(mol)
    conf = flipped.GetConformer()
    for i, p in enumerate(reflect_ring(mol.GetConformer().GetPositions(), ring)):
        conf.SetAtomPosition(i, p.tolist())

    def smiles_from_3d(m):
        m = Chem.Mol(m)
        Chem.AssignStereochemistryFrom3D(m)
        return Chem.MolToSmiles(Chem.RemoveHs(m))

    assert smiles_from_3d(flipped) == smiles_from_3d(mol) == Chem.MolToSmiles(
        Chem.MolFromSmiles("C[C@H]1CC[C@@H](CC1)NC(=O)COc1ccccc1"))


@pytest.fixture(scope="module")
def methylcyclohexane():
    molsys = build("CC1CCCCC1")
    evaluator = EnergyEvaluator(molsys.system, 298.0, seed=11, platform="Reference")
    guard = ProposalGuard.from_mol(molsys.mol, molsys.seeds_nm[0])
    return molsys, evaluator, guard


def test_flips_are_accepted_with_the_metropolis_probability(methylcyclohexane):
    molsys, evaluator, guard = methylcyclohexane
    rings = flippable_rings(molsys.mol)
    move = RingFlip(rings, guard, evaluator, 1)
    # A thermal state whose flip is uphill by 0.3-2 kT, so that acceptance is far from 0 and 1.
    x = evaluator.minimize(molsys.seeds_nm)[0]
    for _ in range(200):
        x, _, _ = evaluator.langevin(x, 50)
        u_x, u_y = evaluator.energies_kj(np.stack([x, reflect_ring(x, rings[0])]))
        if 0.3 < (u_y - u_x) / evaluator.kT < 2.0:
            break
    else:
        pytest.fail("no thermal state with a flip 0.3-2 kT uphill in 200 tries")
    n = 400
    walkers = Walkers(np.repeat(x[None], n, axis=0), np.full(n, u_x))
    moved = move.apply(walkers, np.arange(n), RandomStreams.seeded(4)).accepted
    expected = np.exp(-(u_y - u_x) / evaluator.kT)
    assert sps.binomtest(int(moved.sum()), n, expected).pvalue > 1e-3, (moved.mean(), expected)
    assert move.counters.proposed == n and move.counters.accepted == moved.sum()
    # From the flipped states the way back is downhill: always accepted, landing on x again.
    flipped = np.flatnonzero(moved)
    back = Walkers(walkers.positions_nm[flipped].copy(), walkers.energies_kj[flipped].copy())
    assert move.apply(back, np.arange(len(flipped)), RandomStreams.seeded(5)).accepted.all()
    np.testing.assert_allclose(back.positions_nm, np.repeat(x[None], len(flipped), axis=0), atol=1e-9)
    np.testing.assert_allclose(back.energies_kj, u_x, atol=1e-6)


def test_a_run_flips_rings_and_reports_it(tmp_path):
    settings = SamplerSettings(training_cycles=3, temperature_K=298.0, seed=3)
    sampler = start_run("CC1CCCCC1", tmp_path / "run", BuildOptions(), settings, Budget(samples=60))
    ring = sampler.stats["ring"]
    assert ring.proposed == sampler.cycle * sampler.n_walkers and ring.accepted > 0
    assert run_status(tmp_path / "run")["ring_flip_acceptance"] == pytest.approx(ring.acceptance())
    # No flippable ring (butane): the move is never scheduled.
    sampler = start_run("CCCC", tmp_path / "butane", BuildOptions(), settings, Budget(samples=20))
    assert sampler.stats["ring"].proposed == 0
