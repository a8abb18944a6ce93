"""The torsion-pair move against quadrature on a five-atom chain with two coupled torsions.

C0-C1-C2-C3-C4 with harmonic bonds and angles, the four-atom chain's three-well potential V on
each torsion (phi1 = 0-1-2-3, phi2 = 1-2-3-4) and a coupling D cos(phi1 - phi2), nothing else.
As for the four-atom chain (tests/chain_systems.py), the Cartesian volume element in internal
coordinates holds bond lengths and angles but no torsion, and the energy is a sum of a bond and
angle part and U_t(phi1, phi2) = V(phi1) + V(phi2) + D cos(phi1 - phi2); so the joint torsion
density is exactly exp(-U_t/kT) normalised over the torus, and the nine well-pair populations
are ratios of scipy.integrate.dblquad integrals. The coupling makes the target differ from any
product of marginals, which is what the pair move proposes from.
"""

from __future__ import annotations

import numpy as np
import openmm
import pytest
import torch
from chain_systems import (
    ANGLE_RAD,
    BOND_NM,
    KT_KJ,
    TEMPERATURE_K,
    assign_wells,
    chain_positions_nm,
    dihedrals_rad,
    family_covers,
    new_store,
    production_positions,
    torsion_energy_kj,
    well_edges_rad,
)
from scipy import integrate

from hopwell.analysis.stats import population_estimate
from hopwell.bench.chain import chain_mol, chain_system
from hopwell.coords.torsions import molecule_zmatrix, moving_torsions
from hopwell.moves.torsion_pair import bond_neighbours
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings

torch.set_num_threads(1)

COUPLING_KJ = 1.5 * KT_KJ  # D: favours phi1 and phi2 apart (D cos(phi1 - phi2) is high when equal)


def pair_energy_kj(phi1, phi2):
    return torsion_energy_kj(phi1) + torsion_energy_kj(phi2) + COUPLING_KJ * np.cos(phi1 - phi2)


def five_chain_system() -> openmm.System:
    """The chain continued to five atoms (``chain_system(5)``), with the coupling D cos(phi1 - phi2)."""
    system = chain_system(5)
    coupling = openmm.CustomCompoundBondForce(
        5, f"{COUPLING_KJ}*cos(dihedral(p1,p2,p3,p4) - dihedral(p2,p3,p4,p5))")
    coupling.addBond([0, 1, 2, 3, 4], [])
    system.addForce(coupling)
    return system


def five_chain_positions_nm(phi1_deg: float, phi2_deg: float) -> np.ndarray:
    """Atoms 0-3 as the four-atom chain at phi1, atom 4 placed from 1, 2, 3 at phi2 (NeRF)."""
    x = chain_positions_nm(phi1_deg)
    b, c, d = x[1], x[2], x[3]
    bc = (c - b) / np.linalg.norm(c - b)
    cd = (d - c) / np.linalg.norm(d - c)
    n = np.cross(bc, cd)
    n /= np.linalg.norm(n)
    m = np.cross(n, cd)
    phi2 = np.radians(phi2_deg)
    local = BOND_NM * np.array([-np.cos(ANGLE_RAD), np.sin(ANGLE_RAD) * np.cos(phi2), np.sin(ANGLE_RAD) * np.sin(phi2)])
    e = d + local[0] * cd + local[1] * m + local[2] * n
    return np.concatenate([x, e[None]])


def pair_states(positions_nm: np.ndarray) -> np.ndarray:
    return 3 * assign_wells(dihedrals_rad(positions_nm, (0, 1, 2, 3))) + assign_wells(dihedrals_rad(positions_nm, (1, 2, 3, 4)))


def region_integrals(log_weight) -> np.ndarray:
    """Integrals of exp(log_weight(phi1, phi2)) over the nine well pairs (scipy dblquad)."""
    edges = well_edges_rad()
    bounds = [(edges[0], edges[1]), (edges[1], edges[2]), (edges[2], edges[0] + 2 * np.pi)]
    return np.array([integrate.dblquad(lambda p2, p1: np.exp(log_weight(p1, p2)), a1, b1, a2, b2,
                                       epsabs=0.0, epsrel=1e-9)[0]
                     for a1, b1 in bounds for a2, b2 in bounds])


