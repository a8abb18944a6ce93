"""The report page (self-contained HTML) and the terminal table."""

from __future__ import annotations

import base64
import html

from hopwell.report.drawing import molecule_svg
from hopwell.report.plots import (
    acceptance_plot,
    population_plot,
    running_plot,
    torsion_plot,
)
from hopwell.report.viewer import structure_section


def _acceptance_section(summary: dict) -> str:
    """The acceptance-over-time heading and plot; empty for runs without flow moves."""
    windows = summary["acceptance_over_time"]
    if not windows:
        return ""
    return f"""<h2>Acceptance over time</h2>
<p>Flow moves per window of cycles; one-torsion moves and seed darts are not recorded per
cycle, and single flow proposals only in production.</p>
<p><img id="acceptance-plot" alt="flow acceptance" src="data:image/png;base64,{acceptance_plot(windows)}"></p>
"""


def _torsion_section(summary: dict) -> str:
    """The molecule drawn with each state torsion's bond lettered, and the key to the letters."""
    tags = summary["_torsion_labels"]
    # As an image (data URI): the SVG's namespace URL would otherwise sit in the page's text.
    svg = base64.b64encode(molecule_svg(summary["_molecule"], tags).encode()).decode()
    rows = "".join(f"<tr><td>{html.escape(t.letter)}</td><td>{html.escape(t.bond)}</td>"
                   f"<td>{'-'.join(str(a) for a in t.atoms)}</td></tr>" for t in tags)
    return f"""<h2>State torsions</h2>
<p><img id="molecule-drawing" alt="molecule with the state torsions lettered" src="data:image/svg+xml;base64,{svg}"></p>
{_scroll(f'<table id="torsion-key"><tr><th>letter</th><th>bond</th><th>atoms (from 1, as in the SDF/PDB)</th></tr>{rows}</table>')}
"""


# Fits a 1280-pixel window and a phone: images shrink to the column, tables scroll in their box,
# plots and the structure viewer wrap onto the next line when the window is narrow; the viewer
# keeps a 4:3 box at any width, and a phone gets tighter padding.
_STYLE = """body{font-family:sans-serif;max-width:1200px;margin:1em auto;padding:0 12px;color:#222;
overflow-wrap:anywhere}img{max-width:100%;height:auto}[hidden]{display:none!important}
.scroll{overflow-x:auto;max-width:100%}table{border-collapse:collapse}
td,th{border:1px solid #ccc;padding:4px 10px;text-align:right;overflow-wrap:normal}td{white-space:nowrap}
td:first-child,th:first-child{text-align:left}.verdict{font-size:1.4em}
.plots,.structures{display:flex;flex-wrap:wrap;gap:1em;align-items:flex-start}
.plots p,figure{margin:0}.structures>*{min-width:0;max-width:100%}
.viewer{position:relative;overflow:hidden;width:min(100%,560px);aspect-ratio:4/3;border:1px solid #ccc}
fieldset{margin:0}fieldset label{display:block;margin:2px 0}.swatch{display:inline-block;width:.9em;height:.9em;margin:0 .4em}
@media (max-width:600px){body{padding:0 8px;font-size:15px}td,th{padding:3px 6px}h1{font-size:1.6em}}"""


def pose_text(pose: dict) -> str:
    """One sentence on the pose: its population with interval and its conformational cost."""
    def cost(x):
        return "unbounded" if x is None else f"{x:.1f}"

    held = ", ".join(pose["states"]) or "no state of this run"
    low, high = pose["dG_ci95_kJ_per_mol"]
    return (f"pose {pose['file']}: {100 * pose['population']:.2f}% of the ensemble lies in its torsion wells"
            f" (95% {100 * pose['ci95'][0]:.2f}-{100 * pose['ci95'][1]:.2f}%; state {held}); cost of holding"
            f" it there -kT ln p = {cost(pose['dG_kJ_per_mol'])} kJ/mol (95% {cost(low)} to {cost(high)})")


def _pose_section(summary: dict) -> str:
    """The pose's population and cost (``report --pose``); empty without a pose."""
    if "pose" not in summary:
        return ""
    return f'<h2>Pose</h2>\n<p id="pose">{html.escape(pose_text(summary["pose"]))}</p>\n'


def _kj(value: float) -> str:
    """An energy to two decimals, without the "-0.00" that rounding a tiny negative gives."""
    return "0.00" if round(value, 2) == 0 else f"{value:.2f}"


def _scroll(table: str) -> str:
    """A table in a box that scrolls sideways on its own when it is wider than the window."""
    return f'<div class="scroll">{table}</div>'


