"""Backbone seeding helpers: rotations about a bond and ring detection."""

import mdtraj as md
import numpy as np
import pytest

from hopwell.systems.backbone import _in_ring, rotate_about_bond


def test_rotation_sets_the_dihedral_and_keeps_bond_lengths():
    rng = np.random.default_rng(2)
    xyz = rng.normal(0.0, 0.15, size=(6, 3))
    bonds = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5)]
    out = rotate_about_bond(xyz, bonds, np.array([0, 1, 2, 3]), np.radians(75.0))
    # mdtraj's dihedral is the outside geometry reference.
    angle = md.compute_dihedrals(md.Trajectory(out[None].astype(np.float32), None), np.array([[0, 1, 2, 3]]))[0, 0]
    assert np.degrees(angle) == pytest.approx(75.0, abs=1e-3)
    for a, b in bonds:  # a rigid rotation of one side keeps every bond length
        assert np.linalg.norm(out[a] - out[b]) == pytest.approx(np.linalg.norm(xyz[a] - xyz[b]), abs=1e-9)
    np.testing.assert_allclose(out[:3], xyz[:3])  # the near side stays put


def test_ring_bonds_are_recognised():
    ring = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 0), (2, 5)]
    assert _in_ring(ring, 1, 2) and _in_ring(ring, 4, 0)
    assert not _in_ring(ring, 2, 5)
    with pytest.raises(ValueError, match="ring"):
        rotate_about_bond(np.zeros((6, 3)), ring, np.array([0, 1, 2, 3]), 1.0)
