"""The flow move's pieces (hopwell.coords.torsions, hopwell.flow.torsion): which torsions the flow redraws, its context, its density.

* Stiff rows are the partial double bonds: amide and ester C-X bonds, not C-C single bonds
  (common-practice chemistry); on Ace-Ala-NMe the flow's torsions are then exactly mdtraj's
  phi and psi.
* The context angles of phi and psi include the backbone angle N-CA-C (mdtraj atom names).
* A conditional flow is a normalized density for every context (scipy's trapezoid rule on the
  torus), its samples carry their own log q, it depends on the context, and its checkpoint
  restores it exactly.
"""

from __future__ import annotations

import mdtraj
import numpy as np
import pytest
import torch
from scipy import integrate

from hopwell.coords.internal import build_zmatrix
from hopwell.coords.torsions import (
    context_angles,
    moving_torsions,
    rotatable_rows,
    stiff_rows,
)
from hopwell.flow.torsion import TorsionFlow
from hopwell.systems.builder import BuildOptions, build, rotatable_bonds

torch.set_num_threads(1)


def _rows(molsys):
    mol = molsys.mol
    zmat = build_zmatrix(mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
                         heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))
    return zmat, rotatable_rows(zmat, moving_torsions(zmat, mol))


def _central_bond(zmat, row):
    return frozenset((int(zmat.bond_ref[row + 3]), int(zmat.angle_ref[row + 3])))


@pytest.mark.parametrize("smiles, n_stiff, n_soft", [
    ("CC(=O)NC", 1, 0),        # N-methylacetamide: the amide C-N only
    ("CC(=O)OCC", 1, 1),       # ethyl acetate: the ester C(=O)-O, and O-CH2 is a single bond
    ("CCCCC", 0, 2),           # pentane: two C-C rotors
    ("CC(=S)NC", 1, 0),        # N-methylthioacetamide
])
def test_stiff_rows_are_the_partial_double_bonds(smiles, n_stiff, n_soft):
    # Common practice: amide, thioamide and ester C(=X)-N/O bonds have partial double-bond
    # character; ordinary C-C and C-O single bonds do not.
    molsys = build(smiles, BuildOptions(n_seeds=4))
    zmat, rows = _rows(molsys)
    stiff = stiff_rows(zmat, molsys.mol, rows)
    assert (int(stiff.sum()), int((~stiff).sum())) == (n_stiff, n_soft)
    for row, is_stiff in zip(rows, stiff):
        a, b = (molsys.mol.GetAtomWithIdx(i) for i in _central_bond(zmat, row))
        carbonyl_like = any(n.GetAtomicNum() in (8, 16) and molsys.mol.GetBondBetweenAtoms(
            atom.GetIdx(), n.GetIdx()).GetBondTypeAsDouble() == 2 for atom in (a, b) for n in atom.GetNeighbors())
        assert is_stiff == carbonyl_like


def test_dipeptide_flow_torsions_are_phi_and_psi_with_the_backbone_angle(systems_dir):
    molsys = build(str(systems_dir / "ace_ala_nme.pdb"), BuildOptions(backbone_seeds=False))
    zmat, rows = _rows(molsys)
    soft = rows[~stiff_rows(zmat, molsys.mol, rows)]
    # mdtraj's own phi (C-N-CA-C) and psi (N-CA-C-N) definitions give the central bonds.
    topology = mdtraj.Topology.from_openmm(molsys.topology)
    traj = mdtraj.Trajectory(molsys.seeds_nm[:1], topology)
    (phi,), (psi,) = mdtraj.compute_phi(traj)[0], mdtraj.compute_psi(traj)[0]
    expected = {frozenset(map(int, phi[1:3])), frozenset(map(int, psi[1:3]))}
    assert {_central_bond(zmat, k) for k in soft} == expected
    # The omega torsions are the stiff ones.
    assert len(rows) - len(soft) == 2
    names = {}
    for col in context_angles(zmat, soft):
        r = col + 2
        atoms = (int(zmat.order[r]), int(zmat.bond_ref[r]), int(zmat.angle_ref[r]))
        names[col] = tuple(topology.atom(i).name for i in atoms)
    # The backbone angle N-CA-C (tau) is among them, in either placement direction.
    assert any(sorted((n[0], n[2])) == ["C", "N"] and n[1] == "CA" for n in names.values()), names
    # Every context angle has its vertex on phi's or psi's axis.
    axis_atoms = {i for bond in expected for i in bond}
    assert all(int(zmat.bond_ref[c + 2]) in axis_atoms for c in names)


