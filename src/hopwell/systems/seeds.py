"""Seed structures: ETKDG conformers for SMILES input, and de-duplication of any seed set."""

from __future__ import annotations

import numpy as np
from rdkit import Chem
from rdkit.Chem import AllChem, rdMolAlign

# Heavy-atom RMSD (Angstrom) below which two structures count as the same basin. Common practice
# in conformer ensembles is 0.5 A for drug-sized molecules.
DEDUP_RMSD_A = 0.5
# ETKDG structures embedded by default: more for flexible molecules, whose basins multiply with
# each rotatable bond (the method finds no basin it was never shown). Chosen, not measured
# against missed basins: 30 + 30 per rotatable bond, at most 300. Measured here: 300 embeddings
# of a 10-rotor ligand (VLT-308 of systems/ligands) took 21 s to embed and minimize and 4 s to
# de-duplicate, leaving 229 distinct seeds (30 embeddings: 2 s, 30 seeds); the command is in
# DEVELOPERS.md ("Seeding grows with flexibility").
SEEDS_BASE, SEEDS_PER_ROTATABLE, SEEDS_CAP = 30, 30, 300


def seed_count(n_rotatable: int) -> int:
    """ETKDG structures to embed for a molecule with ``n_rotatable`` rotatable bonds."""
    return min(SEEDS_CAP, SEEDS_BASE + SEEDS_PER_ROTATABLE * int(n_rotatable))


def etkdg_seeds(mol: Chem.Mol, n_conformers: int, variant: str, random_seed: int) -> Chem.Mol:
    """Embed ``n_conformers`` ETKDG structures and MMFF-minimize them with RDKit.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Explicit hydrogens; existing conformers are discarded.
    n_conformers : int
        How many to embed before de-duplication.
    variant : {"MMFF94", "MMFF94s"}
        The MMFF variant used for minimization (the one the run will sample).
    random_seed : int
        Makes embedding reproducible.

    Returns
    -------
    rdkit.Chem.Mol
        A copy of ``mol`` whose conformers are the minimized structures, sorted by energy.
    """
    out = Chem.Mol(mol)
    out.RemoveAllConformers()
    params = AllChem.ETKDGv3()
    params.randomSeed = random_seed
    params.enforceChirality = True
    ids = list(AllChem.EmbedMultipleConfs(out, numConfs=n_conformers, params=params))
    if not ids:
        return out
    results = AllChem.MMFFOptimizeMoleculeConfs(out, maxIters=2000, mmffVariant=variant)
    energies = np.array([e for _, e in results])
    order = np.argsort(energies, kind="stable")
    return _reorder_conformers(out, order)


def deduplicate(mol: Chem.Mol, rmsd_a: float = DEDUP_RMSD_A) -> Chem.Mol:
    """Keep the first structure of each group closer than ``rmsd_a`` in heavy-atom RMSD.

    The RMSD is minimized over rigid alignment and over the molecule's graph symmetries
    (RDKit ``GetBestRMS``), so methyl rotors and symmetric rings do not make false duplicates
    or false distinct seeds.
    """
    heavy = Chem.RemoveHs(mol)
    probe = Chem.Mol(heavy)  # GetBestRMS moves the probe's coordinates: align a copy
    ids = [c.GetId() for c in heavy.GetConformers()]
    kept: list[int] = []
    for k, conf_id in enumerate(ids):
        if all(
            rdMolAlign.GetBestRMS(probe, heavy, prbId=conf_id, refId=ids[j]) >= rmsd_a
            for j in kept
        ):
            kept.append(k)
    return _reorder_conformers(mol, np.array(kept, dtype=int))


def _reorder_conformers(mol: Chem.Mol, order: np.ndarray) -> Chem.Mol:
    confs = [Chem.Conformer(c) for c in mol.GetConformers()]
    out = Chem.Mol(mol)
    out.RemoveAllConformers()
    for k in order:
        out.AddConformer(confs[int(k)], assignId=True)
    return out
