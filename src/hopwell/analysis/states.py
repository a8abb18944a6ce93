"""Conformer states: torsion wells found from the data, or peptide backbone regions.

Torsions about amide-like bonds are the exception to "found from the data": they always get a
cis and a trans well, so that a rare isomer is never folded into the common one.

All functions are pure: torsion values in, state indices out. Geometry comes from mdtraj.

Backbone regions (phi, psi in degrees; conventions vary, these are hopwell's; the code is
:func:`hopwell.systems.backbone.backbone_state`):

=========  ======================  ======================
state      phi                     psi
=========  ======================  ======================
alphaR     [-180, 0)               [-120, 0)
C7eq       [-180, 0)               [0, 120)
C5/beta    [-180, -120)            [120, 180] or < -120
PII        [-120, 0)               [120, 180] or < -120
alphaL     [0, 180)                [0, 120)
C7ax       [0, 180)                [120, 180] or < 0
=========  ======================  ======================

C7eq and C5 are the vacuum names, PII and alphaR the water names; one table serves both so
that solvent models can be compared. The C7eq/alphaR border at psi = 0 keeps the broad vacuum
C7eq basin (psi 20-100) in one state. phi > 0 holds alphaL and C7ax.
"""

from __future__ import annotations

from dataclasses import dataclass

import mdtraj as md
import numpy as np
from rdkit import Chem

from hopwell.analysis.labels import torsion_labels, well_name
from hopwell.systems import rings as rg
from hopwell.systems.backbone import BACKBONE_STATES, backbone_state
from hopwell.systems.builder import STIFF_BOND, rotatable_bonds

N_BINS = 72  # 5-degree histogram bins for the torsion marginals
SMOOTH_DEG = 15.0  # width of the wrapped Gaussian smoothing the marginals
MIN_WELL_MASS = 0.01  # wells with less pooled mass are merged into a neighbour
POPULATION_FLOOR = 0.005  # combinations below this are reported together as "other"
# Well boundaries of a torsion about a partial double bond (amide, ester: STIFF_BOND): cis
# within 90 degrees of 0, trans otherwise (common practice). Fixed, not found from the data,
# so a rare isomer keeps its own well however few samples reach it.
CIS_TRANS_EDGES_RAD = np.radians([-90.0, 90.0])


def state_torsions(mol: Chem.Mol) -> list[tuple[tuple[int, int, int, int], int]]:
    """The dihedrals the automatic states are read from, each with its period: those of
    :func:`bond_torsions`, then those naming each saturated six-ring's pucker and its axial
    and equatorial substituents (:func:`hopwell.systems.rings.ring_torsions`, period 1)."""
    return bond_torsions(mol) + [(atoms, 1) for atoms in rg.ring_torsions(mol)]


def bond_torsions(mol: Chem.Mol) -> list[tuple[tuple[int, int, int, int], int]]:
    """One heavy-atom dihedral per rotatable bond, with its symmetry period (1 or 2).

    The period is 2 when the far atom's two other heavy neighbours are symmetry-equivalent
    (a para-substituted phenyl ring, a carboxylate): the torsion is then folded onto
    [-90, 90) degrees so that equivalent orientations are one conformer.
    """
    ranks = list(Chem.CanonicalRankAtoms(mol, breakTies=False))
    out = []
    for j, k in rotatable_bonds(mol):
        ends = []
        for centre, other in ((j, k), (k, j)):
            nbrs = sorted(a.GetIdx() for a in mol.GetAtomWithIdx(centre).GetNeighbors()
                          if a.GetAtomicNum() > 1 and a.GetIdx() != other)
            ends.append(nbrs)
        period = 1
        for nbrs in ends:
            if len(nbrs) == 2 and ranks[nbrs[0]] == ranks[nbrs[1]]:
                period = 2
        out.append(((ends[0][0], j, k, ends[1][0]), period))
    return out


def cis_trans_torsions(mol: Chem.Mol, torsions) -> list[bool]:
    """Which of ``torsions`` (as from :func:`state_torsions`) get fixed cis and trans wells.

    Those about a partial double bond (:data:`hopwell.systems.builder.STIFF_BOND`) with
    period 1; with period 2 (two equivalent far substituents, as in N,N-dimethylacetamide)
    cis and trans are one conformer, and the wells are found from the data as for any torsion.
    """
    stiff = {frozenset(match[0::2]) for match in mol.GetSubstructMatches(STIFF_BOND)}
    return [period == 1 and frozenset(atoms[1:3]) in stiff for atoms, period in torsions]


