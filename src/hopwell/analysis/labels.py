"""Torsion labels a chemist reads: the bond each state torsion turns, a letter, and well names.

Every state torsion gets a letter (A, B, C, ...; the same letters mark its bond in the report's
drawing), a short name of the bond it turns by element and kind (``C(=O)-N amide``, ``aryl-O``,
``C-C``) and its four atoms numbered from 1, as in SDF and PDB files.

Wells get the trade's names where it has them, with the numeric centre kept beside:

* amide-like bonds (:data:`hopwell.systems.builder.STIFF_BOND`) to nitrogen: ``trans`` when the
  two heavy substituents other than the C=X oxygen or sulphur lie on opposite sides of the C-N
  bond (torsion beyond 90 degrees), ``cis`` otherwise (the fixed cis/trans wells of
  :mod:`hopwell.analysis.states`);
* ester and thioester C(=X)-O bonds: ``syn`` when the O-substituent is syn-periplanar to the
  C=X atom (X=C-O-R within 90 degrees of 0, the Z ester, the preferred form of simple esters),
  ``anti`` otherwise; the usual naming of ester conformers (e.g. Wiberg & Laidig, J. Am. Chem.
  Soc. 109, 5935 (1987), from memory);
* bonds between two sp3 atoms: ``anti`` for a centre beyond 120 degrees, ``gauche+`` within
  (30, 120], ``gauche-`` within [-120, -30) and ``syn`` within 30 degrees of 0; the usual
  binning of a threefold rotor whose minima lie at +-60 and 180 degrees (IUPAC Gold Book,
  "torsion angle" and Klyne & Prelog, Experientia 16, 521 (1960), from memory).

Other wells keep their centre alone (``+90``). All functions are pure.
"""

from __future__ import annotations

from dataclasses import dataclass
from string import ascii_uppercase

from rdkit import Chem

from hopwell.systems.builder import STIFF_BOND

ATOM_NUMBERING = "atoms numbered from 1, as in SDF/PDB files"
_STIFF_KINDS = {("O", "N"): "amide", ("S", "N"): "thioamide", ("O", "O"): "ester", ("S", "O"): "thioester"}


@dataclass(frozen=True)
class TorsionLabel:
    """What a reader is told about one state torsion.

    Attributes
    ----------
    letter : str
        ``"A"``, ``"B"``, ...; marks the bond in the drawing.
    bond : str
        The bond turned, by element and kind, e.g. ``"C(=O)-N amide"``.
    atoms : tuple of int
        The torsion's four atoms, numbered from 1.
    kind : {"amide", "ester", "sp3", "other"}
        Which well names apply (see :func:`well_name`).
    flip : bool
        For amide-like bonds: the torsion's first or last atom is the C=X atom, so cis and
        trans (or syn and anti) are read from the torsion turned by 180 degrees.
    """

    letter: str
    bond: str
    atoms: tuple
    kind: str
    flip: bool = False

    @property
    def caption(self) -> str:
        """``"A: C(=O)-N amide (atoms 2-1-4-5)"``."""
        return f"{self.letter}: {self.bond} (atoms {'-'.join(str(a) for a in self.atoms)})"

    def as_dict(self) -> dict:
        """The label for summary.json."""
        return {"letter": self.letter, "bond": self.bond, "atoms_from_1": list(self.atoms),
                "well_names": self.kind}


