"""Seed darts (hopwell.moves.darts): exact jumps between seed basins.

* The dart is an involution pair: the reverse dart returns to the starting internal coordinates.
* Darts alone (no flow or one-torsion moves) on the four-atom chain reproduce the scipy
  quadrature populations, with the three wells separated by barriers Langevin does not cross
  (tests/test_sampler_exact.py measures that).
"""

from __future__ import annotations

import numpy as np
import torch
from chain_systems import (
    TEMPERATURE_K,
    assign_wells,
    chain_mol,
    chain_positions_nm,
    chain_system,
    dihedrals_rad,
    exact_populations,
    new_store,
    production_positions,
)

from hopwell.analysis.stats import population_estimate
from hopwell.coords.internal import build_zmatrix, cartesian_to_internal
from hopwell.coords.torsions import moving_torsions
from hopwell.moves.darts import build_darts, torsion_distance
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.systems.builder import BuildOptions, build, rotatable_bonds

torch.set_num_threads(1)


def test_reverse_dart_returns_to_the_start():
    molsys = build("CCCCC", BuildOptions(n_seeds=10))  # pentane: anti/gauche combinations
    mol = molsys.mol
    zmat = build_zmatrix(mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
                         heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))
    darts = build_darts(zmat, moving_torsions(zmat, mol), molsys.seeds_nm)
    assert darts is not None and darts.n_centres >= 2
    assert len(darts.rows) == 2  # pentane's two C-C-C-C torsions; methyl rotors excluded
    # Regions do not overlap: the radius is at most half the closest pair of centres.
    rotatable = darts.torsions_rad[:, darts.rows]
    closest = min(torsion_distance(rotatable[i], rotatable[j]) for i in range(len(rotatable)) for j in range(i))
    assert darts.radius_rad <= 0.5 * closest + 1e-12
    start = cartesian_to_internal(zmat, torch.as_tensor(molsys.seeds_nm[:1]))
    source = int(darts.region(start.torsions_rad.numpy())[0])
    assert source >= 0
    target = (source + 1) % darts.n_centres
    bonds, angles, torsions = darts.displace(start, source, target)
    moved = start._replace(bonds_nm=bonds, angles_rad=angles, torsions_rad=torsions)
    assert int(darts.region(torsions.numpy())[0]) == target
    back = darts.displace(moved, target, source)
    assert torch.allclose(back[0], start.bonds_nm, atol=1e-12)
    assert torch.allclose(back[1], start.angles_rad, atol=1e-12)
    diff = torch.remainder(back[2] - start.torsions_rad + np.pi, 2 * np.pi) - np.pi
    assert float(diff.abs().max()) < 1e-12


def test_darts_alone_match_quadrature(tmp_path):
    settings = SamplerSettings(
        temperature_K=TEMPERATURE_K, langevin_steps=50, proposals_per_cycle=0, single_moves_per_cycle=0,
        darts_per_cycle=4, training_cycles=0, flow_layers=2, flow_hidden=16, cycles_per_chunk=100, seed=11,
    )
    seeds = np.stack([chain_positions_nm(p) for p in (-60.0, 60.0, 180.0)])
    store = new_store(tmp_path / "run", settings)
    sampler = Sampler(chain_mol(), chain_system(), seeds, settings, store, n_walkers=3, platform="Reference")
    assert sampler.seed_darts.darts.n_centres == 3
    sampler.run(Budget(samples=6000))
    assert sampler.stats["dart"].accepted > 100
    series = [assign_wells(dihedrals_rad(x)) for x in production_positions(store, 3)]
    result = population_estimate(series, 3, np.random.default_rng(1))
    exact = exact_populations()  # scipy.integrate.quad of exp(-V/kT) per well (chain_systems.py)
    assert np.all((result.lower <= exact) & (exact <= result.upper)), (result.populations, result.lower,
                                                                       result.upper, exact)
    assert np.all(result.upper - result.lower < 0.04), result.upper - result.lower
