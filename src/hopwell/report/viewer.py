"""Each state's representative structure in 3D in the report page, with a still image beside it.

The structures are the files the report already wrote (``state-K.sdf`` or ``state-K.pdb``, the
lowest-energy sample of state K); they are superposed on the most populated state's heavy atoms
and shown overlaid in one 3Dmol.js viewer (one WebGL context however many states), each state's
carbons in its own colour, a checkbox per state, every hydrogen drawn (or only those on N, O and
S, or none, as the reader picks). 3Dmol.js 2.5.5 (BSD-3-Clause, ``vendor/``) is
inlined into the page, so the page needs no network. Readers without scripts or WebGL see the
same superposed structures drawn by RDKit, seen along the axis on which they spread least.
"""

from __future__ import annotations

import base64
import html
import json
import re
from importlib import resources
from pathlib import Path

import numpy as np
from rdkit import Chem
from rdkit.Chem import rdMolAlign
from rdkit.Chem.Draw import rdMolDraw2D

VIEWER_JS = "vendor/3Dmol-min.js"  # 3Dmol.js 2.5.5, unchanged; see vendor/README.md
# Carbon colours of the overlaid states (Tableau 10); N, O, S... keep 3Dmol's element colours.
STATE_COLOURS = ("#4c78a8", "#f58518", "#54a24b", "#e45756", "#72b7b2", "#b279a2", "#eeca3b",
                 "#9d755d", "#bab0ac", "#ff9da6")
HYDROGEN_COLOUR = "#c8c8c8"  # light grey: 3Dmol's white hydrogens barely show on the white page
POLAR_ELEMENTS = ("N", "O", "S")  # hydrogens on these are the "polar" ones (common practice)
SHOWN_AT_START = 4  # the most populated states are ticked when the page opens
STILL_PANELS = 8  # the still image draws at most this many states
_STATE_FILE = re.compile(r"state-(\d+)\.(sdf|pdb)")


def viewer_script() -> str:
    """The vendored 3Dmol.js source, as shipped in the package."""
    return resources.files("hopwell.report").joinpath(VIEWER_JS).read_text(encoding="utf-8")


def read_structures(paths) -> dict[int, tuple[str, Chem.Mol]]:
    """Read the report's ``state-K.sdf`` / ``state-K.pdb`` files.

    Parameters
    ----------
    paths : iterable of pathlib.Path
        Files as written by :func:`hopwell.report.exports.write_ensemble`; other names are ignored.

    Returns
    -------
    dict
        State index K -> (file format, ``"sdf"`` or ``"pdb"``; the molecule with its hydrogens).
    """
    structures = {}
    for path in paths:
        match = _STATE_FILE.fullmatch(Path(path).name)
        if match is None:
            continue
        if match[2] == "sdf":
            mol = Chem.MolFromMolFile(str(path), removeHs=False)
        else:
            mol = Chem.MolFromPDBFile(str(path), removeHs=False)
        structures[int(match[1])] = (match[2], mol)
    return structures


def superpose(mols: list[Chem.Mol]) -> list[Chem.Mol]:
    """Copies of ``mols`` superposed on the first one's heavy atoms (RDKit's rdMolAlign), then
    turned together onto the principal axes of all their heavy atoms.

    All molecules are the same molecule with the same atom order (the run's), so atom i maps to
    atom i. After the turn the states differ least along z, so a view down z (3Dmol's camera
    and the still drawing, which drops z) shows them apart.
    """
    reference = mols[0]
    heavy = [a.GetIdx() for a in reference.GetAtoms() if a.GetAtomicNum() > 1]
    placed = [Chem.Mol(reference)]
    for mol in mols[1:]:
        moved = Chem.Mol(mol)
        rdMolAlign.AlignMol(moved, placed[0], atomMap=[(i, i) for i in heavy])
        placed.append(moved)
    xyz = np.stack([m.GetConformer().GetPositions() for m in placed])  # (n_states, n_atoms, 3)
    pooled = xyz[:, heavy].reshape(-1, 3)
    centre = pooled.mean(axis=0)
    _, _, axes = np.linalg.svd(pooled - centre, full_matrices=False)
    if np.linalg.det(axes) < 0:
        axes[2] *= -1  # a rotation, not a reflection: a mirror image would change handedness
    for mol, coords in zip(placed, (xyz - centre) @ axes.T):
        conf = mol.GetConformer()
        for i, row in enumerate(coords):
            conf.SetAtomPosition(i, row.tolist())
    return placed


def nonpolar_hydrogens(mol: Chem.Mol) -> list[int]:
    """Indices (from 0, file order) of the hydrogens not bonded to N, O or S.

    The viewer hides these when the reader asks for polar hydrogens only.
    """
    return [a.GetIdx() for a in mol.GetAtoms() if a.GetAtomicNum() == 1
            and not any(n.GetSymbol() in POLAR_ELEMENTS for n in a.GetNeighbors())]


