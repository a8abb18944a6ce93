"""Damaged molecule inputs for the input fuzzer (:mod:`hopwell.bench.fuzz`), as hypothesis strategies.

Every input starts from a valid one shipped in ``systems/``: the SMILES of
``ligands/ligands.smi``, ``demo_amide.sdf`` (two records), ``nma.mol2``, ``ace_ala_nme.pdb``
(heavy atoms) and the same peptide with the hydrogens hopwell adds. Then up to three damages
are applied in turn, the file is encoded, and byte damages come last.

File damages (SDF, MOL2, PDB): dropped, duplicated, swapped or spliced lines (from another
format); truncation; swapped fields; a coordinate made NaN, infinite, 1e30 or not a number;
two atoms at the same position; all coordinates squashed or blown up; wrong atom and bond
counts, serials and residue numbers; charges, isotopes, radicals, odd elements, atom types and
residue names; several models that disagree; records repeated up to a few MB; one very long
line; non-ASCII text; CR or CRLF line ends; empty and blank files; encodings other than UTF-8
(UTF-16, UTF-32, Latin-1, Shift-JIS, with a byte-order mark); inserted and flipped bytes.

SMILES damages: deleted, inserted, replaced and swapped characters; truncation; repeated
pieces; bracket atoms with isotopes, charges, hydrogen counts and chirality; extra fragments;
non-ASCII text and bytes that are not UTF-8; very long strings; empty and blank strings; file
suffixes on a name that is no file.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from pathlib import Path

from hypothesis import strategies as st

SYSTEMS = Path(__file__).resolve().parents[3] / "systems"
FILE_FORMATS = ("sdf", "mol2", "pdb")
FORMATS = ("smiles", *FILE_FORMATS)

POISON_NUMBERS = ("nan", "NaN", "-nan", "inf", "-inf", "1e30", "-1e30", "1e308", "99999.999",
                  "-1e5", "0", "1e-30", "x", "", "1,5", "0x1F", "--1")
ODD_ELEMENTS = ("Fe", "U", "Xx", "D", "*", "Q", "He", "Na", "Cl", "Si", "c", "0", "LP", "Du", "H")
MOL2_TYPES = ("N.4", "O.co2", "C.cat", "N.pl3", "Du", "Xx", "H", "Cl", "Fe", "S.o2", "C.ar", "O.3",
              "C.1", "LP", "N.am", "c.3")
RESIDUE_NAMES = ("UNK", "HOH", "GLY", "PRO", "NA ", "MOL", "XYZ", "ace", "LIG", "NME", "ACE", "CYX")
PDB_CHARGES = ("1+", "2-", "9+", "+1", "X ", "  ")
SMILES_ALPHABET = "CNOSPFIBrcnosp[]()=#@+-.0123456789%/\\*:$H"
# Damages that grow a file stop near this size (characters): large enough for a file nobody
# means to give, small enough to keep hundreds of cases in memory.
MAX_BYTES = 4_000_000
MAX_RECORD_CHARS = 200
FLOAT = re.compile(r"-?\d+\.\d+")
TOKEN = re.compile(r"\S+")
ELEMENT_TOKEN = re.compile(r"\b[A-Z][a-z]?\b")


@dataclass(frozen=True)
class FuzzInput:
    """One damaged input.

    Attributes
    ----------
    fmt : {"smiles", "sdf", "mol2", "pdb"}
    data : bytes
        The file's bytes, or the bytes of the SMILES argument.
    damages : tuple of str
        The damages applied to the valid input, in order (empty: the valid input itself).
    """

    fmt: str
    data: bytes
    damages: tuple[str, ...]

    def __repr__(self) -> str:
        return (f"FuzzInput({self.fmt!r}, damages={self.damages!r}, {len(self.data)} bytes,"
                f" starting {self.data[:100]!r})")


@functools.cache
def valid_inputs(fmt: str) -> tuple[str, ...]:
    """The valid inputs of one format that damages start from (text, or SMILES strings)."""
    if fmt == "smiles":
        lines = (SYSTEMS / "ligands" / "ligands.smi").read_text().splitlines()
        return tuple(line.split()[0] for line in lines if line.strip())
    if fmt == "sdf":
        return ((SYSTEMS / "demo_amide.sdf").read_text(),)
    if fmt == "mol2":
        return ((SYSTEMS / "nma.mol2").read_text(),)
    if fmt == "pdb":
        from hopwell.systems.inputs import read_input

        path = SYSTEMS / "ace_ala_nme.pdb"
        return (path.read_text(), read_input(str(path)).pdb_text)
    raise ValueError(f"fmt must be one of {', '.join(FORMATS)}; got {fmt!r}")


def fuzz_inputs(formats: tuple[str, ...] = FORMATS) -> st.SearchStrategy[FuzzInput]:
    """Damaged inputs of the given formats.

    Parameters
    ----------
    formats : tuple of str
        Any of ``"smiles"``, ``"sdf"``, ``"mol2"``, ``"pdb"``.

    Returns
    -------
    hypothesis.strategies.SearchStrategy
        Of :class:`FuzzInput`.
    """
    unknown = sorted(set(formats) - set(FORMATS))
    if unknown or not formats:
        raise ValueError(f"formats must be among {', '.join(FORMATS)}; got {formats!r}")
    for fmt in formats:  # read (and for PDB, built) here: no work inside the strategy
        valid_inputs(fmt)
    return st.sampled_from(formats).flatmap(
        lambda fmt: _damaged_smiles() if fmt == "smiles" else _damaged_file(fmt))


# ---- files -------------------------------------------------------------------------------------

def _lines(text: str) -> list[str]:
    return text.splitlines(keepends=True)


def _replace_spans(line: str, spans: list[tuple[int, int]], texts: list[str]) -> str:
    for (a, b), text in sorted(zip(spans, texts), reverse=True):
        line = line[:a] + text + line[b:]
    return line


def _record_lines(lines: list[str]) -> list[int]:
    """Lines short enough to be records (FLOAT's search is quadratic in a run of digits)."""
    return [i for i, line in enumerate(lines) if len(line) <= MAX_RECORD_CHARS]


def _atom_lines(lines: list[str]) -> list[int]:
    """Lines holding at least three decimal numbers: atom records in all three formats."""
    return [i for i in _record_lines(lines) if len(FLOAT.findall(lines[i])) >= 3]


def _drop_lines(draw, text, fmt):
    lines = _lines(text)
    if not lines:
        return text
    start = draw(st.integers(0, len(lines) - 1))
    return "".join(lines[:start] + lines[start + draw(st.integers(1, 4)):])


def _duplicate_line(draw, text, fmt):
    lines = _lines(text)
    if not lines:
        return text
    i = draw(st.integers(0, len(lines) - 1))
    return "".join(lines[:i + 1] + [lines[i]] + lines[i + 1:])


def _swap_lines(draw, text, fmt):
    lines = _lines(text)
    if len(lines) < 2:
        return text
    i, j = draw(st.lists(st.integers(0, len(lines) - 1), min_size=2, max_size=2, unique=True))
    lines[i], lines[j] = lines[j], lines[i]
    return "".join(lines)


def _truncate(draw, text, fmt):
    return text[:draw(st.integers(0, len(text)))]


def _swap_fields(draw, text, fmt):
    lines = _lines(text)
    candidates = [i for i, line in enumerate(lines) if len(TOKEN.findall(line)) >= 2]
    if not candidates:
        return text
    i = draw(st.sampled_from(candidates))
    spans = [m.span() for m in TOKEN.finditer(lines[i])]
    a, b = draw(st.lists(st.integers(0, len(spans) - 1), min_size=2, max_size=2, unique=True))
    words = [lines[i][slice(*s)] for s in spans]
    lines[i] = _replace_spans(lines[i], [spans[a], spans[b]], [words[b], words[a]])
    return "".join(lines)


def _poison_number(draw, text, fmt):
    lines = _lines(text)
    candidates = [i for i in _record_lines(lines) if FLOAT.search(lines[i])]
    if not candidates:
        return text
    i = draw(st.sampled_from(candidates))
    a, b = draw(st.sampled_from([m.span() for m in FLOAT.finditer(lines[i])]))
    lines[i] = _replace_spans(lines[i], [(a, b)], [draw(st.sampled_from(POISON_NUMBERS)).rjust(b - a)])
    return "".join(lines)


def _same_position(draw, text, fmt):
    """Copy one atom's coordinates onto another: two atoms at one place."""
    lines = _lines(text)
    atoms = _atom_lines(lines)
    if len(atoms) < 2:
        return text
    i, j = draw(st.lists(st.sampled_from(atoms), min_size=2, max_size=2, unique=True))
    source = [m.group() for m in FLOAT.finditer(lines[j])][:3]
    spans = [m.span() for m in FLOAT.finditer(lines[i])][:3]
    lines[i] = _replace_spans(lines[i], spans, [s.rjust(b - a) for s, (a, b) in zip(source, spans)])
    return "".join(lines)


def _scale_coordinates(draw, text, fmt):
    factor = draw(st.sampled_from((0.0, 1e-3, 0.2, 1e3, 1e7)))
    lines = _lines(text)
    for i in _atom_lines(lines):
        matches = list(FLOAT.finditer(lines[i]))[:3]
        texts = []
        for m in matches:
            decimals = len(m.group().split(".")[1])
            texts.append(f"{float(m.group()) * factor:.{decimals}f}".rjust(len(m.group())))
        lines[i] = _replace_spans(lines[i], [m.span() for m in matches], texts)
    return "".join(lines)


def _wrong_count(draw, text, fmt):
    """Wrong atom or bond counts (SDF, MOL2); wrong serials or residue numbers (PDB)."""
    lines = _lines(text)
    value = draw(st.sampled_from((0, 1, 2, 11, 13, 24, 26, 99, 999, -1)))
    if fmt == "sdf":
        counts = [i for i, line in enumerate(lines) if line.rstrip().endswith("V2000")]
        if not counts:
            return text
        i = draw(st.sampled_from(counts))
        start = draw(st.sampled_from((0, 3)))
        lines[i] = lines[i][:start] + f"{value:>3}"[-3:] + lines[i][start + 3:]
    elif fmt == "mol2":
        heads = [i + 2 for i, line in enumerate(lines) if line.startswith("@<TRIPOS>MOLECULE")]
        heads = [i for i in heads if i < len(lines) and TOKEN.search(lines[i])]
        if not heads:
            return text
        i = draw(st.sampled_from(heads))
        spans = [m.span() for m in TOKEN.finditer(lines[i])]
        k = draw(st.integers(0, min(1, len(spans) - 1)))
        lines[i] = _replace_spans(lines[i], [spans[k]], [str(value)])
    else:
        atoms = [i for i, line in enumerate(lines) if line.startswith(("ATOM", "HETATM"))]
        if not atoms:
            return text
        i = draw(st.sampled_from(atoms))
        a, b = draw(st.sampled_from(((6, 11), (22, 26))))
        lines[i] = lines[i][:a] + f"{value:>{b - a}}"[-(b - a):] + lines[i][b:]
    return "".join(lines)


def _charge_or_isotope(draw, text, fmt):
    lines = _lines(text)
    if fmt == "sdf":
        ends = [i for i, line in enumerate(lines) if line.startswith("M  END")]
        if not ends:
            return text
        i = draw(st.sampled_from(ends))
        kind = draw(st.sampled_from(("CHG", "ISO", "RAD")))
        value = draw(st.sampled_from((-3, -1, 1, 2, 3, 9, 0, 13, 999)))
        atom = draw(st.integers(0, 30))
        lines.insert(i, f"M  {kind}  1 {atom:>3} {value:>3}\n")
    elif fmt == "mol2":
        atoms = _atom_lines(lines)
        if not atoms:
            return text
        i = draw(st.sampled_from(atoms))
        spans = [m.span() for m in TOKEN.finditer(lines[i])]
        if len(spans) < 6:
            return text
        k = draw(st.sampled_from((5, len(spans) - 1)))
        new = draw(st.sampled_from(MOL2_TYPES if k == 5 else ("1.0", "-2.0", "nan", "1e30")))
        lines[i] = _replace_spans(lines[i], [spans[k]], [new])
    else:
        atoms = [i for i, line in enumerate(lines) if line.startswith(("ATOM", "HETATM"))]
        if not atoms:
            return text
        i = draw(st.sampled_from(atoms))
        line = lines[i].rstrip("\r\n").ljust(80)
        lines[i] = line[:78] + draw(st.sampled_from(PDB_CHARGES)) + "\n"
    return "".join(lines)


def _odd_element(draw, text, fmt):
    lines = _lines(text)
    atoms = [i for i in _atom_lines(lines) if ELEMENT_TOKEN.search(lines[i])]
    if not atoms:
        return text
    i = draw(st.sampled_from(atoms))
    span = draw(st.sampled_from([m.span() for m in ELEMENT_TOKEN.finditer(lines[i])]))
    lines[i] = _replace_spans(lines[i], [span], [draw(st.sampled_from(ODD_ELEMENTS))])
    return "".join(lines)


def _residue_name(draw, text, fmt):
    lines = _lines(text)
    atoms = [i for i, line in enumerate(lines) if line.startswith(("ATOM", "HETATM"))]
    if fmt != "pdb" or not atoms:
        return text
    name = draw(st.sampled_from(RESIDUE_NAMES))
    for i in atoms if draw(st.booleans()) else [draw(st.sampled_from(atoms))]:
        lines[i] = lines[i][:17] + name + lines[i][20:]
    return "".join(lines)


def _splice(draw, text, fmt):
    """Insert a run of lines from a valid input of another format."""
    other = _lines(draw(st.sampled_from([t for f in FILE_FORMATS if f != fmt for t in valid_inputs(f)])))
    start = draw(st.integers(0, len(other) - 1))
    piece = other[start:start + draw(st.integers(1, 20))]
    lines = _lines(text)
    at = draw(st.integers(0, len(lines)))
    return "".join(lines[:at] + piece + lines[at:])


def _models(draw, text, fmt):
    """PDB: the atoms twice, as two MODEL blocks; the second may lack an atom or hold another."""
    atoms = [line for line in _lines(text) if line.startswith(("ATOM", "HETATM", "TER"))]
    if fmt != "pdb" or len(atoms) < 2:
        return text
    second = list(atoms)
    change = draw(st.sampled_from(("same", "drop", "add")))
    k = draw(st.integers(0, len(atoms) - 1))
    if change == "drop":
        del second[k]
    elif change == "add":
        second.insert(k, atoms[k])
    return "MODEL        1\n" + "".join(atoms) + "ENDMDL\nMODEL        2\n" + "".join(second) + "ENDMDL\nEND\n"


def _repeat(draw, text, fmt):
    return text * min(draw(st.sampled_from((2, 5, 50, 500))), MAX_BYTES // max(len(text), 1))


def _long_line(draw, text, fmt):
    char = draw(st.sampled_from(("A", "9", " ", "-", ".")))
    line = char * min(draw(st.sampled_from((10**4, 10**5, 2 * 10**6))), MAX_BYTES - len(text))
    lines = _lines(text)
    at = draw(st.integers(0, len(lines)))
    return "".join(lines[:at] + [line + "\n"] + lines[at:])


def _non_ascii(draw, text, fmt):
    extra = draw(st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=6))
    at = draw(st.integers(0, len(text)))
    return text[:at] + extra + text[at:]


def _line_ends(draw, text, fmt):
    return text.replace("\n", draw(st.sampled_from(("\r\n", "\r"))))


def _blank(draw, text, fmt):
    return draw(st.sampled_from(("", " ", "\n", "\n" * 1000, "\t \n", "M  END\n", "$$$$\n")))


FILE_DAMAGES = {f.__name__.lstrip("_"): f for f in (
    _drop_lines, _duplicate_line, _swap_lines, _truncate, _swap_fields, _poison_number,
    _same_position, _scale_coordinates, _wrong_count, _charge_or_isotope, _odd_element,
    _residue_name, _splice, _models, _repeat, _long_line, _non_ascii, _line_ends, _blank,
)}
ENCODINGS = ("utf-8-sig", "utf-16", "utf-32", "latin-1", "shift_jis")


def _insert_bytes(draw, data):
    at = draw(st.integers(0, len(data)))
    return data[:at] + draw(st.binary(min_size=1, max_size=64)) + data[at:]


def _flip_byte(draw, data):
    if not data:
        return data
    at = draw(st.integers(0, len(data) - 1))
    return data[:at] + bytes([draw(st.integers(0, 255))]) + data[at + 1:]


BYTE_DAMAGES = {"insert_bytes": _insert_bytes, "flip_byte": _flip_byte}


@st.composite
def _damaged_file(draw, fmt):
    text = draw(st.sampled_from(valid_inputs(fmt)))
    names = draw(st.lists(st.sampled_from([*FILE_DAMAGES, *BYTE_DAMAGES, "encoding"]), max_size=3))
    for name in names:
        if name in FILE_DAMAGES:
            text = FILE_DAMAGES[name](draw, text, fmt)
    encodings = [draw(st.sampled_from(ENCODINGS)) for name in names if name == "encoding"]
    encoding = encodings[-1] if encodings else "utf-8"
    data = text.encode(encoding, errors="replace")
    for name in names:
        if name in BYTE_DAMAGES:
            data = BYTE_DAMAGES[name](draw, data)
    damages = tuple(f"encoding {encoding}" if n == "encoding" else n for n in names)
    return FuzzInput(fmt, data, damages)


# ---- SMILES ------------------------------------------------------------------------------------

def _smiles_position(draw, smiles, end=False):
    return draw(st.integers(0, len(smiles) - (0 if end else 1)))


def _delete_char(draw, smiles):
    if not smiles:
        return smiles
    i = _smiles_position(draw, smiles)
    return smiles[:i] + smiles[i + 1:]


def _insert_char(draw, smiles):
    i = _smiles_position(draw, smiles, end=True)
    return smiles[:i] + draw(st.sampled_from(SMILES_ALPHABET)) + smiles[i:]


def _replace_char(draw, smiles):
    if not smiles:
        return smiles
    i = _smiles_position(draw, smiles)
    return smiles[:i] + draw(st.sampled_from(SMILES_ALPHABET)) + smiles[i + 1:]


def _swap_chars(draw, smiles):
    if len(smiles) < 2:
        return smiles
    i, j = sorted(draw(st.lists(st.integers(0, len(smiles) - 1), min_size=2, max_size=2, unique=True)))
    return smiles[:i] + smiles[j] + smiles[i + 1:j] + smiles[i] + smiles[j + 1:]


def _truncate_smiles(draw, smiles):
    return smiles[:_smiles_position(draw, smiles, end=True)]


def _repeat_piece(draw, smiles):
    if not smiles:
        return smiles
    i = _smiles_position(draw, smiles)
    j = draw(st.integers(i + 1, len(smiles)))
    return smiles[:j] + smiles[i:j] * draw(st.integers(1, 4)) + smiles[j:]


def _bracket_atom(draw, smiles):
    """An organic-subset atom written as a bracket atom with isotope, chirality, H and charge."""
    atoms = [i for i, c in enumerate(smiles) if c in "CNOSPcnos"]
    if not atoms:
        return smiles
    i = draw(st.sampled_from(atoms))
    parts = [draw(st.sampled_from(options)) for options in (
        ("", "2", "13", "0", "999"), ("", "@", "@@"), ("", "H", "H2", "H4"),
        ("", "+", "-", "+2", "-3", "+9", "++"))]
    return smiles[:i] + f"[{parts[0]}{smiles[i]}{parts[1]}{parts[2]}{parts[3]}]" + smiles[i + 1:]


def _add_fragment(draw, smiles):
    return smiles + "." + draw(st.sampled_from(("[Na+]", "O", "[Cl-]", "C", "[H]", "[H+]", "*", "")))


def _non_ascii_smiles(draw, smiles):
    i = _smiles_position(draw, smiles, end=True)
    extra = draw(st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                         min_size=1, max_size=4))
    return smiles[:i] + extra + smiles[i:]


