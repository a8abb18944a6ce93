"""The system builder: from the user's input to an OpenMM system, seeds and molecule facts."""

from __future__ import annotations

import io
from dataclasses import dataclass, field

import numpy as np
import openmm
from openmm import app
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolDescriptors, rdMolTransforms

from hopwell.errors import InputError
from hopwell.systems import amber, backbone, mmff, seeds
from hopwell.systems import rings as rg
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
    n_seeds : int or None
        ETKDG conformers embedded for SMILES input (before de-duplication); None: by the
        rotatable-bond count (:func:`hopwell.systems.seeds.seed_count`).
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
    n_seeds: int | None = None
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
    if options.n_seeds is not None and options.n_seeds < 1:
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
        n_embed = options.n_seeds or seeds.seed_count(len(rotatable_bonds(mol)))
        seed_mol = seeds.etkdg_seeds(mol, n_embed, variant, options.random_seed)
        if seed_mol.GetNumConformers() == 0:
            raise InputError(f"{parsed.source}: RDKit could not embed any 3D structure")
        notes.append(f"seeds from {n_embed} ETKDG conformers, {variant}-minimized")
    else:
        seed_mol = mol
    distinct = seeds.deduplicate(seed_mol)
    if mol.GetNumConformers() == 0:  # ETKDG seeds: both chairs of every saturated six-ring
        distinct, note = ring_seeds(seed_mol, distinct, variant)
        notes += [note] if note else []
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


# Twist-boat seeds more than this above the lowest seed are dropped: with the twist-boat's extra
# entropy (about 0.9 kcal/mol at 298 K for cyclohexane, from memory) that bounds its population
# near exp(-3.1 / 0.593) = 0.5%, the state model's floor. Methylcyclohexane's is 6.1 kcal/mol
# above the equatorial chair in MMFF94 (systems/ligands/README.md).
TWIST_BOAT_MARGIN_KCAL = 4.0


def _ring_code_rows(mol: Chem.Mol, rings, conf_ids) -> list[tuple]:
    """Ring state codes (:func:`hopwell.systems.rings.signature`) of the given conformers."""
    torsions = [t for ring in rings for t in ring.torsions]
    d = np.array([[rdMolTransforms.GetDihedralRad(mol.GetConformer(c), *t) for t in torsions]
                  for c in conf_ids]).reshape(len(conf_ids), len(torsions))
    return rg.signature(rings, d)


def _flipped_chair(mol: Chem.Mol, conf_id: int, ring, variant: str) -> Chem.Conformer | None:
    """The other chair of ``ring``: MMFF-minimized with its six ring torsions restrained to minus
    their values, then freely; None if any atom's handedness changed (four-neighbour atoms)."""
    work = Chem.Mol(mol)
    conf = work.GetConformer(conf_id)
    props = AllChem.MMFFGetMoleculeProperties(work, mmffVariant=variant)
    field = AllChem.MMFFGetMoleculeForceField(work, props, confId=conf_id)
    for t in ring.torsions[:6]:
        target = -rdMolTransforms.GetDihedralDeg(conf, *t)
        field.MMFFAddTorsionConstraint(*t, False, target - 5.0, target + 5.0, 100.0)
    field.Minimize(maxIts=2000)
    AllChem.MMFFGetMoleculeForceField(work, props, confId=conf_id).Minimize(maxIts=2000)

    def handedness(c):
        x = c.GetPositions()
        return [np.sign(np.linalg.det(x[[n.GetIdx() for n in a.GetNeighbors()][:3]] - x[a.GetIdx()]))
                for a in mol.GetAtoms() if a.GetDegree() == 4]
    return Chem.Conformer(conf) if handedness(conf) == handedness(mol.GetConformer(conf_id)) else None


def ring_seeds(seed_mol: Chem.Mol, distinct: Chem.Mol, variant: str) -> tuple[Chem.Mol, str | None]:
    """Seeds that hold both chairs of every saturated six-ring, twist-boats dropped when high.

    The heavy-atom RMSD merge can fold an axial chair into the equatorial one (in a large
    molecule a ring flip moves few atoms), and the embeddings may not contain both chairs. So:
    every ring state (:mod:`hopwell.systems.rings`) of the embeddings that the merge lost is
    put back (its lowest structure); each ring of the lowest seed is flipped to its other chair
    (:func:`_flipped_chair`) where no seed has that state; and seeds with a twist-boat more than
    :data:`TWIST_BOAT_MARGIN_KCAL` above the lowest seed are dropped, since walkers started there
    and darts aimed there would spend the run on a state of negligible weight.

    Parameters
    ----------
    seed_mol : rdkit.Chem.Mol
        The minimized embeddings, lowest energy first.
    distinct : rdkit.Chem.Mol
        Those kept by :func:`hopwell.systems.seeds.deduplicate`.
    variant : {"MMFF94", "MMFF94s"}

    Returns
    -------
    rdkit.Chem.Mol, str or None
        The seeds, and a note for the build summary (None if nothing changed).
    """
    rings = rg.saturated_six_rings(seed_mol)
    if not rings:
        return distinct, None
    props = AllChem.MMFFGetMoleculeProperties(seed_mol, mmffVariant=variant)

    def energy(m, c):
        return AllChem.MMFFGetMoleculeForceField(m, props, confId=c).CalcEnergy()

    confs = [Chem.Conformer(c) for c in distinct.GetConformers()]
    codes = _ring_code_rows(distinct, rings, [c.GetId() for c in distinct.GetConformers()])
    all_ids = [c.GetId() for c in seed_mol.GetConformers()]
    added, lowest = 0, energy(seed_mol, all_ids[0])
    for conf_id, code in zip(all_ids, _ring_code_rows(seed_mol, rings, all_ids)):
        high = rg.TWIST_BOAT in code and energy(seed_mol, conf_id) - lowest > TWIST_BOAT_MARGIN_KCAL
        if code not in codes and not high:
            confs.append(Chem.Conformer(seed_mol.GetConformer(conf_id)))
            codes.append(code)
            added += 1
    for r, ring in enumerate(rings):
        if codes[0][r] == rg.TWIST_BOAT:
            continue
        flipped = _flipped_chair(seed_mol, all_ids[0], ring, variant)
        if flipped is None:
            continue
        probe = Chem.Mol(seed_mol)
        probe.RemoveAllConformers()
        code = _ring_code_rows(probe, rings, [probe.AddConformer(flipped, assignId=True)])[0]
        if code not in codes and rg.TWIST_BOAT not in code:
            confs.append(flipped)
            codes.append(code)
            added += 1
    out = Chem.Mol(seed_mol)
    out.RemoveAllConformers()
    for conf in confs:
        out.AddConformer(conf, assignId=True)
    ids = [c.GetId() for c in out.GetConformers()]
    keep = [c for c, code in zip(ids, codes)
            if rg.TWIST_BOAT not in code or energy(out, c) - lowest <= TWIST_BOAT_MARGIN_KCAL]
    dropped = len(ids) - len(keep)
    final = Chem.Mol(out)
    final.RemoveAllConformers()
    for c in keep:
        final.AddConformer(Chem.Conformer(out.GetConformer(c)), assignId=True)
    if not added and not dropped:
        return final, None
    return final, (f"ring puckers: {added} seed(s) added for ring states the merge or the embeddings"
                   f" lacked, {dropped} twist-boat seed(s) dropped (over {TWIST_BOAT_MARGIN_KCAL:g}"
                   " kcal/mol above the lowest seed)")


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