def _still_svg(mols: list[Chem.Mol], legends: list[str]) -> str:
    """The superposed structures without hydrogens, one panel each, x and y of their coordinates."""
    heavy = [Chem.RemoveHs(m, sanitize=False) for m in mols]
    for m in heavy:
        m.UpdatePropertyCache(strict=False)
    columns = min(4, len(heavy))
    rows = -(-len(heavy) // columns)
    drawer = rdMolDraw2D.MolDraw2DSVG(220 * columns, 200 * rows, 220, 200)
    drawer.drawOptions().clearBackground = False
    drawer.DrawMolecules(heavy, legends=legends)
    drawer.FinishDrawing()
    svg = drawer.GetDrawingText()
    return svg[svg.index("<svg"):]


def structure_section(structures: dict[int, tuple[str, Chem.Mol]], states: list[dict]) -> str:
    """The report's "Representative structures" heading, viewer, state checkboxes and still image.

    Parameters
    ----------
    structures : dict
        From :func:`read_structures`: state index -> (format, molecule).
    states : list of dict
        The summary's states (``name``, ``population``), indexed as the structure files are.

    Returns
    -------
    str
        HTML; empty when no state has a structure.
    """
    order = sorted(structures, key=lambda k: -states[k]["population"])
    if not order:
        return ""
    placed = superpose([structures[k][1] for k in order])
    entries = []
    for rank, (k, mol) in enumerate(zip(order, placed)):
        fmt = structures[k][0]
        text = Chem.MolToMolBlock(mol) if fmt == "sdf" else Chem.MolToPDBBlock(mol)
        entries.append({"state": states[k]["name"], "population": states[k]["population"],
                        "format": fmt, "text": text, "colour": STATE_COLOURS[rank % len(STATE_COLOURS)],
                        "shown": rank < SHOWN_AT_START, "nonpolar_h": nonpolar_hydrogens(mol)})
    legends = [f"{e['state']} ({100 * e['population']:.1f}%)" for e in entries[:STILL_PANELS]]
    still = base64.b64encode(_still_svg(placed[:STILL_PANELS], legends).encode()).decode()
    boxes = "".join(
        f'<label><input type="checkbox" data-rank="{r}"{" checked" if e["shown"] else ""}>'
        f'<span class="swatch" style="background:{e["colour"]}"></span>{html.escape(e["state"])} '
        f'({100 * e["population"]:.1f}%)</label>' for r, e in enumerate(entries))
    data = json.dumps(entries).replace("<", "\\u003c")  # no "</script>" can end the block early
    more = f" (the {STILL_PANELS} most populated)" if len(entries) > STILL_PANELS else ""
    return f"""<h2>Representative structures</h2>
<p>The lowest-energy sample of each state (the state-K files beside this page), superposed on the
heavy atoms of the most populated state; carbons coloured by state, hydrogens grey. Drag to turn,
scroll (or pinch) to zoom.</p>
<div class="structures">
<div id="structure-viewer" class="viewer" hidden></div>
<fieldset id="structure-states" hidden><legend>states shown</legend>{boxes}
<label>hydrogens <select id="structure-hydrogens"><option value="all">all</option>
<option value="polar">on N, O, S only</option><option value="none">none</option></select></label>
<p id="structure-count"></p><button type="button" id="structure-reset">reset view</button></fieldset>
<figure id="structure-still"><img id="structure-image" alt="representative structures, one panel per state" src="data:image/svg+xml;base64,{still}">
<figcaption>Still image{more}: the interactive view needs scripts and WebGL.</figcaption></figure>
</div>
<script type="application/json" id="structure-data">{data}</script>
<script>{viewer_script()}</script>
<script>{_VIEWER_START}</script>
"""


# Builds the overlay; on any failure (no WebGL) the still image stays and the error is logged once.
_VIEWER_START = """(function () {
  var entries = JSON.parse(document.getElementById("structure-data").textContent);
  var box = document.getElementById("structure-viewer");
  var ticks = document.getElementById("structure-states");
  var hydrogens = document.getElementById("structure-hydrogens");
  box.hidden = false;
  var viewer;
  try {
    // zoomTo fits the sphere around all atoms (so turning keeps them in view); without the
    // minimum lowered, 3Dmol fits at least a 5-Angstrom radius and a small molecule looks tiny.
    viewer = $3Dmol.createViewer(box, {backgroundColor: "white", minimumZoomToDistance: 1});
  } catch (err) {
    box.hidden = true;
    console.warn("3D view unavailable, showing the still image: " + err);
    return;
  }
  function paint(model, e) {
    model.setStyle({}, {stick: {radius: 0.14}});
    model.setStyle({elem: "C"}, {stick: {radius: 0.14, color: e.colour}});
    model.setStyle({elem: "H"}, {stick: {radius: 0.1, color: "HYDROGEN_COLOUR"}});
    if (hydrogens.value === "none") {
      model.setStyle({elem: "H"}, {});
    } else if (hydrogens.value === "polar" && e.nonpolar_h.length) {
      model.setStyle({index: e.nonpolar_h}, {});
    }
  }
  // keepH: 3Dmol drops the hydrogens of PDB files unless told to keep them.
  var models = entries.map(function (e) {
    var model = viewer.addModel(e.text, e.format, {keepH: true});
    paint(model, e);
    if (!e.shown) { model.hide(); }
    return model;
  });
  var atoms = models[0].selectedAtoms({}).length;
  var h = models[0].selectedAtoms({elem: "H"}).length;
  document.getElementById("structure-count").textContent =
    atoms + " atoms per structure, " + h + " of them hydrogens";
  ticks.addEventListener("change", function (event) {
    if (event.target === hydrogens) {
      models.forEach(function (model, rank) { paint(model, entries[rank]); });
    } else {
      var model = models[Number(event.target.dataset.rank)];
      if (event.target.checked) { model.show(); } else { model.hide(); }
    }
    viewer.render();
  });
  viewer.zoomTo();
  var start = viewer.getView();
  document.getElementById("structure-reset").addEventListener("click", function () {
    viewer.setView(start);
    viewer.render();
  });
  viewer.render();
  ticks.hidden = false;
  document.getElementById("structure-still").hidden = true;
})();""".replace("HYDROGEN_COLOUR", HYDROGEN_COLOUR)