def fold(torsion_rad: np.ndarray, period: int) -> np.ndarray:
    """Map a torsion onto one symmetry copy: [-pi, pi) / period."""
    span = 2 * np.pi / period
    return (np.asarray(torsion_rad) + span / 2) % span - span / 2


def well_edges(torsion_rad: np.ndarray, period: int = 1) -> np.ndarray:
    """Boundaries (rad) between wells of a torsion's pooled marginal, sorted; empty if one well.

    The marginal is histogrammed on the folded circle, smoothed with a wrapped Gaussian, and
    split at its local minima; wells holding less than ``MIN_WELL_MASS`` are merged.
    """
    x = fold(torsion_rad, period)
    span = 2 * np.pi / period
    hist, edges = np.histogram(x, bins=N_BINS, range=(-span / 2, span / 2))
    centres = 0.5 * (edges[1:] + edges[:-1])
    width_bins = np.deg2rad(SMOOTH_DEG) / (span / N_BINS) / period
    offsets = np.arange(-N_BINS // 2, N_BINS // 2)
    kernel = np.exp(-0.5 * (offsets / max(width_bins, 1e-9)) ** 2)
    smooth = np.real(np.fft.ifft(np.fft.fft(hist) * np.fft.fft(np.fft.ifftshift(kernel))))
    minima = [i for i in range(N_BINS)
              if smooth[i] < smooth[i - 1] and smooth[i] <= smooth[(i + 1) % N_BINS]]
    cuts = sorted(centres[minima])
    while len(cuts) > 1:
        labels = np.searchsorted(cuts, x) % len(cuts)
        mass = np.bincount(labels, minlength=len(cuts)) / len(x)
        smallest = int(np.argmin(mass))
        if mass[smallest] >= MIN_WELL_MASS:
            break
        cuts.pop(smallest)  # merge the light well with its lower neighbour
    return np.array(cuts if len(cuts) > 1 else [])


def assign_wells(torsion_rad: np.ndarray, edges: np.ndarray, period: int = 1) -> np.ndarray:
    """Well index of each sample given :func:`well_edges`; wraps across the circle."""
    if len(edges) == 0:
        return np.zeros(np.shape(torsion_rad), dtype=int)
    return np.searchsorted(edges, fold(torsion_rad, period)) % len(edges)


def well_label(torsion_rad: np.ndarray, period: int = 1) -> str:
    """A well's name: its circular mean in degrees, e.g. ``"+60"``, ``"180"``."""
    mean = np.degrees(np.angle(np.exp(1j * period * np.asarray(torsion_rad)).mean())) / period
    value = int(round(mean / 5.0) * 5)
    return "180" if abs(value) == 180 else ("0" if value == 0 else f"{value:+d}")


@dataclass(frozen=True)
class StateModel:
    """How samples map to named conformer states.

    Attributes
    ----------
    kind : {"backbone", "torsions"}
    names : tuple of str
    torsions : tuple of (atoms, period)
        The dihedrals used (backbone: phi and psi of each residue).
    edges : tuple of numpy.ndarray
        Well boundaries per torsion (torsion kind only).
    combos : dict
        Well-index tuple, then one ring code per ring (:func:`hopwell.systems.rings.ring_codes`)
        -> state index (torsion kind only); unlisted combinations are "other".
    rings : tuple of hopwell.systems.rings.SixRing
        Saturated six-rings; their torsions follow the ``len(edges)`` bond torsions.
    """

    kind: str
    names: tuple
    torsions: tuple
    edges: tuple = ()
    combos: dict | None = None
    rings: tuple = ()

    def assign(self, dihedrals_rad: np.ndarray) -> np.ndarray:
        """State index of each sample from its dihedrals, shape ``(n, n_torsions)``."""
        if self.kind == "backbone":
            return backbone_state(np.degrees(dihedrals_rad[:, 0]), np.degrees(dihedrals_rad[:, 1]))
        other = len(self.names) - 1
        return np.array([self.combos.get(tuple(w), other) for w in self.wells(dihedrals_rad)], dtype=int)

    def wells(self, dihedrals_rad: np.ndarray) -> np.ndarray:
        """Per sample, the well index of each bond torsion and the code of each ring,
        ``(n, n_columns)`` (torsion kind only): the finest partition the states are made of."""
        return _columns(dihedrals_rad, self.edges, self.torsions, self.rings)


def backbone_model(topology: md.Topology) -> StateModel | None:
    """The backbone-region model for a peptide with exactly one (phi, psi) pair, else None."""
    phi, _ = md.compute_phi(md.Trajectory(np.zeros((1, topology.n_atoms, 3)), topology))
    psi, _ = md.compute_psi(md.Trajectory(np.zeros((1, topology.n_atoms, 3)), topology))
    if len(phi) != 1 or len(psi) != 1:
        return None
    return StateModel("backbone", BACKBONE_STATES, ((tuple(phi[0]), 1), (tuple(psi[0]), 1)))


def _kept_combinations(wells: np.ndarray, cis_trans: list[bool]) -> list[tuple]:
    """Well combinations that become states, most populated first.

    Those holding at least ``POPULATION_FLOOR`` of the samples, and for each observed well of a
    cis/trans torsion that none of those contains, the most populated combination holding it,
    so that a rare amide isomer is reported as a state of its own rather than as "other".
    """
    combos, counts = np.unique(wells, axis=0, return_counts=True)
    order = np.argsort(-counts, kind="stable")
    combos = [tuple(int(w) for w in combos[i]) for i in order]
    keep = {c for c, n in zip(combos, counts[order]) if n / len(wells) >= POPULATION_FLOOR}
    for t in np.flatnonzero(cis_trans):
        for combo in combos:  # most populated first
            if combo[t] not in {k[t] for k in keep}:
                keep.add(combo)
    return [c for c in combos if c in keep]


def _columns(dihedrals_rad: np.ndarray, edges: tuple, torsions, rings) -> np.ndarray:
    """Per sample, the well index of each bond torsion and the code of each ring, ``(n, n_cols)``."""
    d = np.asarray(dihedrals_rad).reshape(len(dihedrals_rad), -1)
    wells = [assign_wells(d[:, t], edges[t], torsions[t][1]) for t in range(len(edges))]
    codes = np.array(rg.signature(list(rings), d[:, len(edges):]), dtype=int).reshape(len(d), len(rings))
    wells = np.stack(wells, axis=1) if wells else np.zeros((len(d), 0), dtype=int)
    return np.concatenate([wells, codes], axis=1)


def torsion_model(mol: Chem.Mol, dihedrals_rad: np.ndarray) -> StateModel:
    """Conformer states as combinations of torsion wells found in the pooled samples.

    Torsions about partial double bonds (:func:`cis_trans_torsions`) always get a cis and a
    trans well (:data:`CIS_TRANS_EDGES_RAD`), and each of their observed wells is in some state
    (:func:`_kept_combinations`); so is each observed state of a saturated six-ring (chair
    with its axial substituents, or twist-boat: :mod:`hopwell.systems.rings`), so that a
    rare axial chair is named rather than "other".

    Parameters
    ----------
    mol : rdkit.Chem.Mol
    dihedrals_rad : numpy.ndarray, shape ``(n_samples, n_torsions)``
        The samples' values of :func:`state_torsions` (same order).
    """
    torsions, rings = bond_torsions(mol), tuple(rg.saturated_six_rings(mol))
    if not torsions and not rings:
        return StateModel("torsions", ("rigid", "other"), (), (), {(): 0})
    cis_trans = cis_trans_torsions(mol, torsions)
    edges = tuple(CIS_TRANS_EDGES_RAD if fixed else well_edges(dihedrals_rad[:, t], p)
                  for t, ((_, p), fixed) in enumerate(zip(torsions, cis_trans)))
    all_torsions = tuple(torsions) + tuple((atoms, 1) for ring in rings for atoms in ring.torsions)
    wells = _columns(dihedrals_rad, edges, all_torsions, rings)
    kept = _kept_combinations(wells, cis_trans + [True] * len(rings))
    tags = torsion_labels(mol, torsions)
    names = []
    for combo in kept:  # e.g. "A:trans(180) B:gauche+(+65), ring 1 chair, C7 equatorial"
        members = np.all(wells == np.array(combo), axis=1)
        parts = [" ".join(well_name(tags[t], float(well_label(dihedrals_rad[members, t], p)))
                          for t, (_, p) in enumerate(torsions))]
        parts += [rg.ring_state_name(ring, code) for ring, code in zip(rings, combo[len(torsions):])]
        names.append(", ".join(part for part in parts if part))
    return StateModel("torsions", tuple(names) + ("other",), all_torsions, edges,
                      {c: i for i, c in enumerate(kept)}, rings)


def dihedrals(xyz_nm: np.ndarray, topology: md.Topology, model_torsions) -> np.ndarray:
    """Dihedrals (rad) of each frame for the given torsion list, shape ``(n_frames, n_torsions)``."""
    if not model_torsions:
        return np.zeros((len(xyz_nm), 0))
    traj = md.Trajectory(np.asarray(xyz_nm, dtype=np.float32), topology)
    return md.compute_dihedrals(traj, np.array([a for a, _ in model_torsions]))


def _range_mask(values_deg: np.ndarray, low: float, high: float) -> np.ndarray:
    """Whether angles lie in [low, high] on the circle (degrees; low > high wraps through 180)."""
    v = (np.asarray(values_deg) + 180.0) % 360.0 - 180.0
    low, high = (low + 180.0) % 360.0 - 180.0, (high + 180.0) % 360.0 - 180.0
    return (v >= low) & (v <= high) if low <= high else (v >= low) | (v <= high)


@dataclass(frozen=True)
class UserStates:
    """Named states from a user's TOML file, tested in order; samples matching none are "other".

    File format::

        [[state]]
        name = "open"
        combine = "all"            # "all" (and) or "any" (or) of the conditions below
        [[state.torsion]]
        atoms = [3, 4, 5, 6]       # 1-based atom numbers as in the input file
        range = [120, -120]        # degrees; a range may wrap through 180
        [[state.torsion]]
        smarts = "O=C-N-[CH2]"     # or: the first SMARTS match gives the four atoms
        range = [-30, 30]
    """

    names: tuple
    torsions: tuple  # unique ((atoms), 1) pairs, as the other models
    conditions: tuple  # per state: (combine, ((torsion index, low, high), ...))
    kind: str = "user"

    def assign(self, dihedrals_rad: np.ndarray) -> np.ndarray:
        degrees = np.degrees(dihedrals_rad)
        out = np.full(len(degrees), len(self.names) - 1)
        for s in reversed(range(len(self.conditions))):
            combine, tests = self.conditions[s]
            masks = [_range_mask(degrees[:, t], lo, hi) for t, lo, hi in tests]
            hit = np.all(masks, axis=0) if combine == "all" else np.any(masks, axis=0)
            out[hit] = s
        return out


def read_user_states(path, mol: Chem.Mol) -> UserStates:
    """Parse a states TOML file (see :class:`UserStates`); InputError on any problem."""
    import tomllib

    from hopwell.errors import InputError

    try:
        with open(path, "rb") as handle:
            data = tomllib.load(handle)
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: cannot read states file: {exc}") from None
    entries = data.get("state")
    if not isinstance(entries, list) or not entries:
        raise InputError(f"{path}: no [[state]] tables")
    torsions, conditions, names = [], [], []
    for number, entry in enumerate(entries, start=1):
        name = entry.get("name")
        combine = entry.get("combine", "all")
        tests = entry.get("torsion", [])
        if not isinstance(name, str) or not name or combine not in ("all", "any") or not tests:
            raise InputError(f"{path}: state {number} needs a name, combine = all|any and torsions")
        parsed = []
        for test in tests:
            if "atoms" in test:
                atoms = tuple(int(a) - 1 for a in test["atoms"])
                if len(atoms) != 4 or not all(0 <= a < mol.GetNumAtoms() for a in atoms):
                    raise InputError(f"{path}: state {name!r}: atoms must be 4 numbers from 1 to {mol.GetNumAtoms()}")
            elif "smarts" in test:
                pattern = Chem.MolFromSmarts(str(test["smarts"]))
                match = mol.GetSubstructMatch(pattern) if pattern is not None else ()
                if len(match) != 4:
                    raise InputError(f"{path}: state {name!r}: SMARTS {test['smarts']!r} does not match 4 atoms")
                atoms = tuple(match)
            else:
                raise InputError(f"{path}: state {name!r}: each torsion needs atoms or smarts")
            bounds = test.get("range")
            if not isinstance(bounds, list) or len(bounds) != 2:
                raise InputError(f"{path}: state {name!r}: each torsion needs range = [low, high] in degrees")
            low, high = float(bounds[0]), float(bounds[1])
            if (atoms, 1) not in torsions:
                torsions.append((atoms, 1))
            parsed.append((torsions.index((atoms, 1)), low, high))
        names.append(name)
        conditions.append((combine, tuple(parsed)))
    return UserStates(tuple(names) + ("other",), tuple(torsions), tuple(conditions))
