"""The system builder: from the user's input to an OpenMM system, seeds and molecule facts."""

from __future__ import annotations

import io
from dataclasses import dataclass, field

import numpy as np
import openmm
from openmm import app
from rdkit import Chem
from rdkit.Chem import rdMolDescriptors

from hopwell.errors import InputError
from hopwell.systems import amber, backbone, mmff, seeds
from hopwell.systems.inputs import ParsedInput, read_input
from hopwell.systems.solvent import add_obc2

FORCEFIELDS = ("mmff94", "mmff94s", "amber14")
SOLVENTS = ("vacuum", "obc2")
DIELECTRICS = ("constant", "distance")
_MMFF_VARIANT = {"mmff94": "MMFF94", "mmff94s": "MMFF94s"}

# Bonds with partial double-bond character (amide, thioamide, ester, carbamate, urea): the
# carbonyl-type carbon's single bond to N or O. Common practice: their rotation barriers
# (roughly 15-20 kcal/mol for amides, 10-13 for esters; values from memory) make them
# two-state switches rather than free rotors.
STIFF_BOND = Chem.MolFromSmarts("[CX3](=[OX1,SX1])-[#7,#8]")


@dataclass
class BuildOptions:
    """Everything that decides the energy function and the seeds.

    Attributes
    ----------
    forcefield : {"mmff94", "mmff94s", "amber14"} or None
        None picks amber14 for peptide PDB input and mmff94 otherwise.
    solvent : {"vacuum", "obc2"}
    dielectric : {"constant", "distance"}
        MMFF electrostatics only; OBC2 needs the constant dielectric.
    n_seeds : int
        ETKDG conformers embedded for SMILES input (before de-duplication).
    template : str or None
        Bond-order SMILES for a small molecule given as PDB.
    add_hydrogens, pick_isomer : bool
        See :func:`hopwell.systems.inputs.read_input`.
    random_seed : int
        Seeds ETKDG embedding.
    backbone_seeds : bool
        Peptides: add a minimized seed in every backbone region each residue can reach
        (:func:`hopwell.systems.backbone.backbone_seeds`).
    """

    forcefield: str | None = None
    solvent: str = "vacuum"
    dielectric: str = "constant"
    n_seeds: int = 30
    template: str | None = None
    add_hydrogens: bool = False
    pick_isomer: bool = False
    random_seed: int = 2024
    backbone_seeds: bool = True


@dataclass
class MolecularSystem:
    """A molecule ready to sample.

    Attributes
    ----------
    mol : rdkit.Chem.Mol
        The molecule (explicit hydrogens); its conformers are the input structures as given.
    topology : openmm.app.Topology
    system : openmm.System
        Forces in groups by term family (see :data:`hopwell.systems.mmff.MMFF_FORCE_GROUPS`;
        Amber uses group 0; the OBC2 force group 7).
    seeds_nm : numpy.ndarray
        Distinct seed structures, shape ``(n_seeds, n_atoms, 3)``, nm.
    charges_e : numpy.ndarray
        Partial charges, shape ``(n_atoms,)``.
    kind : {"small", "peptide"}
    forcefield, solvent, dielectric, source : str
    """

    mol: Chem.Mol
    topology: app.Topology
    system: openmm.System
    seeds_nm: np.ndarray
    charges_e: np.ndarray
    kind: str
    forcefield: str
    solvent: str
    dielectric: str
    source: str
    notes: list[str] = field(default_factory=list)

    @property
    def n_atoms(self) -> int:
        return self.mol.GetNumAtoms()

    @property
    def input_positions_nm(self) -> np.ndarray:
        """The input structures as given, shape ``(n_structures, n_atoms, 3)``, nm."""
        return conformer_positions_nm(self.mol)

    def rotatable_bonds(self) -> list[tuple[int, int]]:
        """Rotatable bonds as sorted atom-index pairs; see :func:`rotatable_bonds`."""
        return rotatable_bonds(self.mol)

    def stereocentres(self) -> list[int]:
        """Indices of tetrahedral stereocentres (specified in the input)."""
        return [
            info.centeredOn
            for info in Chem.FindPotentialStereo(self.mol)
            if info.type == Chem.StereoType.Atom_Tetrahedral
        ]

    def summary(self) -> dict:
        """Facts about the system, as printed by ``hopwell build``."""
        return {
            "source": self.source,
            "kind": self.kind,
            "formula": rdMolDescriptors.CalcMolFormula(self.mol),
            "atoms": self.n_atoms,
            "heavy_atoms": self.mol.GetNumHeavyAtoms(),
            "net_charge": int(round(float(self.charges_e.sum()))),
            "forcefield": self.forcefield,
            "solvent": self.solvent,
            "dielectric": self.dielectric if self.forcefield != "amber14" else None,
            "rotatable_bonds": len(self.rotatable_bonds()),
            "stereocentres": len(self.stereocentres()),
            "seeds": int(len(self.seeds_nm)),
            "notes": list(self.notes),
        }

    def to_xml(self) -> str:
        """The OpenMM system serialized as XML."""
        return openmm.XmlSerializer.serialize(self.system)