def letter(index: int) -> str:
    """``0 -> "A"``, ..., ``25 -> "Z"``, ``26 -> "AA"``, ``27 -> "AB"``."""
    if index < 26:
        return ascii_uppercase[index]
    return letter(index // 26 - 1) + ascii_uppercase[index % 26]


def _double_partner(atom: Chem.Atom) -> str | None:
    """Symbol of the terminal O or S doubly bonded to ``atom``, if any."""
    for bond in atom.GetBonds():
        other = bond.GetOtherAtom(atom)
        if bond.GetBondType() == Chem.BondType.DOUBLE and other.GetSymbol() in ("O", "S") \
                and other.GetDegree() == 1:
            return other.GetSymbol()
    return None


def _end_name(atom: Chem.Atom) -> str:
    if atom.GetIsAromatic():
        return "aryl"
    partner = _double_partner(atom)
    return f"{atom.GetSymbol()}(={partner})" if partner else atom.GetSymbol()


def bond_label(mol: Chem.Mol, j: int, k: int) -> tuple[str, str]:
    """The bond j-k by element and kind, and which well names apply to torsions about it.

    Returns
    -------
    name : str
        e.g. ``"C(=O)-N amide"``, ``"aryl-O"``, ``"C-C"``; the decorated end (C=X, aryl) first.
    kind : {"amide", "ester", "sp3", "other"}
        ``"ester"`` for C(=X)-O bonds, ``"amide"`` for the other amide-like ones.
    """
    a, b = mol.GetAtomWithIdx(j), mol.GetAtomWithIdx(k)
    stiff = {frozenset(m[0::2]) for m in mol.GetSubstructMatches(STIFF_BOND)}
    if frozenset((j, k)) in stiff:
        carbon, other = (a, b) if _double_partner(a) and a.GetSymbol() == "C" else (b, a)
        x = _double_partner(carbon)
        kind = _STIFF_KINDS[(x, other.GetSymbol())]
        if other.GetSymbol() == "N" and any(_double_partner(n) == "O" and n.GetIdx() != carbon.GetIdx()
                                            for n in other.GetNeighbors()):
            kind = "imide"
        if kind == "amide" and any(n.GetSymbol() == "O" and n.GetDegree() > 1 for n in carbon.GetNeighbors()):
            kind = "carbamate"
        return f"{_end_name(carbon)}-{other.GetSymbol()} {kind}", ("ester" if other.GetSymbol() == "O" else "amide")
    ends = sorted((a, b), key=lambda atom: (_end_name(atom) == atom.GetSymbol(), atom.GetSymbol() != "C",
                                            atom.GetSymbol()))
    sp3 = all(atom.GetHybridization() == Chem.HybridizationType.SP3 for atom in (a, b))
    return f"{_end_name(ends[0])}-{_end_name(ends[1])}", ("sp3" if sp3 else "other")


def torsion_labels(mol: Chem.Mol, torsions, backbone: bool = False) -> list[TorsionLabel]:
    """Labels of a state model's torsions, lettered in order.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
    torsions : sequence of (atoms, period)
        0-based atom indices, as :func:`hopwell.analysis.states.state_torsions` gives.
    backbone : bool
        The torsions are a residue's phi and psi (named so; their regions name the states).
    """
    out = []
    for t, (atoms, period) in enumerate(torsions):
        i, j, k, m = (int(a) for a in atoms)
        bond, kind = bond_label(mol, j, k)
        flip = False
        if kind in ("amide", "ester"):
            # cis/trans are read between the substituents other than the C=X atom.
            flip = any(mol.GetAtomWithIdx(end).GetDegree() == 1 and mol.GetAtomWithIdx(end).GetSymbol() in "OS"
                       and mol.GetBondBetweenAtoms(end, centre).GetBondType() == Chem.BondType.DOUBLE
                       for end, centre in ((i, j), (m, k)))
        if backbone:
            bond, kind = f"{('phi', 'psi')[t]}, {bond}", "other"
        if period != 1:
            kind = "other"  # a folded torsion: its wells are not the threefold or cis/trans ones
        out.append(TorsionLabel(letter(t), bond, (i + 1, j + 1, k + 1, m + 1), kind, flip))
    return out


def _centre_text(centre_deg: float) -> str:
    value = int(round(centre_deg / 5.0) * 5)
    return "180" if abs(value) == 180 else ("0" if value == 0 else f"{value:+d}")


def well_word(label: TorsionLabel, centre_deg: float) -> str | None:
    """The trade's name of a well centred at ``centre_deg`` (degrees), or None where it has none."""
    x = (centre_deg + 180.0) % 360.0 - 180.0
    if label.kind in ("amide", "ester"):
        x = (x + 360.0) % 360.0 - 180.0 if label.flip else x
        if label.kind == "ester":  # R-C-O-R' trans is X=C-O-R' syn
            return "syn" if abs(x) > 90.0 else "anti"
        return "trans" if abs(x) > 90.0 else "cis"
    if label.kind == "sp3":
        if abs(x) > 120.0:
            return "anti"
        if abs(x) < 30.0:
            return "syn"
        return "gauche+" if x > 0 else "gauche-"
    return None


def well_name(label: TorsionLabel, centre_deg: float) -> str:
    """A well in a state name: ``"A:trans(180)"``, ``"B:gauche-(-65)"``, ``"C:+90"``."""
    word = well_word(label, centre_deg)
    number = _centre_text(centre_deg)
    return f"{label.letter}:{word}({number})" if word else f"{label.letter}:{number}"
