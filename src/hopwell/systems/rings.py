"""Ring states a chemist reads: chair or twist-boat, and which substituents are axial.

Per saturated six-membered ring (six ring atoms, every ring bond a non-aromatic single bond:
cyclohexane, piperidine, tetrahydropyran, morpholine, ...), from torsions alone, so that the
state model reads rings from the same dihedrals as everything else:

* **Pucker.** The six ring torsions ``w_j`` (``j = 0..5`` around the ring) are split into their
  alternating part ``A3 = |sum_j (-1)^j w_j| / 6`` (the chair mode: an ideal chair has
  ``w_j = (-1)^j w``) and their second Fourier harmonic
  ``A2 = |sum_j w_j exp(-2 pi i 2 j / 6)| / 3`` (the boat / twist-boat family: an ideal boat
  ``(0, w, -w, 0, w, -w)`` and twist-boat ``(a, a, -2a, a, a, -2a)`` are pure ``m = 2``
  modes). The ring is a **chair** when ``A3 > A2``, a **twist-boat** otherwise (boats and
  twist-boats interconvert by pseudorotation with almost no barrier, so they are one state).
  This is the torsion-space analogue of the Cremer-Pople angle ``theta`` (chair near 0 or
  180 degrees, boat family near 90; Cremer & Pople, J. Am. Chem. Soc. 97, 1354 (1975)), whose
  puckering amplitudes are, to first order, linear in the ring torsions; ``tests/test_rings.py``
  checks the two agree on RDKit-embedded rings.
* **Axial or equatorial.** In a chair, an equatorial substituent X on ring atom C1 is
  antiperiplanar to the ring bond C2-C3, an axial one gauche to it (the two gauche-butane
  interactions of an axial methyl: fact of the trade). So X is **equatorial** when
  ``|X-C1-C2-C3| > 120`` degrees and **axial** otherwise; the test checks this against the
  geometric definition (an axial bond is near-parallel to the normal of the ring's mean plane).
  In a twist-boat axial and equatorial are not defined.

A ring state is coded as one integer: ``TWIST_BOAT`` (0), or ``1 + mask`` for a chair whose
substituents ``i`` with bit ``i`` of ``mask`` set are axial. All functions are pure (RDKit
graph in, indices out; dihedrals in, codes out).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from rdkit import Chem

TWIST_BOAT = 0
EQUATORIAL_MIN_RAD = np.radians(120.0)  # |X-C1-C2-C3| beyond this: antiperiplanar, equatorial


@dataclass(frozen=True)
class SixRing:
    """One saturated six-membered ring of a molecule.

    Attributes
    ----------
    number : int
        1, 2, ... in the order RDKit lists the rings; names say "ring 1".
    atoms : tuple of int
        The six ring atoms in ring order (0-based).
    substituents : tuple of (int, int)
        ``(ring atom, heavy substituent atom)`` for every heavy neighbour of a ring atom
        outside the ring, in ring order.
    symbols : tuple of str
        Element symbol of each substituent atom, for names.
    """

    number: int
    atoms: tuple
    substituents: tuple
    symbols: tuple

    @property
    def torsions(self) -> tuple:
        """The dihedrals a ring state is read from, 0-based atoms: the six ring torsions
        ``(r_j, r_j+1, r_j+2, r_j+3)``, then per substituent ``(X, r_i, r_i+1, r_i+2)``."""
        r = self.atoms
        ring = tuple(tuple(r[(j + d) % 6] for d in range(4)) for j in range(6))
        subs = []
        for centre, x in self.substituents:
            i = r.index(centre)
            subs.append((x, r[i], r[(i + 1) % 6], r[(i + 2) % 6]))
        return ring + tuple(subs)

    @property
    def n_torsions(self) -> int:
        return 6 + len(self.substituents)

    def substituent_name(self, index: int) -> str:
        """``"C1"``: the substituent's element and atom number from 1, as in SDF/PDB files."""
        return f"{self.symbols[index]}{self.substituents[index][1] + 1}"