def rotatable_bonds(mol: Chem.Mol) -> list[tuple[int, int]]:
    """Single, acyclic bonds between heavy atoms that each have another heavy neighbour.

    The common-practice definition (terminal groups such as methyl and hydroxyl do not count,
    nor bonds next to a triple bond, whose torsion is undefined), computed on the heavy-atom
    graph so that explicit hydrogens do not change it. Amide C-N bonds count: their cis/trans
    isomerism is a conformational change hopwell samples.
    """
    def heavy_degree(atom):
        return sum(1 for n in atom.GetNeighbors() if n.GetAtomicNum() > 1)

    def next_to_triple(atom):
        return any(b.GetBondType() == Chem.BondType.TRIPLE for b in atom.GetBonds())

    out = []
    for bond in mol.GetBonds():
        a, b = bond.GetBeginAtom(), bond.GetEndAtom()
        if bond.GetBondType() != Chem.BondType.SINGLE or bond.IsInRing():
            continue
        if a.GetAtomicNum() == 1 or b.GetAtomicNum() == 1:
            continue
        if heavy_degree(a) < 2 or heavy_degree(b) < 2 or next_to_triple(a) or next_to_triple(b):
            continue
        out.append(tuple(sorted((a.GetIdx(), b.GetIdx()))))
    return out


def conformer_positions_nm(mol: Chem.Mol) -> np.ndarray:
    """Conformer coordinates of an RDKit molecule in nm, shape ``(n_conformers, n_atoms, 3)``."""
    if mol.GetNumConformers() == 0:
        return np.zeros((0, mol.GetNumAtoms(), 3))
    return np.stack([c.GetPositions() for c in mol.GetConformers()]) * 0.1


def build(spec: str, options: BuildOptions | None = None) -> MolecularSystem:
    """Build a :class:`MolecularSystem` from a SMILES string or a structure file.

    Parameters
    ----------
    spec : str
        SMILES, or a path to .sdf/.mol/.mol2 (conformers of one molecule) or .pdb.
    options : BuildOptions, optional

    Returns
    -------
    MolecularSystem

    Raises
    ------
    InputError
        For any input or option hopwell cannot use.
    """
    options = options or BuildOptions()
    _check_options(options)
    parsed = read_input(
        spec,
        template=options.template,
        add_hydrogens=options.add_hydrogens,
        pick_isomer=options.pick_isomer,
    )
    forcefield = options.forcefield or ("amber14" if parsed.kind == "peptide" else "mmff94")
    if forcefield == "amber14":
        if parsed.kind != "peptide":
            raise InputError("amber14 is for peptide PDB input; use mmff94 or mmff94s")
        return _build_peptide(parsed, options)
    return _build_mmff(parsed, forcefield, options)


