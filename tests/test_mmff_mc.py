"""Checks of the independent MMFF Monte Carlo reference (``hopwell.bench.mmff_mc``).

Geometry is checked against RDKit (``rdMolTransforms``, ``AssignStereochemistryFrom3D``), the
ring move's volume preservation against a finite-difference Jacobian, and the sampler against
scipy quadrature on a four-atom chain whose torsion marginal is known exactly.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolDescriptors, rdMolTransforms
from rdkit.Geometry import Point3D
from scipy import integrate

from hopwell.bench import mmff_mc as mc
from hopwell.coords.ring_flip import reflect_ring

LIGANDS = Path(__file__).resolve().parents[1] / "systems" / "ligands" / "ligands.smi"
REFERENCE_MOLECULES = {"methylcyclohexane", "n-butane"}


def _embedded(smiles: str, seed: int = 7) -> Chem.Mol:
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    AllChem.EmbedMolecule(mol, randomSeed=seed)
    AllChem.MMFFOptimizeMolecule(mol, maxIters=2000)
    return mol


def _set_positions(mol: Chem.Mol, positions: np.ndarray) -> Chem.Conformer:
    conf = mol.GetConformer()
    for i, p in enumerate(positions):
        conf.SetAtomPosition(i, Point3D(*p))
    return conf


def _bonds_and_angles(mol: Chem.Mol, positions: np.ndarray) -> np.ndarray:
    """All bond lengths and bond angles (degrees) via RDKit, in a fixed order."""
    conf = _set_positions(mol, positions)
    out = [rdMolTransforms.GetBondLength(conf, b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    for atom in mol.GetAtoms():
        nbrs = [n.GetIdx() for n in atom.GetNeighbors()]
        out += [rdMolTransforms.GetAngleDeg(conf, a, atom.GetIdx(), c)
                for i, a in enumerate(nbrs) for c in nbrs[i + 1:]]
    return np.array(out)


def _rdkit_dihedrals(mol: Chem.Mol, positions: np.ndarray, quads: np.ndarray) -> np.ndarray:
    conf = _set_positions(mol, positions)
    return np.array([rdMolTransforms.GetDihedralDeg(conf, *map(int, q)) for q in quads])


def _wrap_deg(d):
    return (np.asarray(d) + 180.0) % 360.0 - 180.0


def test_dihedrals_match_rdkit():
    mol = _embedded("COCCOCCNS(=O)(=O)c1ccc(C)cc1")
    top = mc.build_topology(mol)
    x = mol.GetConformer().GetPositions()
    np.testing.assert_allclose(mc.dihedrals_deg(x, top.torsion_quads),
                               _rdkit_dihedrals(mol, x, top.torsion_quads), atol=1e-8)


def test_pivot_changes_one_torsion_by_the_drawn_angle_and_keeps_bonds_and_angles():
    mol = _embedded("COCCOCCNS(=O)(=O)c1ccc(C)cc1")  # VLT-103
    top = mc.build_topology(mol)
    x = mol.GetConformer().GetPositions()
    before = _rdkit_dihedrals(mol, x, top.torsion_quads)
    geometry = _bonds_and_angles(mol, x)
    rng = np.random.default_rng(11)
    for b, pivot in enumerate(top.pivots):
        angle_rad = math.pi - 2.0 * math.pi * rng.random()
        y = mc.rotate_about_bond(x, pivot, angle_rad)
        np.testing.assert_allclose(_bonds_and_angles(mol, y), geometry, atol=1e-8)
        change = _wrap_deg(_rdkit_dihedrals(mol, y, top.torsion_quads) - before)
        expected = np.zeros(len(top.pivots))
        expected[b] = _wrap_deg(math.degrees(angle_rad))
        np.testing.assert_allclose(_wrap_deg(change - expected), 0.0, atol=1e-7)
    assert {len(p.moving) for p in top.pivots} != {mol.GetNumAtoms()}  # the smaller side moves
    assert all(len(p.moving) <= mol.GetNumAtoms() / 2 for p in top.pivots)


def test_mirror_inverts_every_stereocentre_as_rdkit_sees_it():
    mol = _embedded("COc1ccc(cc1)C(=O)N1CCC[C@H]1CO")  # VLT-104, (S)
    top = mc.build_topology(mol)
    assert len(top.stereo_centres) == 1
    x = mol.GetConformer().GetPositions()
    mirrored = x * np.array([-1.0, 1.0, 1.0])
    np.testing.assert_array_equal(mc.chiral_signs(mirrored, top.stereo_centres),
                                  -mc.chiral_signs(x, top.stereo_centres))
    _set_positions(mol, mirrored)
    Chem.AssignStereochemistryFrom3D(mol)
    assert mol.GetAtomWithIdx(int(top.stereo_centres[0, 0])).GetProp("_CIPCode") == "R"


def test_guard_rejects_inversions_on_a_flat_energy():
    """With U = 0 every proposal is accepted unless it inverts a centre (1.5 A steps sometimes do)."""
    mol = _embedded("COc1ccc(cc1)C(=O)N1CCC[C@H]1CO")
    top = mc.build_topology(mol)
    x = mol.GetConformer().GetPositions()
    settings = mc.MoveSettings(pivot=0.0, rotor=0.0, ring=0.0, cartesian_sigma_A=1.5)
    chain = mc.run_chain(x, lambda p: 0.0, top, 0.6, steps=3000, burn_in=0, record_every=100,
                         settings=settings, rng=np.random.default_rng(3))
    assert chain.stereo_rejected > 0
    assert chain.accepted["cartesian"] == chain.proposed["cartesian"] - chain.stereo_rejected


def _normal_angle_deg(x: np.ndarray, site: mc.RingSite) -> float:
    ring = list(site.ring)
    centre = x[ring].mean(axis=0)
    normal = np.linalg.svd(x[ring] - centre)[2][2]
    bond = x[site.substituent] - x[site.atom]
    return math.degrees(math.acos(abs(bond @ normal) / np.linalg.norm(bond)))


def test_ring_flip_is_a_volume_preserving_involution_that_swaps_axial_and_equatorial():
    mol = _embedded("CC1CCCCC1", seed=1)
    top = mc.build_topology(mol)
    (move,), (site,) = top.rings, top.ring_sites
    x = mol.GetConformer().GetPositions()
    # Equatorial methyl: its bond is far from the ring's mean-plane normal (about 70 degrees).
    assert mc.ring_substituent_state(mc.dihedrals_deg(x, site.quads)) == 0
    assert _normal_angle_deg(x, site) > 60.0
    y = reflect_ring(x, move)
    assert mc.is_chair(x, move.ring) and mc.is_chair(y, move.ring)
    assert mc.ring_substituent_state(mc.dihedrals_deg(y, site.quads)) == 1
    assert _normal_angle_deg(y, site) < 20.0
    np.testing.assert_allclose(_bonds_and_angles(mol, y), _bonds_and_angles(mol, x), atol=1e-8)
    noisy = x + 0.1 * np.random.default_rng(5).standard_normal(x.shape)
    np.testing.assert_allclose(reflect_ring(reflect_ring(noisy, move), move), noisy, atol=1e-10)
    step = 1e-6
    flat = noisy.ravel()
    jac = np.empty((flat.size, flat.size))
    for i in range(flat.size):
        e = np.zeros(flat.size)
        e[i] = step
        jac[:, i] = (reflect_ring((flat + e).reshape(-1, 3), move)
                     - reflect_ring((flat - e).reshape(-1, 3), move)).ravel() / (2 * step)
    assert abs(abs(np.linalg.det(jac)) - 1.0) < 1e-6


def test_ring_flip_keeps_ring_stereocentres():
    mol = _embedded("COc1ccc(cc1)C(=O)N1CCC[C@H]1CO")
    top = mc.build_topology(mol)
    x = mol.GetConformer().GetPositions()
    y = reflect_ring(x, top.rings[0])
    ring = top.rings[0].ring
    assert int(top.stereo_centres[0, 0]) in ring
    np.testing.assert_array_equal(mc.chiral_signs(y, top.stereo_centres), mc.chiral_signs(x, top.stereo_centres))
    ring_quads = np.array([[ring[(i + d) % len(ring)] for d in range(4)] for i in range(len(ring))])
    np.testing.assert_allclose(mc.dihedrals_deg(y, ring_quads), -mc.dihedrals_deg(x, ring_quads), atol=1e-8)
    # Exocyclic torsions are carried with their ring atom's frame, so they stay as they were.
    np.testing.assert_allclose(mc.dihedrals_deg(y, top.torsion_quads), mc.dihedrals_deg(x, top.torsion_quads),
                               atol=1e-8)


def test_well_edges():
    np.testing.assert_array_equal(mc.well_index([-120.0, -119.9, 0.0, 1e-9, 120.0, 120.1, 180.0, -180.0]),
                                  [2, 0, 0, 1, 1, 2, 2, 2])


# Four-atom chain with harmonic bonds and angles and a torsion potential V(phi) only. The
# Cartesian volume element in internal coordinates, r1^2 r2^2 r3^2 sin(a1) sin(a2), does not
# depend on phi, so phi's marginal is exactly proportional to exp(-V(phi)/kT): well populations
# are ratios of one-dimensional integrals. Parameters are arbitrary (a test system, not data);
# the sin term makes gauche- and gauche+ differ, so a sign error in the pivot would show.
BOND_A, BOND_K = 1.53, 300.0  # angstrom, kcal/mol/A^2
ANGLE_RAD, ANGLE_K = math.radians(112.0), 60.0  # kcal/mol/rad^2
TORSION_A, TORSION_B, TORSION_C = 1.5, 0.6, -0.6  # kcal/mol
KT_KCAL = mc.GAS_CONSTANT_KCAL_PER_MOL_K * 300.0


def _torsion_kcal(phi):
    return TORSION_A * (1 + np.cos(3 * phi)) + TORSION_B * np.cos(phi) + TORSION_C * np.sin(phi)


def _sub(a, b):
    return (a[0] - b[0], a[1] - b[1], a[2] - b[2])


def _dot(a, b):
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def _cross(a, b):
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def _chain_energy_kcal(x: np.ndarray) -> float:
    """Energy of the four-atom chain in plain floats (a numpy version costs ~10x more per call)."""
    p = x.tolist()
    d = [_sub(p[i + 1], p[i]) for i in range(3)]
    r = [math.sqrt(_dot(v, v)) for v in d]
    energy = sum(BOND_K * (ri - BOND_A) ** 2 for ri in r)
    for i in range(2):
        cos_a = max(-1.0, min(1.0, -_dot(d[i], d[i + 1]) / (r[i] * r[i + 1])))
        energy += ANGLE_K * (math.acos(cos_a) - ANGLE_RAD) ** 2
    return energy + float(_torsion_kcal(_phi_rad(d, r[1])))


def _phi_rad(d, r_middle):
    """Torsion from the three bond vectors, IUPAC sign (checked against mc.dihedrals_deg)."""
    n1, n2 = _cross(d[0], d[1]), _cross(d[1], d[2])
    return math.atan2(r_middle * _dot(d[0], n2), _dot(n1, n2))


def _exact_wells() -> np.ndarray:
    weight = lambda phi: math.exp(-_torsion_kcal(phi) / KT_KCAL)  # noqa: E731
    edges = np.radians([-180.0, -120.0, 0.0, 120.0, 180.0])
    parts = [integrate.quad(weight, a, b, epsabs=0, epsrel=1e-12)[0] for a, b in zip(edges[:-1], edges[1:])]
    return np.array([parts[1], parts[2], parts[0] + parts[3]]) / sum(parts)


def test_chain_populations_match_quadrature():
    mol = Chem.MolFromSmiles("CCCC")  # heavy atoms only: the graph of the four-atom chain
    top = mc.build_topology(mol)
    assert len(top.pivots) == 1 and not top.rotors and not top.rings
    x0 = np.array([[0.0, 1.2, 0.0], [0.0, 0.0, 0.0], [1.5, 0.0, 0.0], [1.5, 1.2, 0.6]])
    for x in np.random.default_rng(8).standard_normal((5, 4, 3)):
        d = [tuple(v) for v in np.diff(x, axis=0)]
        phi_deg = math.degrees(_phi_rad(d, math.sqrt(_dot(d[1], d[1]))))
        assert phi_deg == pytest.approx(mc.dihedrals_deg(x, np.array([[0, 1, 2, 3]]))[0], abs=1e-9)
    chain = mc.run_chain(x0, _chain_energy_kcal, top, KT_KCAL, steps=40000, burn_in=2000, record_every=5,
                         settings=mc.MoveSettings(pivot=0.6, rotor=0.0, ring=0.0),
                         rng=np.random.default_rng(2024))
    wells = mc.well_index(chain.torsions_deg[:, 0])
    # Batch means over 20 batches of 2000 steps, far longer than the chain's correlation time:
    # about one step in six is an accepted pivot, which redraws the torsion from scratch.
    batches = np.array([[np.mean(b == w) for w in range(3)] for b in np.array_split(wells, 20)])
    estimate = batches.mean(axis=0)
    se = batches.std(axis=0, ddof=1) / math.sqrt(len(batches))
    exact = _exact_wells()
    assert np.all(se < 0.01)
    assert np.all(np.abs(estimate - exact) < 4 * se), (estimate, exact, se)
    assert abs(exact[0] - exact[1]) > 0.2  # the asymmetric term is visible


def test_ligand_set_meets_its_description():
    entries = [line.split() for line in LIGANDS.read_text().splitlines() if line.strip()]
    assert len(entries) >= 10 and REFERENCE_MOLECULES <= {name for _, name in entries}
    for smiles, name in entries:
        mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
        assert AllChem.MMFFHasAllMoleculeParams(mol), name
        if name not in REFERENCE_MOLECULES:
            assert 20 <= mol.GetNumAtoms() <= 80, name
            assert 3 <= rdMolDescriptors.CalcNumRotatableBonds(mol) <= 12, name


def test_cli_runs_in_process_and_refuses_bad_arguments(tmp_path):
    out = tmp_path / "butane.json"
    args = mc.parse_args(["n-butane", "--steps", "3000", "--chains", "2", "--out", str(out)])
    result = mc.main(args)
    assert json.loads(out.read_text()) == json.loads(json.dumps(result))
    (torsion,) = result["torsions"]
    assert torsion["atoms_1based"] == [1, 2, 3, 4]
    assert sum(torsion["pooled"].values()) == pytest.approx(1.0)
    assert len(torsion["per_chain"]) == 2 and result["acceptance_per_chain"][0]["pivot"] > 0
    with pytest.raises(mc.UsageError, match="--steps"):
        mc.parse_args(["n-butane", "--steps", "0", "--out", str(out)])
    with pytest.raises(mc.UsageError, match="neither a name"):
        mc.resolve_molecule("not-a-molecule(", LIGANDS)


def test_starts_keep_chairs_only_when_asked():
    mol = Chem.AddHs(Chem.MolFromSmiles("CC1CCCCC1"))
    props = AllChem.MMFFGetMoleculeProperties(mol)
    top = mc.build_topology(mol)
    chairs, skipped = mc.starts(mol, 4, 2024, props, top, chairs_only=True)
    assert len(chairs) == 4 and all(mc.is_chair(x, top.rings[0].ring) for x in chairs)
    anything, none_skipped = mc.starts(mol, 8, 2024, props, top, chairs_only=False)
    assert none_skipped == 0
    assert sum(not mc.is_chair(x, top.rings[0].ring) for x in anything) >= 1  # ETKDG does give twist-boats
