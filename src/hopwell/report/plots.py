"""The report's plots, each returned as a base64 PNG for embedding in the page."""

from __future__ import annotations

import base64
import io

import numpy as np

from hopwell.analysis.states import POPULATION_FLOOR
from hopwell.systems.energy import kT_kj

TORSION_PLOT_COLUMNS = 3  # at 100 dpi, three panels fill about 910 px


def population_plot(summary: dict) -> str:
    """A bar chart of populations with 95% intervals, as a base64 PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    shown = [s for s in summary["states"] if s["population"] > 0 or s["name"] != "other"]
    # Horizontal bars: long state names read along the axis and the width stays fixed.
    fig, ax = plt.subplots(figsize=(7, 0.32 * len(shown) + 1.3), dpi=100)
    p = np.array([s["population"] for s in shown]) * 100
    lo = p - np.array([s["ci95"][0] for s in shown]) * 100
    hi = np.array([s["ci95"][1] for s in shown]) * 100 - p
    ax.barh(range(len(shown)), p, xerr=[lo, hi], capsize=3, color="#4c78a8")
    ax.set_yticks(range(len(shown)), [s["name"] for s in shown], fontsize=7)
    ax.invert_yaxis()  # most populated at the top, as in the table
    ax.set_xlabel("population (%)")
    ax.set_title("Populations with 95% intervals")
    return _png(fig)


def _png(fig) -> str:
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buffer, format="png")
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode()


def running_plot(summary: dict) -> str:
    """Running population estimate of each populated state over production, base64 PNG."""
    import matplotlib.pyplot as plt

    series = summary["_series"]
    fig, ax = plt.subplots(figsize=(6, 3.2), dpi=100)
    pooled = series.T.ravel()  # walkers interleaved in time order
    n = np.arange(1, len(pooled) + 1)
    for s, state in enumerate(summary["states"]):
        if state["population"] >= POPULATION_FLOOR:
            ax.plot(n, 100 * np.cumsum(pooled == s) / n, label=state["name"])
    ax.set_xlabel("production samples (all walkers)")
    ax.set_ylabel("running population (%)")
    ax.legend(fontsize=7, loc="best")
    return _png(fig)


def torsion_plot(summary: dict) -> str:
    """Free-energy profile of each state torsion (or the phi/psi map), base64 PNG."""
    import matplotlib.pyplot as plt

    d = np.degrees(summary["_dihedrals"])
    kT = kT_kj(summary["temperature_K"])
    tags = summary["_torsion_labels"]
    if summary["state_model"] == "backbone":
        fig, ax = plt.subplots(figsize=(4.2, 3.6), dpi=100)
        hist, xe, ye = np.histogram2d(d[:, 0], d[:, 1], bins=36, range=[[-180, 180], [-180, 180]])
        with np.errstate(divide="ignore"):
            g = -kT * np.log(hist / hist.max())
        mesh = ax.pcolormesh(xe, ye, g.T, cmap="viridis", vmax=20)
        fig.colorbar(mesh, ax=ax, label="G (kJ/mol)")
        ax.set_xlabel(f"{tags[0].caption} (deg)", fontsize=7)
        ax.set_ylabel(f"{tags[1].caption} (deg)", fontsize=7)
        return _png(fig)
    n = max(1, d.shape[1])
    columns = min(n, TORSION_PLOT_COLUMNS)  # rows wrap, so the figure stays within a page's width
    rows = -(-n // columns)
    fig, axes = plt.subplots(rows, columns, figsize=(2.9 * columns + 0.4, 2.5 * rows + 0.3), dpi=100,
                             squeeze=False)
    for t in range(rows * columns):
        ax = axes[t // columns, t % columns]
        if t >= d.shape[1]:
            ax.axis("off")
            continue
        hist, edges = np.histogram(d[:, t], bins=72, range=(-180, 180))
        with np.errstate(divide="ignore"):
            g = -kT * np.log(hist / hist.max())
        ax.step(0.5 * (edges[1:] + edges[:-1]), g, where="mid")
        ax.set_title(tags[t].caption, fontsize=8)
        ax.set_xlabel("torsion (deg)", fontsize=8)
        ax.set_ylim(0, 25)
        ax.set_xticks([-180, -90, 0, 90, 180])
        if t % columns == 0:
            ax.set_ylabel("G (kJ/mol)")
    return _png(fig)


def acceptance_plot(windows: list[dict]) -> str:
    """Flow acceptance per cycle window, the end of training marked, as a base64 PNG."""
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6, 3.2), dpi=100)
    middle = np.array([0.5 * (w["cycle_start"] + w["cycle_end"]) for w in windows])
    blocks = np.array([100 * w["flow_block_acceptance"] for w in windows])
    ax.plot(middle, blocks, marker="o", markersize=3, label="flow blocks with an accepted proposal")
    proposals = np.array([np.nan if w["flow_proposal_acceptance"] is None else 100 * w["flow_proposal_acceptance"]
                          for w in windows])
    if np.isfinite(proposals).any():
        ax.plot(middle, proposals, marker="s", markersize=3, label="flow proposals accepted")
    production = [w["cycle_start"] for w in windows if w["phase"] == "production"]
    if production and windows[0]["phase"] == "training":
        ax.axvline(production[0], color="#555", linestyle="--", label="end of training")
    ax.set_xlabel("cycle")
    ax.set_ylabel("acceptance (%)")
    ax.set_ylim(-2, 102)  # keep 0% and 100% markers clear of the frame
    ax.legend(fontsize=7, loc="best")
    return _png(fig)