def _check_options(options: BuildOptions) -> None:
    if options.forcefield is not None and options.forcefield not in FORCEFIELDS:
        raise InputError(f"unknown force field {options.forcefield!r}; use one of {', '.join(FORCEFIELDS)}")
    if options.solvent not in SOLVENTS:
        raise InputError(f"unknown solvent {options.solvent!r}; use one of {', '.join(SOLVENTS)}")
    if options.dielectric not in DIELECTRICS:
        raise InputError(f"unknown dielectric {options.dielectric!r}; use constant or distance")
    if options.solvent == "obc2" and options.dielectric != "constant":
        raise InputError("OBC2 implicit water needs the constant dielectric")
    if options.n_seeds < 1:
        raise InputError(f"--seeds must be at least 1, got {options.n_seeds}")


def _small_topology(mol: Chem.Mol) -> app.Topology:
    topology = app.Topology()
    chain = topology.addChain()
    residue = topology.addResidue("MOL", chain)
    atoms = []
    counts: dict[str, int] = {}
    for atom in mol.GetAtoms():
        symbol = atom.GetSymbol()
        counts[symbol] = counts.get(symbol, 0) + 1
        element = app.Element.getByAtomicNumber(atom.GetAtomicNum())
        atoms.append(topology.addAtom(f"{symbol}{counts[symbol]}", element, residue))
    for bond in mol.GetBonds():
        topology.addBond(atoms[bond.GetBeginAtomIdx()], atoms[bond.GetEndAtomIdx()])
    return topology


def _build_mmff(parsed: ParsedInput, forcefield: str, options: BuildOptions) -> MolecularSystem:
    mol = parsed.mol
    variant = _MMFF_VARIANT[forcefield]
    props = mmff.mmff_properties(mol, variant, options.dielectric)
    system = openmm.System()
    for atom in mol.GetAtoms():
        system.addParticle(atom.GetMass())
    mmff.add_mmff_forces(system, mol, props)
    charges = mmff.mmff_charges(props, mol.GetNumAtoms())
    topology = _small_topology(mol)
    if options.solvent == "obc2":
        add_obc2(system, topology, charges)
    notes = []
    if mol.GetNumConformers() == 0:
        seed_mol = seeds.etkdg_seeds(mol, options.n_seeds, variant, options.random_seed)
        if seed_mol.GetNumConformers() == 0:
            raise InputError(f"{parsed.source}: RDKit could not embed any 3D structure")
        notes.append(f"seeds from {options.n_seeds} ETKDG conformers, {variant}-minimized")
    else:
        seed_mol = mol
    distinct = seeds.deduplicate(seed_mol)
    if distinct.GetNumConformers() < seed_mol.GetNumConformers():
        notes.append(
            f"{seed_mol.GetNumConformers() - distinct.GetNumConformers()} structures within"
            f" {seeds.DEDUP_RMSD_A} A heavy-atom RMSD of another were merged"
        )
    return MolecularSystem(
        mol=mol,
        topology=topology,
        system=system,
        seeds_nm=conformer_positions_nm(distinct),
        charges_e=charges,
        kind="small",
        forcefield=forcefield,
        solvent=options.solvent,
        dielectric=options.dielectric,
        source=parsed.source,
        notes=notes,
    )


def _build_peptide(parsed: ParsedInput, options: BuildOptions) -> MolecularSystem:
    pdb = app.PDBFile(io.StringIO(parsed.pdb_text))
    system = amber.amber_system(pdb.topology, options.solvent)
    seeds_nm, notes = conformer_positions_nm(parsed.mol), []
    if options.backbone_seeds:
        n_input = len(seeds_nm)
        seeds_nm, regions = backbone.backbone_seeds(pdb.topology, system, seeds_nm)
        if len(seeds_nm) > n_input:
            notes.append(f"{len(seeds_nm) - n_input} backbone seeds added, minimized in regions "
                         + ", ".join("/".join(r) for r in regions[n_input:]))
    return MolecularSystem(
        mol=parsed.mol,
        topology=pdb.topology,
        system=system,
        seeds_nm=seeds_nm,
        charges_e=amber.system_charges(system),
        kind="peptide",
        forcefield="amber14",
        solvent=options.solvent,
        dielectric="constant",
        source=parsed.source,
        notes=notes,
    )
