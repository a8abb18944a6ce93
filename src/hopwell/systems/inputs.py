"""Reading the user's molecule: SMILES, SDF/MOL, MOL2 and peptide PDB.

Each reader returns a :class:`ParsedInput`: one RDKit molecule with explicit hydrogens whose
conformers (if any) are the user's known structures, in Angstrom as RDKit keeps them. Problems
with the input raise :class:`hopwell.errors.InputError` with one line that says what is wrong.
"""

from __future__ import annotations

import io
import logging
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from rdkit import Chem, rdBase
from scipy.spatial import cKDTree

from hopwell.errors import InputError, printable
from hopwell.systems.pdb_records import check_pdb_atoms
from hopwell.systems.textfile import read_text_file

# Size limit: the MMFF port places one explicit pair term per non-bonded pair (O(N^2)) and the
# flow's Z-matrix grows with N; beyond a few hundred atoms an overnight CPU run cannot converge
# conformer populations anyway. Chosen, not measured: see the contributor guide.
MAX_ATOMS = 300
# Atoms closer than this in a given structure are called overlapping (Angstrom). The shortest
# real bond, H-H, is 0.74 Angstrom (common-practice fact).
MIN_ATOM_DISTANCE_A = 0.5
# Coordinates beyond this (Angstrom) are refused: PDB's coordinate columns end at 9999.999, and
# a molecule of MAX_ATOMS atoms spans a few hundred Angstrom at most.
MAX_COORDINATE_A = 1e4
# Bonded atoms farther apart than this (Angstrom) mean the coordinates do not fit the bonds: the
# longest common covalent bond, I-I, is 2.7 Angstrom (common-practice fact).
MAX_BOND_A = 4.0

PEPTIDE_RESIDUES = frozenset(
    "ACE NME ALA ARG ASN ASP ASH CYS CYX GLN GLU GLH GLY HIS HID HIE HIP ILE LEU LYS LYN MET "
    "PHE PRO SER THR TRP TYR VAL".split()
)


@dataclass
class ParsedInput:
    """A molecule as read from the user's input.

    Attributes
    ----------
    mol : rdkit.Chem.Mol
        Explicit hydrogens; conformers are the known structures (Angstrom), possibly none.
    kind : {"small", "peptide"}
    source : str
        What was read, for messages and summaries.
    pdb_text : str or None
        For peptides: the PDB text with hydrogens, as given to OpenMM.
    """

    mol: Chem.Mol
    kind: str
    source: str
    pdb_text: str | None = None


def read_input(
    spec: str,
    *,
    template: str | None = None,
    add_hydrogens: bool = False,
    pick_isomer: bool = False,
) -> ParsedInput:
    """Read a SMILES string or a structure file.

    Parameters
    ----------
    spec : str
        A path ending in .sdf, .mol, .mol2 or .pdb, or else a SMILES string.
    template : str, optional
        SMILES giving bond orders for a small molecule read from PDB.
    add_hydrogens : bool
        Add missing hydrogens (with coordinates) to SDF/MOL/MOL2 records instead of refusing.
    pick_isomer : bool
        For SMILES with unspecified stereocentres: pick one stereoisomer instead of refusing.

    Returns
    -------
    ParsedInput
    """
    with _rdkit_log():  # RDKit's warnings stay off stderr; those that matter become InputErrors
        parsed = _read(spec, template, add_hydrogens, pick_isomer)
        check_molecule(parsed.mol, parsed.source)
    return parsed


def _read(spec: str, template: str | None, add_hydrogens: bool, pick_isomer: bool) -> ParsedInput:
    path = Path(spec)
    suffix = path.suffix.lower()
    if suffix in {".sdf", ".mol", ".mol2", ".pdb"}:
        if not _found(path, file_only=True):
            raise InputError(f"{spec}: no such file")
        source = printable(path.name)  # also the summary's "source": printed, written as TOML
        text = read_text_file(path, source)
        if suffix == ".pdb":
            return _read_pdb(text, source, template)
        mols = _sdf_records(text) if suffix in {".sdf", ".mol"} else _mol2_records(text)
        return _combine_records(mols, source, add_hydrogens)
    if path.suffix and _found(path, file_only=False):
        raise InputError(f"{spec}: unknown file type {path.suffix!r}; use .sdf, .mol, .mol2 or .pdb")
    return _read_smiles(spec, pick_isomer)