def test_five_chain_geometry_and_torsion_neighbours():
    x = five_chain_positions_nm(-60.0, 180.0)
    # mdtraj computes in float32: agreement to 1e-3 degrees.
    assert np.degrees(dihedrals_rad(x[None], (0, 1, 2, 3)))[0] == pytest.approx(-60.0, abs=1e-3)
    assert abs(np.degrees(dihedrals_rad(x[None], (1, 2, 3, 4)))[0]) == pytest.approx(180.0, abs=1e-3)
    mol = chain_mol(5)
    zmat = molecule_zmatrix(mol)
    moving = moving_torsions(zmat, mol)
    assert len(moving) == 2
    assert [n.tolist() for n in bond_neighbours(zmat, moving)] == [[1], [0]]  # bonds 1-2 and 2-3 share atom 2


def test_pair_moves_alone_match_quadrature(tmp_path):
    """Pair moves with an untrained, mismatched proposal and one Langevin step per cycle.

    The torsion populations must be the quadrature's and must come from the proposal-density
    ratio: without q_i(t_i) q_j(t_j) / (q_i(t_i') q_j(t_j')) an independence chain would
    converge to populations proportional to the integral of exp(-U_t/kT) q_1 q_2 instead.
    """
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=1, proposals_per_cycle=0, single_moves_per_cycle=0,
        pair_moves_per_cycle=8, darts_per_cycle=0, probes_per_cycle=0, probe_every_production=0,
        training_cycles=0, flow_layers=2, flow_hidden=16, cycles_per_chunk=100, seed=31,
    )
    seeds = np.stack([five_chain_positions_nm(a, b) for a, b in ((-60.0, -60.0), (-55.0, 60.0), (60.0, 180.0),
                                                                  (180.0, -65.0))])
    store = new_store(tmp_path / "run", settings)
    sampler = Sampler(chain_mol(5), five_chain_system(), seeds, settings, store, n_walkers=len(seeds),
                      platform="Reference")
    sampler.run(Budget(samples=12000))
    assert sampler.stats["pair"].accepted > 500 and sampler.stats["single"].proposed == 0

    series = [pair_states(x) for x in production_positions(store, len(seeds))]
    result = population_estimate(series, 9, np.random.default_rng(7))
    u_min = pair_energy_kj(np.pi, 0.0)
    exact = region_integrals(lambda p1, p2: -(pair_energy_kj(p1, p2) - u_min) / KT_KJ)
    exact /= exact.sum()
    # The coupling matters: the exact populations are not the product of their marginals.
    marginal1, marginal2 = exact.reshape(3, 3).sum(axis=1), exact.reshape(3, 3).sum(axis=0)
    assert np.max(np.abs(exact - np.outer(marginal1, marginal2).ravel())) > 0.02
    assert family_covers(result.populations, result.lower, result.upper, exact), (result.populations, exact)
    assert np.all(result.upper - result.lower < 0.05), result.upper - result.lower

    # What an independence chain without the q ratio would give: exp(-U_t/kT) q_1 q_2 (the flow
    # is untrained, so its marginals are as built from the seeds); the run must tell them apart.
    flow, zmat = sampler.trainer.flow, sampler.zmat
    rows = np.asarray(sampler.trainer.moving) + 3
    quads = [{int(zmat.order[r]), int(zmat.bond_ref[r]), int(zmat.angle_ref[r]), int(zmat.torsion_ref[r])} for r in rows]
    column_of = [quads.index({0, 1, 2, 3}), quads.index({1, 2, 3, 4})]  # the flow's column of phi1, phi2

    def log_q(torsion, phi):
        return float(flow.marginal_log_prob(np.array([column_of[torsion]]), np.array([phi]))[0])

    biased = region_integrals(lambda p1, p2: -(pair_energy_kj(p1, p2) - u_min) / KT_KJ + log_q(0, p1) + log_q(1, p2))
    biased /= biased.sum()
    assert np.max(np.abs(biased - exact)) > 2 * np.max(result.upper - result.lower), (biased, exact)
    assert not family_covers(result.populations, result.lower, result.upper, biased)
