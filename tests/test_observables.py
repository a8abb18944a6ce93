"""Karplus couplings against mdtraj and the published coefficients."""

import mdtraj as md
import numpy as np
import pytest

from hopwell.analysis.observables import j3_hn_ha, series_mean
from hopwell.systems.builder import build


@pytest.mark.parametrize("phi_deg", [-120.0, -60.0, 60.0, 180.0])
def test_vuister_bax_at_known_angles(phi_deg):
    # Published coefficients (Vuister & Bax 1993: 6.51, -1.76, 1.60 Hz; theta = phi - 60),
    # evaluated by hand here.
    theta = np.deg2rad(phi_deg - 60.0)
    expected = 6.51 * np.cos(theta) ** 2 - 1.76 * np.cos(theta) + 1.60
    assert j3_hn_ha(np.deg2rad(phi_deg), "vuister-bax-1993") == pytest.approx(expected)


def test_hu_bax_matches_mdtraj(systems_dir):
    # Reference: mdtraj.compute_J3_HN_HA with model "Bax1997" (Hu & Bax 1997) on random
    # backbone geometries of Ace-Ala-NMe.
    molsys = build(str(systems_dir / "ace_ala_nme.pdb"))
    top = md.Topology.from_openmm(molsys.topology)
    rng = np.random.default_rng(2)
    xyz = molsys.seeds_nm[0] + rng.normal(0, 0.03, size=(20, molsys.n_atoms, 3))
    traj = md.Trajectory(xyz.astype(np.float32), top)
    _, phi = md.compute_phi(traj)
    _, j_ref = md.compute_J3_HN_HA(traj, model="Bax1997")
    np.testing.assert_allclose(j3_hn_ha(phi[:, 0], "hu-bax-1997"), j_ref[:, 0], atol=1e-4)


def test_series_mean_interval_covers_known_mean():
    # Independent normal draws with mean 7: the 95% interval must contain it (seeded).
    rng = np.random.default_rng(0)
    mean, low, high = series_mean(rng.normal(7.0, 1.0, size=(4, 2000)))
    assert low < 7.0 < high and high - low < 0.2
