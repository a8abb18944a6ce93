"""The molecule in 2D (RDKit rdMolDraw2D, SVG) with each state torsion's bond marked by its letter."""

from __future__ import annotations

from rdkit import Chem
from rdkit.Chem import rdDepictor
from rdkit.Chem.Draw import rdMolDraw2D

# Highlight colours cycled over the torsions (Tableau 10, lightened for a fill behind bonds).
HIGHLIGHT_RGB = ((0.99, 0.75, 0.45), (0.62, 0.79, 0.95), (0.65, 0.88, 0.62), (0.98, 0.65, 0.67),
                 (0.80, 0.71, 0.90), (0.85, 0.76, 0.65))


def molecule_svg(mol: Chem.Mol, tags, width_px: int = 420, height_px: int = 300) -> str:
    """An SVG drawing of ``mol`` without hydrogens, each torsion's central bond highlighted.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        The run's molecule (hydrogens may be explicit; atom indices as in the run).
    tags : sequence of :class:`hopwell.analysis.labels.TorsionLabel`
        Their central bonds get a coloured highlight and a note with the letter; their four
        atoms a note with the atom number (from 1).
    """
    work = Chem.Mol(mol)
    for atom in work.GetAtoms():
        atom.SetIntProp("run_index", atom.GetIdx())
    heavy = Chem.RemoveHs(work, sanitize=False)
    heavy.RemoveAllConformers()
    rdDepictor.Compute2DCoords(heavy)
    where = {a.GetIntProp("run_index"): a.GetIdx() for a in heavy.GetAtoms()}
    bonds, colours = [], {}
    for t, tag in enumerate(tags):
        _, j, k, _ = (where.get(a - 1) for a in tag.atoms)
        if j is None or k is None:
            continue  # a torsion about a bond to hydrogen has no bond in the drawing
        bond = heavy.GetBondBetweenAtoms(j, k)
        bond.SetProp("bondNote", tag.letter)
        bonds.append(bond.GetIdx())
        colours[bond.GetIdx()] = HIGHLIGHT_RGB[t % len(HIGHLIGHT_RGB)]
        for number in tag.atoms:
            if (a := where.get(number - 1)) is not None:
                heavy.GetAtomWithIdx(a).SetProp("atomNote", str(number))
    drawer = rdMolDraw2D.MolDraw2DSVG(width_px, height_px)
    options = drawer.drawOptions()
    options.annotationFontScale = 0.8
    options.clearBackground = False
    rdMolDraw2D.PrepareAndDrawMolecule(drawer, heavy, highlightAtoms=[], highlightBonds=bonds,
                                       highlightBondColors=colours)
    drawer.FinishDrawing()
    svg = drawer.GetDrawingText()
    return svg[svg.index("<svg"):]  # drop the XML declaration: the SVG goes inline in the page