def _long_smiles(draw, smiles):
    return draw(st.sampled_from(("C" * 301, "C" * 5000, ".".join([smiles] * 20), "C(" * 500 + "C" + ")" * 500)))


def _blank_smiles(draw, smiles):
    return draw(st.sampled_from(("", " ", "\t", "\n")))


def _file_suffix(draw, smiles):
    return smiles + draw(st.sampled_from((".sdf", ".mol2", ".pdb", ".xyz", ".txt", ".")))


SMILES_DAMAGES = {f.__name__.lstrip("_"): f for f in (
    _delete_char, _insert_char, _replace_char, _swap_chars, _truncate_smiles, _repeat_piece,
    _bracket_atom, _add_fragment, _non_ascii_smiles, _long_smiles, _blank_smiles, _file_suffix,
)}


@st.composite
def _damaged_smiles(draw):
    smiles = draw(st.sampled_from(valid_inputs("smiles")))
    names = draw(st.lists(st.sampled_from([*SMILES_DAMAGES, "insert_bytes"]), max_size=3))
    for name in names:
        if name in SMILES_DAMAGES:
            smiles = SMILES_DAMAGES[name](draw, smiles)
    data = smiles.encode()
    if "insert_bytes" in names:  # an argument cannot hold NUL; any other byte may come
        at = draw(st.integers(0, len(data)))
        data = data[:at] + draw(st.binary(min_size=1, max_size=8)).replace(b"\x00", b"\xff") + data[at:]
    return FuzzInput("smiles", data, tuple(names))