def _found(path: Path, file_only: bool) -> bool:
    """Whether ``path`` names a file (or anything, when not ``file_only``).

    A name the system cannot look up (longer than a file name may be) names nothing.
    """
    try:
        return path.is_file() if file_only else path.exists()
    except OSError:
        return False


def check_molecule(mol: Chem.Mol, source: str) -> None:
    """Refuse molecules hopwell cannot treat: fragments, radicals, oversize, bad coordinates."""
    n_atoms = mol.GetNumAtoms()
    if n_atoms < 3:
        raise InputError(f"{source}: {n_atoms} atoms; hopwell needs at least 3")
    if n_atoms > MAX_ATOMS:
        raise InputError(f"{source}: {n_atoms} atoms exceeds the limit of {MAX_ATOMS}")
    fragments = Chem.GetMolFrags(mol)
    if len(fragments) > 1:
        raise InputError(
            f"{source}: {len(fragments)} disconnected molecules; give one molecule"
            " (strip counter-ions and solvent)"
        )
    radicals = [a.GetIdx() for a in mol.GetAtoms() if a.GetNumRadicalElectrons()]
    if radicals:
        raise InputError(f"{source}: radical at atom {radicals[0] + 1}; give a closed-shell molecule")
    bonds = np.array([(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()], dtype=int)
    for conf in mol.GetConformers():
        xyz = conf.GetPositions()
        check_coordinates(xyz, f"{source}: structure {conf.GetId() + 1}")
        if len(bonds):
            lengths = np.linalg.norm(xyz[bonds[:, 0]] - xyz[bonds[:, 1]], axis=1)
            k = int(np.argmax(lengths))
            if lengths[k] > MAX_BOND_A:
                raise InputError(
                    f"{source}: structure {conf.GetId() + 1} has bonded atoms {bonds[k, 0] + 1} and"
                    f" {bonds[k, 1] + 1} {lengths[k]:.3g} A apart; the coordinates do not fit the bonds"
                )


def check_coordinates(xyz: np.ndarray, where: str) -> None:
    """Refuse non-finite, far-out (beyond :data:`MAX_COORDINATE_A`) and overlapping atoms.

    Parameters
    ----------
    xyz : numpy.ndarray
        One structure, shape ``(n_atoms, 3)``, Angstrom.
    where : str
        Names the structure in messages.

    Raises
    ------
    InputError
    """
    if not np.all(np.isfinite(xyz)):
        atom = int(np.argmin(np.isfinite(xyz).all(axis=1)))
        raise InputError(f"{where} has non-finite coordinates at atom {atom + 1}")
    far = np.abs(xyz).max(axis=1)
    if len(xyz) and far.max() > MAX_COORDINATE_A:
        raise InputError(f"{where} has atom {int(np.argmax(far)) + 1} at a coordinate of"
                         f" {far.max():.3g} A; coordinates are in Angstrom, within +-{MAX_COORDINATE_A:g}")
    if len(xyz) < 2:
        return
    dist, nearest = cKDTree(xyz).query(xyz, k=2)  # each atom itself and its nearest other atom
    i = int(np.argmin(dist[:, 1]))
    if dist[i, 1] < MIN_ATOM_DISTANCE_A:
        j = int(nearest[i, 0] if nearest[i, 1] == i else nearest[i, 1])  # two atoms on one point
        i, j = sorted((i, j))
        raise InputError(f"{where} has atoms {i + 1} and {j + 1} {dist[i, 1]:.2f} A apart (overlapping)")


def unspecified_stereo(mol: Chem.Mol) -> list[str]:
    """Describe stereo elements (tetrahedral centres, double bonds) a molecule leaves open."""
    out = []
    for info in Chem.FindPotentialStereo(mol):
        if info.specified != Chem.StereoSpecified.Unspecified:
            continue
        if info.type == Chem.StereoType.Atom_Tetrahedral:
            out.append(f"atom {info.centeredOn + 1}")
        elif info.type == Chem.StereoType.Bond_Double:
            b = mol.GetBondWithIdx(info.centeredOn)
            out.append(f"double bond {b.GetBeginAtomIdx() + 1}-{b.GetEndAtomIdx() + 1}")
    return out


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__()
        self.messages: list[str] = []

    def emit(self, record):
        self.messages.append(record.getMessage().split("]", 1)[-1].strip())  # no timestamp


@contextmanager
def _rdkit_log():
    """Collect RDKit's log messages, instead of printing them, while the block runs.

    Yields
    ------
    list of str
        The messages, timestamps removed, filled in as they come.
    """
    logger = logging.getLogger("rdkit")
    handler = _Collect()
    rdBase.LogToPythonLogger()
    saved = (logger.handlers[:], logger.propagate)
    logger.handlers[:] = [handler]  # RDKit installs its own stderr handler: hold it aside
    logger.propagate = False
    try:
        yield handler.messages
    finally:
        logger.handlers[:], logger.propagate = saved


def _quiet_parse(fn, *args, **kwargs):
    """Run an RDKit parser with its log collected.

    Returns the result and the message that says most: the first ``ERROR:`` line (later ones
    say only that the parser moved on), else the last line, else ''.
    """
    with _rdkit_log() as messages:
        result = fn(*args, **kwargs)
    errors = [m for m in messages if m.startswith("ERROR:")]
    return result, (errors or messages[-1:] or [""])[0]


def _read_smiles(smiles: str, pick_isomer: bool) -> ParsedInput:
    if not smiles.strip() or any(c.isspace() for c in smiles.strip()):
        raise InputError(f"{smiles!r} is neither a structure file nor a SMILES string")
    odd = next((k for k, c in enumerate(smiles) if not (c.isascii() and c.isprintable())), None)
    if odd is not None:  # SMILES is printable ASCII; RDKit fails on undecodable bytes
        raise InputError(f"SMILES {smiles!r} has {smiles[odd]!a} at position {odd + 1};"
                         " a SMILES string is printable ASCII")
    mol, why = _quiet_parse(Chem.MolFromSmiles, smiles.strip())
    if mol is None:
        raise InputError(f"cannot parse SMILES {smiles!r}: {why or 'invalid'}")
    mol = Chem.AddHs(mol)
    open_stereo = unspecified_stereo(mol)
    if open_stereo:
        if not pick_isomer:
            raise InputError(
                f"SMILES leaves stereo unspecified at {', '.join(open_stereo)};"
                " write it in the SMILES or pass --pick-isomer to take one isomer"
            )
        from rdkit.Chem.EnumerateStereoisomers import (
            EnumerateStereoisomers,
            StereoEnumerationOptions,
        )

        options = StereoEnumerationOptions(onlyUnassigned=True, unique=True, tryEmbedding=False)
        mol = next(iter(EnumerateStereoisomers(mol, options=options)))
    return ParsedInput(mol=mol, kind="small", source=f"SMILES {smiles}")


def _sdf_records(text: str) -> list[tuple[Chem.Mol | None, str]]:
    supplier = Chem.SDMolSupplier()
    supplier.SetData(text, removeHs=False, sanitize=True)
    records = []
    for index in range(len(supplier)):
        mol, why = _quiet_parse(supplier.__getitem__, index)
        records.append((mol, why))
    return records


def _mol2_records(text: str) -> list[tuple[Chem.Mol | None, str]]:
    return [_mol2_record(block) for block in text.split("@<TRIPOS>MOLECULE")[1:]]


def _mol2_record(block: str) -> tuple[Chem.Mol | None, str]:
    """One MOL2 molecule (the text after ``@<TRIPOS>MOLECULE``), or None and why not.

    The atom count is checked first: RDKit reserves memory for the count it is given, and a
    count of -1 or 4e9 asked it for some 16 GB.
    """
    lines = block.split("\n")
    count = lines[2].split()[0] if len(lines) > 2 and lines[2].split() else ""
    if not (count.isascii() and count.isdigit()):
        return None, f"the counts line must begin with the number of atoms, not {count!r}"
    if not 1 <= int(count) <= MAX_ATOMS:
        return None, f"the counts line gives {int(count)} atoms; hopwell reads 1 to {MAX_ATOMS}"
    return _quiet_parse(Chem.MolFromMol2Block, "@<TRIPOS>MOLECULE" + block, removeHs=False)


def _combine_records(records, source: str, add_hydrogens: bool) -> ParsedInput:
    """Merge records of one molecule into one RDKit molecule with one conformer per record."""
    if not records:
        raise InputError(f"{source}: no molecule records found")
    combined, reference_key = None, None
    for number, (mol, why) in enumerate(records, start=1):
        if mol is None:
            raise InputError(f"{source}: record {number} cannot be read: {why or 'invalid'}")
        if mol.GetNumConformers() == 0 or not mol.GetConformer().Is3D():
            if not _has_3d_coordinates(mol):
                raise InputError(f"{source}: record {number} has no 3D coordinates")
        missing_h = sum(a.GetNumImplicitHs() for a in mol.GetAtoms())
        if missing_h:
            if not add_hydrogens:
                raise InputError(
                    f"{source}: record {number} lacks {missing_h} hydrogens;"
                    " give explicit hydrogens or pass --add-hydrogens"
                )
            mol = Chem.AddHs(mol, addCoords=True)
        Chem.AssignStereochemistryFrom3D(mol)
        key = Chem.MolToSmiles(Chem.RemoveHs(mol))
        if combined is None:
            combined, reference_key = Chem.Mol(mol), key
            continue
        if key != reference_key:
            raise InputError(
                f"{source}: record {number} is a different molecule ({key}) from record 1"
                f" ({reference_key}); give conformers of one molecule"
            )
        match = combined.GetSubstructMatch(mol, useChirality=True)
        if len(match) != mol.GetNumAtoms():
            raise InputError(f"{source}: record {number} atoms cannot be matched to record 1")
        # match[k] is the index in `combined` of atom k of `mol`: reorder coordinates.
        xyz = mol.GetConformer().GetPositions()
        conf = Chem.Conformer(combined.GetNumAtoms())
        for k, target in enumerate(match):
            conf.SetAtomPosition(target, xyz[k].tolist())
        combined.AddConformer(conf, assignId=True)
    return ParsedInput(mol=combined, kind="small", source=source)


def _has_3d_coordinates(mol: Chem.Mol) -> bool:
    if mol.GetNumConformers() == 0:
        return False
    z = mol.GetConformer().GetPositions()[:, 2]
    return bool(np.ptp(z) > 1e-6)


def _read_pdb(text: str, source: str, template: str | None) -> ParsedInput:
    residues = {line[17:20].strip() for line in text.splitlines() if line.startswith(("ATOM", "HETATM"))}
    if not residues:
        raise InputError(f"{source}: no ATOM or HETATM records")
    if residues <= PEPTIDE_RESIDUES:
        return _read_peptide(text, source)
    if template is None:
        unknown = sorted(residues - PEPTIDE_RESIDUES)
        raise InputError(
            f"{source}: residue {unknown[0]} is not a standard peptide residue;"
            " for a small molecule pass --template SMILES to give its bond orders"
        )
    from rdkit.Chem import AllChem

    mol, why = _quiet_parse(Chem.MolFromPDBBlock, text, removeHs=False)
    if mol is None:
        raise InputError(f"{source}: cannot read PDB: {why or 'invalid'}")
    ref, why = _quiet_parse(Chem.MolFromSmiles, template)
    if ref is None:
        raise InputError(f"cannot parse template SMILES {template!r}: {why or 'invalid'}")
    try:
        mol = AllChem.AssignBondOrdersFromTemplate(ref, mol)
    except ValueError as exc:
        raise InputError(f"{source}: template {template!r} does not match the PDB: {exc}") from None
    if sum(a.GetNumImplicitHs() for a in mol.GetAtoms()):
        mol = Chem.AddHs(mol, addCoords=True)
    Chem.AssignStereochemistryFrom3D(mol)
    return ParsedInput(mol=mol, kind="small", source=source)


def _read_peptide(text: str, source: str) -> ParsedInput:
    """Read a capped peptide; add hydrogens with OpenMM's Modeller when they are missing."""
    from openmm import app, unit

    from hopwell.systems.amber import amber_forcefield, amber_net_charge

    check_pdb_atoms(text, source)
    try:
        pdb = app.PDBFile(io.StringIO(text))
    except Exception as exc:  # OpenMM raises bare Exception/ValueError/KeyError on bad PDB
        raise InputError(f"{source}: cannot read PDB: {exc}") from None
    n_atoms = pdb.topology.getNumAtoms()
    if n_atoms > MAX_ATOMS:
        raise InputError(f"{source}: {n_atoms} atoms exceeds the limit of {MAX_ATOMS}")
    for frame in range(pdb.getNumFrames()):  # before hydrogens are placed from these positions
        xyz = np.asarray(pdb.getPositions(asNumpy=True, frame=frame).value_in_unit(unit.angstrom))
        check_coordinates(xyz, f"{source}: model {frame + 1}")
    modeller = app.Modeller(pdb.topology, pdb.positions)
    has_h = any(a.element is not None and a.element.symbol == "H" for a in pdb.topology.atoms())
    if not has_h:
        try:
            modeller.addHydrogens(amber_forcefield(None))
        except Exception as exc:
            raise InputError(f"{source}: cannot add hydrogens: {exc}") from None
    out = io.StringIO()
    app.PDBFile.writeFile(modeller.topology, modeller.positions, out, keepIds=True)
    pdb_text = out.getvalue()
    positions_a = np.asarray(modeller.positions.value_in_unit(unit.nanometer)) * 10
    mol = peptide_mol(modeller.topology, positions_a, amber_net_charge(modeller.topology))
    if pdb.getNumFrames() > 1:
        if not has_h:
            raise InputError(f"{source}: a multi-model PDB needs explicit hydrogens in every model")
        for frame in range(1, pdb.getNumFrames()):
            xyz = np.asarray(pdb.getPositions(frame=frame).value_in_unit(unit.nanometer)) * 10
            conf = Chem.Conformer(mol.GetNumAtoms())
            for i, row in enumerate(xyz):
                conf.SetAtomPosition(i, [float(v) for v in row])
            mol.AddConformer(conf, assignId=True)
    return ParsedInput(mol=mol, kind="peptide", source=source, pdb_text=pdb_text)


def peptide_mol(topology, positions_angstrom: np.ndarray, net_charge: int) -> Chem.Mol:
    """An RDKit molecule for a peptide topology (graph, elements, bond orders, one conformer).

    Bond orders and formal charges come from RDKit's ``DetermineBondOrders`` (the connectivity is
    OpenMM's, from its residue templates; the total charge is Amber's). hopwell uses this molecule
    for its graph (internal coordinates, stereo guards, torsions), never for the peptide's energy,
    which comes from Amber ff14SB.
    """
    from rdkit.Chem import rdDetermineBonds

    rw = Chem.RWMol()
    for atom in topology.atoms():
        rd_atom = Chem.Atom(atom.element.atomic_number)
        info = Chem.AtomPDBResidueInfo(
            atom.name, residueName=atom.residue.name, residueNumber=int(atom.residue.index) + 1
        )
        rd_atom.SetMonomerInfo(info)
        rw.AddAtom(rd_atom)
    for bond in topology.bonds():
        rw.AddBond(bond[0].index, bond[1].index, Chem.BondType.SINGLE)
    conf = Chem.Conformer(rw.GetNumAtoms())
    for i, xyz in enumerate(positions_angstrom):
        conf.SetAtomPosition(i, [float(v) for v in xyz])
    rw.AddConformer(conf, assignId=True)
    mol = rw.GetMol()
    try:
        rdDetermineBonds.DetermineBondOrders(mol, charge=net_charge)
        Chem.SanitizeMol(mol)
    except Exception as exc:  # RDKit raises its own exception types here
        raise InputError(f"peptide bond orders could not be assigned: {exc}") from None
    Chem.AssignStereochemistryFrom3D(mol)
    return mol