def _ordered(mol: Chem.Mol, ring: tuple) -> tuple:
    """The ring's atoms in bonded order, starting from the lowest index."""
    members, path = set(ring), [min(ring)]
    while len(path) < len(ring):
        nxt = sorted(n.GetIdx() for n in mol.GetAtomWithIdx(path[-1]).GetNeighbors()
                     if n.GetIdx() in members and n.GetIdx() not in path)
        path.append(nxt[0])
    return tuple(path)


def saturated_six_rings(mol: Chem.Mol) -> list[SixRing]:
    """The saturated six-membered rings of ``mol`` (see the module docstring).

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        With or without explicit hydrogens (hydrogens are never substituents here).
    """
    out = []
    for ring in mol.GetRingInfo().AtomRings():
        if len(ring) != 6:
            continue
        atoms = _ordered(mol, ring)
        bonds = [mol.GetBondBetweenAtoms(atoms[j], atoms[(j + 1) % 6]) for j in range(6)]
        if any(b.GetBondType() != Chem.BondType.SINGLE or b.GetIsAromatic() for b in bonds):
            continue
        subs = tuple((a, n.GetIdx()) for a in atoms for n in mol.GetAtomWithIdx(a).GetNeighbors()
                     if n.GetAtomicNum() > 1 and n.GetIdx() not in atoms)
        out.append(SixRing(len(out) + 1, atoms, subs,
                           tuple(mol.GetAtomWithIdx(x).GetSymbol() for _, x in subs)))
    return out


def ring_torsions(mol: Chem.Mol) -> list[tuple]:
    """Every ring's :attr:`SixRing.torsions`, ring after ring (0-based atoms)."""
    return [t for ring in saturated_six_rings(mol) for t in ring.torsions]


def pucker_amplitudes(ring_torsions_rad: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Chair and boat-family amplitudes ``(A3, A2)`` (rad) of ring torsions ``(n, 6)``."""
    w = np.asarray(ring_torsions_rad, dtype=float)
    j = np.arange(6)
    a3 = np.abs(w @ ((-1.0) ** j)) / 6.0
    a2 = np.abs(w @ np.exp(-2j * np.pi * 2 * j / 6)) / 3.0
    return a3, a2


def is_chair(ring_torsions_rad: np.ndarray) -> np.ndarray:
    """Whether each ring (torsions ``(n, 6)``, rad) is a chair, shape ``(n,)``."""
    a3, a2 = pucker_amplitudes(ring_torsions_rad)
    return a3 > a2


def ring_codes(ring: SixRing, dihedrals_rad: np.ndarray) -> np.ndarray:
    """Ring state code of each sample (see the module docstring), shape ``(n,)``.

    Parameters
    ----------
    ring : SixRing
    dihedrals_rad : numpy.ndarray, shape ``(n, ring.n_torsions)``
        The values of :attr:`SixRing.torsions`, same order.
    """
    d = np.asarray(dihedrals_rad, dtype=float).reshape(-1, ring.n_torsions)
    chair = is_chair(d[:, :6])
    axial = np.abs(np.remainder(d[:, 6:] + np.pi, 2 * np.pi) - np.pi) <= EQUATORIAL_MIN_RAD
    mask = (axial * (1 << np.arange(axial.shape[1]))).sum(axis=1) if axial.shape[1] else 0
    return np.where(chair, 1 + mask, TWIST_BOAT).astype(int)


def ring_state_name(ring: SixRing, code: int) -> str:
    """``"ring 1 chair, C1 equatorial"``, ``"ring 2 chair, C3 axial, N9 equatorial"``,
    ``"ring 1 twist-boat"``."""
    if code == TWIST_BOAT:
        return f"ring {ring.number} twist-boat"
    mask = code - 1
    words = [f"{ring.substituent_name(i)} {'axial' if mask >> i & 1 else 'equatorial'}"
             for i in range(len(ring.substituents))]
    return ", ".join([f"ring {ring.number} chair"] + words)


def signature(rings: list[SixRing], dihedrals_rad: np.ndarray) -> list[tuple]:
    """Per sample, the tuple of its rings' codes; columns are the rings' torsions in turn."""
    d = np.asarray(dihedrals_rad, dtype=float)
    codes, start = [], 0
    for ring in rings:
        codes.append(ring_codes(ring, d[:, start:start + ring.n_torsions]))
        start += ring.n_torsions
    return [tuple(int(c[k]) for c in codes) for k in range(len(d))]
