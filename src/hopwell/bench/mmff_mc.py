"""Reference torsion and ring populations by Metropolis Monte Carlo on RDKit's own MMFF94 energy.

Run ``python -m hopwell.bench.mmff_mc SMILES_OR_NAME --steps N --chains C --out FILE.json``.
NAME is looked up in ``systems/ligands/ligands.smi`` (``--ligands`` to use another file).

This is an outside check on hopwell: it imports nothing of hopwell but the table printer and the
ring reflection's geometry (a proposal only, whose involution and unit Jacobian
``tests/test_mmff_mc.py`` checks numerically), takes its energies from ``rdkit.ForceField``
(``MMFFGetMoleculeForceField(...).CalcEnergy``, kcal/mol, vacuum, constant dielectric 1) rather
than from hopwell's OpenMM forces, and samples Cartesian coordinates with its own moves. Each
step draws one move type with a fixed probability and accepts the proposal y from x with

    A(x -> y) = min(1, exp(-(U(y) - U(x)) / kT) |det dT/dx|),    kT = R T (kcal/mol),

where every proposal here is symmetric or a volume-preserving involution, so the last factor is 1:

* ``pivot``: one rotatable bond (acyclic single bond between two atoms each with another heavy
  neighbour) drawn uniformly; its smaller side is turned about the bond by an angle drawn
  uniformly in (-pi, pi]. The angle's density is even, so q(x -> y) = q(y -> x).
* ``rotor``: the same for a terminal group (methyl, hydroxyl, ammonium...): the hydrogens of a
  heavy atom whose only heavy neighbour is across an acyclic single bond.
* ``ring``: one isolated saturated ring of five to seven atoms drawn uniformly; its atoms are
  reflected through their least-squares mean plane and each substituent branch is carried
  rigidly in the right-handed local frame of its ring atom
  (:func:`hopwell.coords.ring_flip.reflect_ring`). The map is its own
  inverse and keeps volume (``tests/test_mmff_mc.py`` checks both numerically), so it is an exact
  deterministic MH move. It maps one chair onto the other (axial <-> equatorial) and keeps every
  stereocentre. Cartesian moves alone never flipped a methylcyclohexane chair in 220 000 steps
  (measured here; the chair-chair barrier is about 10 kcal/mol, a common textbook value).
* ``cartesian``: one atom drawn uniformly, displaced by an isotropic Gaussian of spread sigma
  (adapted towards 30-50% acceptance in the first half of the burn-in, fixed afterwards); a
  heavy atom carries its hydrogens along (the moved set depends on the drawn atom only, so the
  proposal stays symmetric). Moving a heavy atom alone stretches its X-H bonds; carrying them
  shortened the integrated autocorrelation time of n-butane's anti indicator from 15 to 6
  records of 20 steps (one chain of 300 000 steps each way, measured here).

A proposal that changes the sign of the chiral volume at any potential tetrahedral stereocentre
(``rdkit.Chem.FindPotentialStereo``) relative to the chain's start is rejected without an energy
call. Chains start from ETKDG embeddings (``EmbedMultipleConfs``) minimized with MMFF. By default
only starts whose saturated six-membered rings are chairs are kept (``--start-rings``): about a
third of methylcyclohexane's embeddings minimize to a twist-boat, and no move here takes a ring
from a twist-boat to a chair or back at room temperature (measured here: with single-atom
moves three such chains of 700 000 steps stayed twist-boat throughout and the chair chains
never left the chair; with the present moves four of 100 000 steps stayed too). The
estimates are then populations within the chair manifold; the twist-boat's own weight is
small (about 6 kcal/mol above the chair in MMFF94 after minimization, measured here).

Recorded every ``record_every`` steps after the burn-in: the torsion of each rotatable bond
(degrees) and, for each saturated six-membered ring atom with exactly one heavy substituent, the
substituent's axial/equatorial state (``ring_substituent_state``). Torsions fall into wells
gauche- (-120, 0], gauche+ (0, 120] and anti (the rest). The JSON output gives, per chain and
pooled over chains, the well fractions, the standard error over chains (pooled) and from batch
means (per chain), the number of well changes between records, and acceptance rates per move
type.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.bench import print_table
from hopwell.coords.ring_flip import flippable_rings, reflect_ring

# Molar gas constant in kcal/(mol K): CODATA 2018 R = 8.314462618 J/(mol K), 1 kcal = 4184 J.
GAS_CONSTANT_KCAL_PER_MOL_K = 8.314462618 / 4184.0
WELL_NAMES = ("gauche-", "gauche+", "anti")
RING_STATE_NAMES = ("equatorial", "axial", "other")
MOVE_TYPES = ("pivot", "rotor", "ring", "cartesian")
DEFAULT_LIGANDS = Path(__file__).resolve().parents[3] / "systems" / "ligands" / "ligands.smi"


class UsageError(ValueError):
    """Bad input to the command line: reported as one line and exit code 2."""


@dataclass(frozen=True)
class Pivot:
    """A rotation about one bond: ``moving`` atoms turn about the axis ``axis[0] -> axis[1]``.

    ``sign`` is +1 when the moving side is ``axis[1]``'s and -1 when it is ``axis[0]``'s, so
    that turning by ``sign * angle`` changes the bond's torsions by ``angle`` either way.
    """

    axis: tuple[int, int]
    moving: np.ndarray
    sign: float


@dataclass(frozen=True)
class RingSite:
    """A six-membered ring atom with one heavy substituent and the torsions that classify it.

    ``quads`` has shape (8, 4): the two torsions substituent, ring atom, ring neighbour, next
    ring atom, then the six ring torsions in ring order.
    """

    atom: int
    substituent: int
    ring: tuple[int, ...]
    quads: np.ndarray


@dataclass(frozen=True)
class Topology:
    """Everything the moves and the recorder need, chosen once from the molecular graph.

    Attributes
    ----------
    pivots : list of Pivot
        One per rotatable bond, in the order of ``torsion_quads``.
    torsion_quads : numpy.ndarray, shape=(n_torsions, 4)
        The recorded torsion of each rotatable bond (0-based atom indices).
    rotors : list of Pivot
        Terminal groups (their hydrogens turn).
    rings : list of hopwell.coords.ring_flip.RingReflection
        Rings the ring move reflects.
    ring_sites : list of RingSite
        Ring substituents whose axial/equatorial state is recorded.
    stereo_centres : numpy.ndarray, shape=(n_centres, 4)
        Each potential tetrahedral stereocentre followed by three of its neighbours.
    carried : list of numpy.ndarray
        Per atom, the atoms a Cartesian move of it displaces: a heavy atom and its hydrogens,
        or a hydrogen alone.
    """

    pivots: list
    torsion_quads: np.ndarray
    rotors: list
    rings: list
    ring_sites: list
    stereo_centres: np.ndarray
    carried: list


def _side(mol: Chem.Mol, start: int, blocked: int) -> list[int]:
    """Atoms reachable from ``start`` without stepping onto ``blocked`` (breadth first)."""
    seen = {start, blocked}
    order = [start]
    queue = deque([start])
    while queue:
        atom = mol.GetAtomWithIdx(queue.popleft())
        for nbr in atom.GetNeighbors():
            idx = nbr.GetIdx()
            if idx not in seen:
                seen.add(idx)
                order.append(idx)
                queue.append(idx)
    return sorted(order)


def _heavy_neighbours(atom: Chem.Atom, exclude: int) -> list[Chem.Atom]:
    """Heavy neighbours of ``atom`` other than ``exclude``, in the order that picks torsion atoms.

    Singly bonded neighbours first (so an amide's torsion is C-C(=O)-N-C, anti when trans, and a
    sulfonamide's C-S-N-C), then by atomic number (high first), then by index.
    """
    mol = atom.GetOwningMol()
    nbrs = [n for n in atom.GetNeighbors() if n.GetAtomicNum() > 1 and n.GetIdx() != exclude]
    return sorted(nbrs, key=lambda n: (mol.GetBondBetweenAtoms(atom.GetIdx(), n.GetIdx()).GetBondType()
                                       == Chem.BondType.DOUBLE, -n.GetAtomicNum(), n.GetIdx()))


def _pivot(mol: Chem.Mol, j: int, k: int) -> Pivot:
    """The pivot about bond j-k that moves the smaller side (k's side on a tie)."""
    side_k = _side(mol, k, j)
    if len(side_k) <= mol.GetNumAtoms() - len(side_k):
        return Pivot((j, k), np.array(side_k), 1.0)
    return Pivot((j, k), np.array(_side(mol, j, k)), -1.0)


def build_topology(mol: Chem.Mol) -> Topology:
    """Choose pivots, rotors, ring moves, recorded torsions and stereocentres for ``mol``.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Molecule with explicit hydrogens.

    Returns
    -------
    Topology
        Rotatable bonds are acyclic single bonds whose two atoms each have another heavy
        neighbour; each torsion's outer atoms are chosen by ``_heavy_neighbours``.
    """
    pivots, quads, rotors = [], [], []
    for bond in mol.GetBonds():
        if bond.GetBondType() != Chem.BondType.SINGLE or bond.IsInRing():
            continue
        a, b = bond.GetBeginAtom(), bond.GetEndAtom()
        if a.GetAtomicNum() == 1 or b.GetAtomicNum() == 1:
            continue
        heavy_a, heavy_b = _heavy_neighbours(a, b.GetIdx()), _heavy_neighbours(b, a.GetIdx())
        if heavy_a and heavy_b:
            pivots.append(_pivot(mol, a.GetIdx(), b.GetIdx()))
            quads.append((heavy_a[0].GetIdx(), a.GetIdx(), b.GetIdx(), heavy_b[0].GetIdx()))
            continue
        for root, end, heavy_end in ((a, b, heavy_b), (b, a, heavy_a)):
            hydrogens = [n.GetIdx() for n in end.GetNeighbors() if n.GetAtomicNum() == 1]
            if not heavy_end and hydrogens:
                rotors.append(Pivot((root.GetIdx(), end.GetIdx()), np.array(hydrogens), 1.0))
    rings, sites = flippable_rings(mol), []
    for move in rings:
        order = [int(i) for i in move.ring]
        if len(order) != 6:
            continue
        for pos, idx in enumerate(order):
            prev_, next_ = order[pos - 1], order[(pos + 1) % 6]
            subs = [n.GetIdx() for n in mol.GetAtomWithIdx(idx).GetNeighbors()
                    if n.GetAtomicNum() > 1 and n.GetIdx() not in (prev_, next_)]
            if len(subs) == 1:
                site_quads = np.array([(subs[0], idx, prev_, order[pos - 2]),
                                       (subs[0], idx, next_, order[(pos + 2) % 6])]
                                      + [tuple(order[(i + d) % 6] for d in range(4)) for i in range(6)])
                sites.append(RingSite(idx, subs[0], tuple(order), site_quads))
    centres = []
    for element in Chem.FindPotentialStereo(mol):
        if element.type == Chem.StereoType.Atom_Tetrahedral:
            nbrs = [n.GetIdx() for n in mol.GetAtomWithIdx(element.centeredOn).GetNeighbors()]
            centres.append([element.centeredOn, *nbrs[:3]])
    carried = [np.array([a.GetIdx()] + ([n.GetIdx() for n in a.GetNeighbors() if n.GetAtomicNum() == 1]
                                        if a.GetAtomicNum() > 1 else []))
               for a in mol.GetAtoms()]
    return Topology(pivots, np.array(quads, dtype=int).reshape(-1, 4), rotors, rings, sites,
                    np.array(centres, dtype=int).reshape(-1, 4), carried)


def dihedrals_deg(positions: np.ndarray, quads: np.ndarray) -> np.ndarray:
    """Dihedral angles in degrees, in [-180, 180], IUPAC sign (as RDKit's ``GetDihedralDeg``).

    Parameters
    ----------
    positions : numpy.ndarray, shape=(n_atoms, 3)
    quads : numpy.ndarray of int, shape=(n_quads, 4)

    Returns
    -------
    numpy.ndarray, shape=(n_quads,)
    """
    p = positions[quads]
    b0 = p[:, 0] - p[:, 1]
    b1 = p[:, 2] - p[:, 1]
    b2 = p[:, 3] - p[:, 2]
    b1 = b1 / np.linalg.norm(b1, axis=1, keepdims=True)
    v = b0 - np.sum(b0 * b1, axis=1, keepdims=True) * b1
    w = b2 - np.sum(b2 * b1, axis=1, keepdims=True) * b1
    x = np.sum(v * w, axis=1)
    y = np.sum(np.cross(b1, v) * w, axis=1)
    return np.degrees(np.arctan2(y, x))


def rotate_about_bond(positions: np.ndarray, pivot: Pivot, angle_rad: float) -> np.ndarray:
    """Return a copy with ``pivot.moving`` turned so the bond's torsions change by ``angle_rad``.

    Parameters
    ----------
    positions : numpy.ndarray, shape=(n_atoms, 3)
    pivot : Pivot
    angle_rad : float

    Returns
    -------
    numpy.ndarray, shape=(n_atoms, 3)
        Bond lengths, bond angles and all torsions about other bonds are unchanged.
    """
    j, k = pivot.axis
    origin = positions[j]
    axis = positions[k] - origin
    axis = axis / np.linalg.norm(axis)
    theta = pivot.sign * angle_rad
    v = positions[pivot.moving] - origin
    cos_t, sin_t = math.cos(theta), math.sin(theta)
    rotated = v * cos_t + np.cross(axis, v) * sin_t + np.outer(v @ axis, axis) * (1.0 - cos_t)
    out = positions.copy()
    out[pivot.moving] = origin + rotated
    return out


def chiral_signs(positions: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """Signs of the chiral volumes (n1 - c) . ((n2 - c) x (n3 - c)).

    Parameters
    ----------
    positions : numpy.ndarray, shape=(n_atoms, 3)
    centres : numpy.ndarray of int, shape=(n_centres, 4)
        Centre, then three neighbours.

    Returns
    -------
    numpy.ndarray, shape=(n_centres,)
    """
    c = positions[centres[:, 0]]
    d1, d2, d3 = (positions[centres[:, i]] - c for i in (1, 2, 3))
    return np.sign(np.sum(d1 * np.cross(d2, d3), axis=1))


def well_index(torsions_deg: np.ndarray) -> np.ndarray:
    """Well of each torsion: 0 gauche- (-120, 0], 1 gauche+ (0, 120], 2 anti (the rest).

    Parameters
    ----------
    torsions_deg : numpy.ndarray, any shape, degrees in [-180, 180]

    Returns
    -------
    numpy.ndarray of int, same shape
    """
    t = np.asarray(torsions_deg)
    return np.where((t > -120.0) & (t <= 0.0), 0, np.where((t > 0.0) & (t <= 120.0), 1, 2))


def ring_substituent_state(site_torsions_deg: np.ndarray) -> np.ndarray:
    """Axial/equatorial state of six-membered ring substituents from torsions alone.

    The ring is a chair when its six torsions alternate in sign (a boat has two near zero, a
    twist-boat two neighbours of equal sign). In a chair an equatorial substituent on C1 is anti
    to both C2-C3 and C6-C5 and an axial one gauche to both: the two gauche-butane interactions
    of an axial methyl (textbook picture, e.g. Eliel & Wilen, Stereochemistry of Organic
    Compounds, Wiley 1994). Torsions rather than the angle to a ring normal because they need no
    threshold angle and tie the state to the same wells as the chain torsions.

    Parameters
    ----------
    site_torsions_deg : numpy.ndarray, shape=(..., 8)
        Substituent-C1-C2-C3 and substituent-C1-C6-C5, then the six ring torsions in ring
        order, in degrees (``RingSite.quads``).

    Returns
    -------
    numpy.ndarray of int, shape=(...)
        0 equatorial, 1 axial, 2 other (not a chair, or mixed).
    """
    ring_signs = np.sign(site_torsions_deg[..., 2:])
    chair = np.all(ring_signs * np.roll(ring_signs, 1, axis=-1) < 0, axis=-1)
    anti = np.abs(site_torsions_deg[..., :2]) > 120.0
    return np.where(chair & anti.all(axis=-1), 0, np.where(chair & (~anti).all(axis=-1), 1, 2))


@dataclass
class MoveSettings:
    """Move probabilities (renormalized over the move types the molecule has) and step size."""

    pivot: float = 0.3
    rotor: float = 0.1
    ring: float = 0.05
    cartesian_sigma_A: float = 0.05

    def cumulative(self, topology: Topology) -> np.ndarray:
        """Cumulative probabilities of MOVE_TYPES for this molecule, shape=(4,)."""
        weights = np.array([self.pivot if topology.pivots else 0.0,
                            self.rotor if topology.rotors else 0.0,
                            self.ring if topology.rings else 0.0, 0.0])
        weights[3] = max(0.0, 1.0 - weights[:3].sum())
        return np.cumsum(weights / weights.sum())


@dataclass
class ChainResult:
    """One chain's recorded series and move statistics."""

    torsions_deg: np.ndarray  # shape=(n_records, n_torsions)
    site_states: np.ndarray  # shape=(n_records, n_sites)
    energies_kcal: np.ndarray  # shape=(n_records,)
    start_torsions_deg: np.ndarray  # shape=(n_torsions,)
    start_site_states: np.ndarray  # shape=(n_sites,)
    proposed: dict = field(default_factory=dict)
    accepted: dict = field(default_factory=dict)
    stereo_rejected: int = 0
    cartesian_sigma_A: float = 0.0
    wall_s: float = 0.0


def run_chain(positions: np.ndarray, energy_kcal, topology: Topology, kt_kcal: float, steps: int,
              burn_in: int, record_every: int, settings: MoveSettings, rng: np.random.Generator) -> ChainResult:
    """Metropolis chain from ``positions``; records every ``record_every`` steps after ``burn_in``.

    The Cartesian step is adapted in the burn-in's first half only; production uses a fixed kernel.

    Parameters
    ----------
    positions : numpy.ndarray, shape=(n_atoms, 3)
        Start, in angstrom.
    energy_kcal : callable
        ``energy_kcal(positions) -> float`` in kcal/mol.
    topology : Topology
    kt_kcal : float
        Thermal energy in kcal/mol.
    steps, burn_in, record_every : int
        Production steps, discarded steps before them, recording interval.
    settings : MoveSettings
    rng : numpy.random.Generator

    Returns
    -------
    ChainResult
    """
    t0 = time.perf_counter()
    cumulative = settings.cumulative(topology)
    sigma = settings.cartesian_sigma_A
    x = np.array(positions, dtype=float)
    u = energy_kcal(x)
    start_signs = chiral_signs(x, topology.stereo_centres)
    proposed = dict.fromkeys(MOVE_TYPES, 0)
    accepted = dict.fromkeys(MOVE_TYPES, 0)
    window = [0, 0]  # Cartesian proposals and acceptances since the last adaptation
    stereo_rejected = 0
    site_quads = np.array([s.quads for s in topology.ring_sites], dtype=int).reshape(-1, 4)
    n_sites = len(topology.ring_sites)
    records_t, records_s, records_u = [], [], []
    start_t = dihedrals_deg(x, topology.torsion_quads)
    start_s = ring_substituent_state(dihedrals_deg(x, site_quads).reshape(n_sites, 8))
    n_atoms = len(x)
    for step in range(burn_in + steps):
        if step == burn_in:
            proposed = dict.fromkeys(MOVE_TYPES, 0)
            accepted = dict.fromkeys(MOVE_TYPES, 0)
            stereo_rejected = 0
        kind = MOVE_TYPES[int(np.searchsorted(cumulative, rng.random(), side="right"))]
        if kind == "pivot":
            y = rotate_about_bond(x, topology.pivots[rng.integers(len(topology.pivots))],
                                  math.pi - 2.0 * math.pi * rng.random())
        elif kind == "rotor":
            y = rotate_about_bond(x, topology.rotors[rng.integers(len(topology.rotors))],
                                  math.pi - 2.0 * math.pi * rng.random())
        elif kind == "ring":
            y = reflect_ring(x, topology.rings[rng.integers(len(topology.rings))])
        else:
            y = x.copy()
            y[topology.carried[rng.integers(n_atoms)]] += sigma * rng.standard_normal(3)
        proposed[kind] += 1
        ok = False
        if np.array_equal(chiral_signs(y, topology.stereo_centres), start_signs):
            u_new = energy_kcal(y)
            delta = u_new - u
            ok = math.isfinite(u_new) and (delta <= 0.0 or rng.random() < math.exp(-delta / kt_kcal))
        else:
            stereo_rejected += 1
        if ok:
            x, u = y, u_new
            accepted[kind] += 1
        if kind == "cartesian" and step < burn_in // 2:
            window[0] += 1
            window[1] += ok
            if window[0] == 200:
                rate = window[1] / window[0]
                sigma *= 1.2 if rate > 0.5 else (1 / 1.2 if rate < 0.3 else 1.0)
                window = [0, 0]
        if step >= burn_in and (step - burn_in) % record_every == 0:
            records_t.append(dihedrals_deg(x, topology.torsion_quads))
            records_s.append(ring_substituent_state(dihedrals_deg(x, site_quads).reshape(n_sites, 8)))
            records_u.append(u)
    n_t = len(topology.torsion_quads)
    n_rec = len(records_u)
    return ChainResult(np.array(records_t).reshape(n_rec, n_t), np.array(records_s, dtype=int).reshape(n_rec, n_sites),
                       np.array(records_u), start_t, start_s, proposed, accepted, stereo_rejected, sigma,
                       time.perf_counter() - t0)


def state_fractions(codes: np.ndarray, n_states: int) -> np.ndarray:
    """Fraction of records in each state, per column.

    Parameters
    ----------
    codes : numpy.ndarray of int, shape=(n_records, n_columns)
    n_states : int

    Returns
    -------
    numpy.ndarray, shape=(n_columns, n_states)
    """
    return np.stack([(codes == s).mean(axis=0) for s in range(n_states)], axis=-1)


def pooled_with_spread(per_chain: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean over chains and its standard error from the between-chain spread.

    Parameters
    ----------
    per_chain : numpy.ndarray, shape=(n_chains, ...)

    Returns
    -------
    mean, standard_error : numpy.ndarray, shape=(...)
        standard_error = std(ddof=1) / sqrt(n_chains); NaN for one chain.
    """
    n = per_chain.shape[0]
    se = per_chain.std(axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.full(per_chain.shape[1:], np.nan)
    return per_chain.mean(axis=0), se


def batch_standard_error(codes: np.ndarray, n_states: int, n_batches: int = 20) -> np.ndarray:
    """Within-chain standard error of state fractions by non-overlapping batch means.

    Valid when each batch is much longer than the series' correlation time (a common-practice
    estimator; e.g. Flyvbjerg & Petersen, J. Chem. Phys. 91, 461, 1989).

    Parameters
    ----------
    codes : numpy.ndarray of int, shape=(n_records, n_columns)
    n_states : int
    n_batches : int

    Returns
    -------
    numpy.ndarray, shape=(n_columns, n_states)
    """
    batches = np.array([state_fractions(b, n_states) for b in np.array_split(codes, n_batches)])
    return batches.std(axis=0, ddof=1) / math.sqrt(n_batches)


def _transitions(codes: np.ndarray) -> list[int]:
    """Number of state changes between consecutive records, per column."""
    return (codes[1:] != codes[:-1]).sum(axis=0).astype(int).tolist()


def is_chair(positions: np.ndarray, ring: np.ndarray) -> bool:
    """Whether a six-membered ring's torsions alternate in sign (the chair; see ``ring_substituent_state``).

    Parameters
    ----------
    positions : numpy.ndarray, shape=(n_atoms, 3)
    ring : numpy.ndarray of int, shape=(6,)
        Ring atoms in ring order.
    """
    quads = np.array([[ring[(i + d) % 6] for d in range(4)] for i in range(6)])
    signs = np.sign(dihedrals_deg(positions, quads))
    return bool(np.all(signs * np.roll(signs, 1) < 0))


def starts(mol: Chem.Mol, n_chains: int, seed: int, props, topology: Topology,
           chairs_only: bool) -> tuple[list[np.ndarray], int]:
    """ETKDG embeddings, each MMFF-minimized, optionally only those whose six-rings are chairs.

    Embeds up to four times ``n_chains`` structures and keeps the first ``n_chains`` that pass.

    Returns
    -------
    positions : list of numpy.ndarray, shape=(n_atoms, 3) each, angstrom
    skipped : int
        Minimized embeddings passed over for a non-chair six-membered ring.

    Raises
    ------
    UsageError
        If too few embeddings succeed or pass.
    """
    params = AllChem.ETKDGv3()
    params.randomSeed = seed
    ids = list(AllChem.EmbedMultipleConfs(mol, numConfs=4 * n_chains, params=params))
    six_rings = [r.ring for r in topology.rings if len(r.ring) == 6]
    out, skipped = [], 0
    for cid in ids:
        ff = AllChem.MMFFGetMoleculeForceField(mol, props, confId=cid)
        ff.Minimize(maxIts=5000)
        x = np.array(ff.Positions()).reshape(-1, 3)
        if chairs_only and not all(is_chair(x, ring) for ring in six_rings):
            skipped += 1
            continue
        out.append(x)
        if len(out) == n_chains:
            return out, skipped
    raise UsageError(f"only {len(out)} of {len(ids)} ETKDG starts were usable ({skipped} not chairs) for "
                     f"{n_chains} chains; try another --seed or --start-rings any")


def summarize(chains: list[ChainResult], topology: Topology, mol: Chem.Mol) -> dict:
    """Per-chain and pooled well fractions, spreads, transitions and acceptance as a JSON-ready dict."""

    def symbols(quad):
        return "-".join(f"{mol.GetAtomWithIdx(int(i)).GetSymbol()}{int(i) + 1}" for i in quad)

    torsions = []
    per_chain = np.array([state_fractions(well_index(c.torsions_deg), 3) for c in chains])
    mean, se = pooled_with_spread(per_chain)
    batch_se = [batch_standard_error(well_index(c.torsions_deg), 3) for c in chains]
    for t, quad in enumerate(topology.torsion_quads):
        torsions.append({
            "atoms_1based": [int(i) + 1 for i in quad], "label": symbols(quad),
            "pooled": dict(zip(WELL_NAMES, mean[t].tolist())),
            "standard_error_over_chains": dict(zip(WELL_NAMES, se[t].tolist())),
            "per_chain": [dict(zip(WELL_NAMES, pc[t].tolist())) for pc in per_chain],
            "batch_standard_error_per_chain": [dict(zip(WELL_NAMES, b[t].tolist())) for b in batch_se],
            "well_changes_per_chain": [_transitions(well_index(c.torsions_deg))[t] for c in chains],
            "start_well_per_chain": [WELL_NAMES[int(well_index(c.start_torsions_deg[t]))] for c in chains],
        })
    sites = []
    if topology.ring_sites:
        per_chain_s = np.array([state_fractions(c.site_states, 3) for c in chains])
        mean_s, se_s = pooled_with_spread(per_chain_s)
        batch_se_s = [batch_standard_error(c.site_states, 3) for c in chains]
        for s, site in enumerate(topology.ring_sites):
            sites.append({
                "ring_atoms_1based": [i + 1 for i in site.ring], "atom_1based": site.atom + 1,
                "substituent_1based": site.substituent + 1,
                "torsions_1based": (site.quads + 1).tolist(),
                "definition": "chair: the six ring torsions (last six quadruples) alternate in sign; "
                              "equatorial: chair and both substituent-ring torsions (first two) "
                              "anti (|t| > 120 deg); axial: chair and both gauche; other: the rest",
                "pooled": dict(zip(RING_STATE_NAMES, mean_s[s].tolist())),
                "standard_error_over_chains": dict(zip(RING_STATE_NAMES, se_s[s].tolist())),
                "per_chain": [dict(zip(RING_STATE_NAMES, pc[s].tolist())) for pc in per_chain_s],
                "batch_standard_error_per_chain": [dict(zip(RING_STATE_NAMES, b[s].tolist())) for b in batch_se_s],
                "state_changes_per_chain": [_transitions(c.site_states)[s] for c in chains],
                "start_state_per_chain": [RING_STATE_NAMES[int(c.start_site_states[s])] for c in chains],
            })
    acceptance = [{k: (c.accepted[k] / c.proposed[k] if c.proposed[k] else None) for k in MOVE_TYPES}
                  for c in chains]
    return {
        "torsions": torsions,
        "ring_substituents": sites,
        "acceptance_per_chain": acceptance,
        "proposals_per_chain": [c.proposed for c in chains],
        "stereo_rejections_per_chain": [c.stereo_rejected for c in chains],
        "cartesian_sigma_A_per_chain": [c.cartesian_sigma_A for c in chains],
        "mean_energy_kcal_per_chain": [float(c.energies_kcal.mean()) for c in chains],
        "records_per_chain": int(len(chains[0].energies_kcal)),
        "wall_s_per_chain": [round(c.wall_s, 1) for c in chains],
    }


def resolve_molecule(spec: str, ligands: Path) -> tuple[str, str]:
    """(name, SMILES) for a name in the ligand file, else ``spec`` read as SMILES.

    Raises
    ------
    UsageError
        If ``spec`` is neither a listed name nor valid SMILES.
    """
    if ligands.is_file():
        for line in ligands.read_text().splitlines():
            parts = line.split()
            if len(parts) >= 2 and not line.startswith("#") and parts[1] == spec:
                return spec, parts[0]
    if Chem.MolFromSmiles(spec) is None:
        raise UsageError(f"SMILES_OR_NAME {spec!r} is neither a name in {ligands} nor valid SMILES")
    return spec, spec


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    """Parse and check the command line; raises UsageError naming a bad argument."""
    p = argparse.ArgumentParser(prog="python -m hopwell.bench.mmff_mc", description=__doc__.split("\n")[0])
    p.add_argument("molecule", metavar="SMILES_OR_NAME")
    p.add_argument("--steps", type=int, required=True, help="production steps per chain")
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--burn-in", type=int, default=None, help="discarded steps per chain (default steps/10)")
    p.add_argument("--record-every", type=int, default=20)
    p.add_argument("--temperature-K", type=float, default=300.0)
    p.add_argument("--start-rings", choices=("chair", "any"), default="chair",
                   help="keep only starts whose six-membered saturated rings are chairs (default)")
    p.add_argument("--variant", choices=("MMFF94", "MMFF94s"), default="MMFF94")
    p.add_argument("--pivot-prob", type=float, default=0.3)
    p.add_argument("--rotor-prob", type=float, default=0.1)
    p.add_argument("--ring-prob", type=float, default=0.05, help="0 turns the ring flip off")
    p.add_argument("--seed", type=int, default=2024)
    p.add_argument("--ligands", type=Path, default=DEFAULT_LIGANDS)
    p.add_argument("--out", type=Path, required=True)
    args = p.parse_args(argv)
    if args.burn_in is None:
        args.burn_in = args.steps // 10
    for name in ("steps", "chains", "record_every"):
        if getattr(args, name) < 1:
            raise UsageError(f"--{name.replace('_', '-')} must be at least 1; you supplied {getattr(args, name)}")
    if args.burn_in < 0:
        raise UsageError(f"--burn-in must be at least 0; you supplied {args.burn_in}")
    if args.temperature_K <= 0:
        raise UsageError(f"--temperature-K must be positive; you supplied {args.temperature_K}")
    probs = (args.pivot_prob, args.rotor_prob, args.ring_prob)
    if min(probs) < 0 or sum(probs) > 1:
        raise UsageError(f"move probabilities must be >= 0 and sum to at most 1; you supplied {probs}")
    return args


def main(args: argparse.Namespace) -> dict:
    """Run the chains, write ``args.out`` atomically, print a table; return the output dict."""
    name, smiles = resolve_molecule(args.molecule, args.ligands)
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    if not AllChem.MMFFHasAllMoleculeParams(mol):
        raise UsageError(f"RDKit has no complete {args.variant} parameters for {smiles}")
    props = AllChem.MMFFGetMoleculeProperties(mol, mmffVariant=args.variant)
    topology = build_topology(mol)
    kt = GAS_CONSTANT_KCAL_PER_MOL_K * args.temperature_K
    start_positions, skipped = starts(mol, args.chains, args.seed, props, topology, args.start_rings == "chair")
    signs = {tuple(chiral_signs(x, topology.stereo_centres)) for x in start_positions}
    if len(signs) > 1:
        raise UsageError("the ETKDG starts differ at stereocentres "
                         f"{(topology.stereo_centres[:, 0] + 1).tolist()} (1-based): specify them in the SMILES")
    # nonBondedThresh is applied to the set-up geometry; 1000 A keeps every pair for any conformer.
    ff = AllChem.MMFFGetMoleculeForceField(mol, props, nonBondedThresh=1000.0, confId=0)

    def energy_kcal(positions):
        return ff.CalcEnergy(positions.ravel().tolist())

    settings = MoveSettings(args.pivot_prob, args.rotor_prob, args.ring_prob)
    rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(args.seed).spawn(args.chains)]
    chains = []
    for c, (x0, rng) in enumerate(zip(start_positions, rngs)):
        chains.append(run_chain(x0, energy_kcal, topology, kt, args.steps, args.burn_in, args.record_every,
                                settings, rng))
        rate = (args.steps + args.burn_in) / chains[-1].wall_s
        print(f"chain {c}: {chains[-1].wall_s:.1f} s, {rate:.0f} steps/s", file=sys.stderr, flush=True)
    out = {
        "molecule": {"name": name, "smiles": smiles, "n_atoms": mol.GetNumAtoms()},
        "settings": {"force_field": args.variant, "environment": "vacuum, constant dielectric 1",
                     "temperature_K": args.temperature_K, "kT_kcal": kt, "steps_per_chain": args.steps,
                     "burn_in_per_chain": args.burn_in,
                     "start_rings": args.start_rings, "non_chair_starts_skipped": skipped,
                     "record_every": args.record_every,
                     "chains": args.chains, "seed": args.seed,
                     "move_probabilities": dict(zip(MOVE_TYPES, np.diff(settings.cumulative(topology),
                                                                        prepend=0.0).tolist())),
                     "wells_deg": {"gauche-": "(-120, 0]", "gauche+": "(0, 120]", "anti": "the rest"}},
        **summarize(chains, topology, mol),
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.NamedTemporaryFile("w", dir=args.out.parent, delete=False, suffix=".tmp") as fh:
        json.dump(out, fh, indent=1)
    os.replace(fh.name, args.out)
    rows = {t["label"]: {**t["pooled"], "se_anti": t["standard_error_over_chains"]["anti"]}
            for t in out["torsions"]}
    if rows:
        print_table(rows, "torsion", 24, 11, float_format=".4f")
    sites = {f"ring atom {s['atom_1based']}": {**s["pooled"], "se_eq": s["standard_error_over_chains"]["equatorial"]}
             for s in out["ring_substituents"]}
    if sites:
        print_table(sites, "substituent", 24, 11, float_format=".4f")
    return out


if __name__ == "__main__":
    try:
        main(parse_args())
    except UsageError as exc:
        print(f"error: {exc}", file=sys.stderr)
        sys.exit(2)