def _trained_conditional_flow():
    """A two-column flow (of three moving torsions) conditioned on an angle-like input and a
    torsion, fitted briefly to torsions that follow them, so that its networks are no longer
    the identity."""
    generator = torch.Generator().manual_seed(3)
    n = 2000
    angle = 1.9 + 0.05 * torch.randn(n, 1, generator=generator, dtype=torch.float64)
    switch = torch.where(torch.rand(n, 1, generator=generator) < 0.5, 0.0, np.pi).double()  # cis/trans
    noise = 0.3 * torch.randn(n, 2, generator=generator, dtype=torch.float64)
    torsions = torch.cat([16.0 * (angle - 1.9) + noise[:, :1], switch,
                          torch.remainder(switch + 1.0 + noise[:, 1:] + np.pi, 2 * np.pi) - np.pi], 1)
    context = torch.cat([angle, switch], 1)
    torch.manual_seed(4)
    flow = TorsionFlow(torsions.numpy(), flow_columns=np.array([0, 2]), context_periodic=np.array([False, True]),
                       transforms=2, hidden=16)
    flow.refit_base(torsions.numpy(), context.numpy())
    optimizer = torch.optim.AdamW(flow.parameters(), lr=5e-3, weight_decay=1e-3)
    for _ in range(200):
        index = torch.randint(0, n, (256,), generator=generator)
        flow.fit_step(optimizer, torsions[index][:, [0, 2]], context[index], 0.5, generator)
    return flow


def test_conditional_flow_is_a_normalized_density_for_each_context(tmp_path):
    flow = _trained_conditional_flow()
    means = []
    for c in ([1.85, 0.0], [1.95, np.pi]):
        # The 2-D density over the torus must integrate to 1. The rectangle rule on a uniform
        # grid is the trapezoid rule for a periodic function and converges spectrally for a
        # smooth one (a textbook fact of quadrature); scipy's trapezoid does the sums.
        grid = np.linspace(-np.pi, np.pi, 257)
        t1, t2 = np.meshgrid(grid, grid, indexing="ij")
        with torch.no_grad():
            values = torch.exp(flow.log_prob(torch.as_tensor(np.stack([t1.ravel(), t2.ravel()], 1)),
                                             torch.tensor(c, dtype=torch.float64))).numpy().reshape(t1.shape)
        total = integrate.trapezoid(integrate.trapezoid(values, grid, axis=1), grid)
        assert total == pytest.approx(1.0, abs=2e-3)
        t, _ = flow.sample(4000, torch.tensor(c, dtype=torch.float64), torch.Generator().manual_seed(1))
        means.append(np.angle(np.exp(1j * t.numpy()).mean(0)))  # circular means of both torsions
    # The angle input moves the first torsion as the training data did (-0.8 and +0.8 rad).
    assert abs(np.angle(np.exp(1j * (means[1][0] - means[0][0])))) > 0.5, means
    # The torsion input reaches the networks: turning it alone changes the density.
    probe = torch.tensor([[0.0, 1.0]], dtype=torch.float64)
    with torch.no_grad():
        cis, trans = (float(flow.log_prob(probe, torch.tensor([1.9, switch], dtype=torch.float64))[0])
                      for switch in (0.0, np.pi))
    assert abs(cis - trans) > 0.1, (cis, trans)

    context = torch.tensor([1.9, np.pi], dtype=torch.float64)
    t, log_q = flow.sample(64, context, torch.Generator().manual_seed(5))
    assert t.shape == (64, 2)
    with torch.no_grad():
        torch.testing.assert_close(log_q, flow.log_prob(t, context), atol=1e-8, rtol=0)

    # The torsion outside the flow keeps a normalized one-torsion marginal of its own.
    index = torch.tensor([1])
    mass = integrate.quad(lambda x: float(np.exp(flow.marginal_log_prob(index, np.array([x]))[0])),
                          -np.pi, np.pi, limit=200)[0]
    assert mass == pytest.approx(1.0, abs=1e-6)

    # A checkpoint carries the networks, the base, the other torsion's marginal and the
    # context standardization: a fresh flow loaded from it gives identical densities.
    torch.save(flow.state_dict(), tmp_path / "flow.pt")
    fresh = TorsionFlow(np.zeros((1, 3)), flow_columns=np.array([0, 2]), context_periodic=np.array([False, True]),
                        transforms=2, hidden=16)
    fresh.load_state_dict(torch.load(tmp_path / "flow.pt"))
    probe = torch.tensor([[0.1, -2.0], [2.5, 0.3]], dtype=torch.float64)
    with torch.no_grad():
        assert torch.equal(fresh.log_prob(probe, context), flow.log_prob(probe, context))
        assert np.array_equal(fresh.marginal_log_prob(np.array([1, 1]), probe[:, 0].numpy()),
                              flow.marginal_log_prob(np.array([1, 1]), probe[:, 0].numpy()))


def test_flow_of_all_columns_without_context_checkpoints_only_its_networks():
    # Checkpoints written before the flow had context or outside columns hold the NCSF's
    # state alone; such a flow must still have exactly those keys, or old runs would not resume.
    flow = TorsionFlow(np.zeros((2, 3)), transforms=2, hidden=8)
    assert all(key.startswith("flow.") for key in flow.state_dict())
    conditional = TorsionFlow(np.zeros((2, 3)), flow_columns=np.array([1]), context_periodic=np.array([False, True]),
                              transforms=2, hidden=8)
    assert {"other_loc", "context_center", "context_scale"} <= set(conditional.state_dict())