def html_page(summary: dict, structures: dict | None = None) -> str:
    """The report page: verdict and populations first, then the molecule, structures and plots.

    Parameters
    ----------
    summary : dict
        From :func:`hopwell.analysis.summary.analyse`.
    structures : dict, optional
        State index -> (format, molecule), as read by :func:`hopwell.report.viewer.read_structures`
        from the state files the report wrote; without it the page has no structure viewer.
    """
    verdict = summary["verdict"]
    colour = "#2e7d32" if verdict == "converged" else "#c62828"
    reasons = "".join(f"<li>{html.escape(r)}</li>" for r in summary["reasons"])
    reasons += "".join(f"<li>warning: {html.escape(w)}</li>" for w in summary["warnings"])
    rows = "".join(
        f"<tr><td>{html.escape(s['name'])}</td><td>{100 * s['population']:.1f}</td>"
        f"<td>{100 * s['ci95'][0]:.1f} - {100 * s['ci95'][1]:.1f}</td>"
        f"<td>{100 * s['ci95_all_states'][0]:.1f} - {100 * s['ci95_all_states'][1]:.1f}</td>"
        f"<td>{_kj(s['dG_kJ_per_mol'])}</td><td>{_kj(s['dG_ci95'][0])} - {_kj(s['dG_ci95'][1])}</td></tr>"
        for s in summary["states"]
    )
    acceptance = summary["flow_acceptance_production"]
    populations = f"""<table id="populations"><tr><th>state</th><th>population (%)</th><th>95% interval (%)</th>
<th title="intervals that hold every state's population at once with 95% probability">95%, all states at once (%)</th>
<th>dG (kJ/mol) vs {html.escape(summary['dG_reference'])}</th><th>dG 95% interval</th></tr>{rows}</table>"""
    walker_rows = "".join(f"<tr><td>{w}</td>" + "".join(f"<td>{100 * p:.1f}</td>" for p in row) + f"<td>{t}</td></tr>"
                          for w, (row, t) in enumerate(zip(summary["per_walker_populations"],
                                                           summary["transitions_per_walker"])))
    heads = "".join(f"<th>{html.escape(s['name'])} (%)</th>" for s in summary["states"])
    walkers = f'<table id="walkers"><tr><th>walker</th>{heads}<th>transitions</th></tr>\n{walker_rows}\n</table>'
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>hopwell report</title>
<style>{_STYLE}.verdict{{color:{colour}}}</style>
</head><body>
<h1>Conformer populations</h1>
<p class="verdict" id="verdict">Verdict: {html.escape(verdict)}</p>
<ul>{reasons}</ul>
<p>{summary['temperature_K']:.1f} K; {summary['samples']} production samples from {summary['walkers']}
walker(s); effective samples {summary['effective_samples']:.0f}; {summary['transitions']} transitions;
flow acceptance {"-" if acceptance is None else f"{100 * acceptance:.1f}%"}; over the whole run:
{", ".join(f"{k.replace('_', ' ')} {100 * v:.1f}%" for k, v in summary["move_acceptance"].items()
           if isinstance(v, float)) or "-"}.</p>
{_scroll(populations)}
{_pose_section(summary)}{"".join(f"<p>{html.escape(k)}: {v['mean']:.2f} (95% {v['ci95_low']:.2f} - {v['ci95_high']:.2f})</p>"
         for k, v in summary.get("observables", {}).items())}
{_torsion_section(summary)}{structure_section(structures or {}, summary["states"])}<h2>Walkers</h2>
{_scroll(walkers)}
<h2>Populations over the run</h2>
<div class="plots">
<p><img id="population-plot" alt="populations" src="data:image/png;base64,{population_plot(summary)}"></p>
<p><img id="running-plot" alt="running populations" src="data:image/png;base64,{running_plot(summary)}"></p>
</div>
<h2>Free energy along the state torsions</h2>
<p><img id="torsion-plot" alt="torsion free energies" src="data:image/png;base64,{torsion_plot(summary)}"></p>
{_acceptance_section(summary)}<p>Populations are properties of the force field and solvent model; an unconverged run
misleads; results inform research and do not replace experiment.</p>
</body></html>
"""


def format_table(summary: dict) -> str:
    """The population table as plain text, for the terminal."""
    lines = [f"verdict: {summary['verdict']}"] + [f"  - {r}" for r in summary["reasons"]]
    lines += [f"  warning: {w}" for w in summary["warnings"]]
    lines.append(f"{'state':<24} {'population':>10} {'95% interval':>17} {'dG kJ/mol':>10}")
    for s in summary["states"]:
        lines.append(f"{s['name']:<24} {100 * s['population']:>9.1f}% "
                     f"{100 * s['ci95'][0]:>7.1f}-{100 * s['ci95'][1]:<6.1f}% {s['dG_kJ_per_mol']:>10.2f}")
    if "pose" in summary:
        lines.append(pose_text(summary["pose"]))
    for name, value in summary.get("observables", {}).items():
        lines.append(f"{name}: {value['mean']:.2f} ({value['ci95_low']:.2f}-{value['ci95_high']:.2f})")
    if "reweighted" in summary:
        rw = summary["reweighted"]
        target = ", ".join(f"{k} {v}" for k, v in rw["to"].items())
        lines.append(f"reweighted to {target} (effective samples {rw['effective_samples']:.0f}):")
        for s in rw["states"]:
            lines.append(f"{s['name']:<24} {100 * s['population']:>9.1f}% "
                         f"{100 * s['ci95'][0]:>7.1f}-{100 * s['ci95'][1]:<6.1f}%")
    return "\n".join(lines)
