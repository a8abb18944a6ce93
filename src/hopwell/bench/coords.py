"""Time per call of the Cartesian builders: row-by-row NeRF, level-batched NeRF, rigid rotation.

Run ``python -m hopwell.bench.coords``. For each molecule and batch size the table gives the
microseconds per call of

* ``row_by_row_us``: :func:`row_by_row_nerf`, one Python step per Z-matrix row (the previous
  :func:`hopwell.coords.internal.internal_to_cartesian`, kept here as the slow reference);
* ``levels_us``: :func:`hopwell.coords.internal.internal_to_cartesian`, one step per
  dependency level (``levels`` of them);
* ``to_internal_us``: :func:`hopwell.coords.internal.cartesian_to_internal`;
* ``rotate_bond_us``: :func:`hopwell.coords.rotate.rotate_about_bond`, one bond for the batch;
* ``rotate_rows_us``: :func:`hopwell.coords.rotate.rotate_torsions`, a different bond per row;

each the best of ``--repeats`` means over ``--calls`` calls (the five taking turns), torch on
one thread as in a run.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch

from hopwell.bench import print_table
from hopwell.coords.internal import (
    ZMatrix,
    build_zmatrix,
    cartesian_to_internal,
    internal_to_cartesian,
)
from hopwell.coords.rotate import (
    TorsionAxes,
    rigid_rows,
    rotate_about_bond,
    rotate_torsions,
    torsion_axes,
)
from hopwell.coords.torsions import moving_torsions
from hopwell.systems.builder import BuildOptions, build, rotatable_bonds

MOLECULES = {
    "Ace-Ala-NMe": str(Path(__file__).resolve().parents[3] / "systems" / "ace_ala_nme.pdb"),
    "aryloxy acetamide": "COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1",
    "aryl amide": "COc1ccc(CN(C)C(=O)CCN2CCOCC2)cc1",
}
BATCH_SIZES = (1, 16, 64)


def row_by_row_nerf(zmat: ZMatrix, bonds_nm: torch.Tensor, angles_rad: torch.Tensor,
                    torsions_rad: torch.Tensor) -> torch.Tensor:
    """Positions placed one Z-matrix row at a time (same conventions as ``internal_to_cartesian``).

    Parameters
    ----------
    zmat : ZMatrix
    bonds_nm : torch.Tensor, shape (batch, n_atoms - 1)
    angles_rad : torch.Tensor, shape (batch, n_atoms - 2)
    torsions_rad : torch.Tensor, shape (batch, n_atoms - 3)
        Principal dihedrals and offsets.

    Returns
    -------
    torch.Tensor, shape (batch, n_atoms, 3)
        Positions in nm, indexed by atom.
    """
    n = zmat.n_atoms
    own = np.arange(n - 3)
    principal = torch.tensor(np.where(zmat.is_principal, own, zmat.principal_of))
    phi = torch.where(torch.tensor(zmat.is_principal), torsions_rad, torsions_rad + torsions_rad[:, principal])
    zero = torch.zeros_like(bonds_nm[:, 0])
    pos: list[torch.Tensor | None] = [None] * n
    pos[zmat.order[0]] = torch.stack([zero, zero, zero], dim=-1)
    pos[zmat.order[1]] = torch.stack([bonds_nm[:, 0], zero, zero], dim=-1)
    sign = 1.0 if zmat.bond_ref[2] == zmat.order[0] else -1.0
    r, theta = bonds_nm[:, 1], angles_rad[:, 0]
    offset = torch.stack([sign * r * torch.cos(theta), r * torch.sin(theta), zero], dim=-1)
    pos[zmat.order[2]] = pos[zmat.bond_ref[2]] + offset
    for row in range(3, n):
        c, b, a = pos[zmat.bond_ref[row]], pos[zmat.angle_ref[row]], pos[zmat.torsion_ref[row]]
        r, theta, tau = bonds_nm[:, row - 1:row], angles_rad[:, row - 2:row - 1], phi[:, row - 3:row - 2]
        bc = torch.nn.functional.normalize(c - b, dim=-1)
        normal = torch.nn.functional.normalize(torch.cross(b - a, bc, dim=-1), dim=-1)
        in_plane = torch.cross(normal, bc, dim=-1)
        pos[zmat.order[row]] = c + r * (-torch.cos(theta) * bc
                                        + torch.sin(theta) * (torch.cos(tau) * in_plane
                                                              + torch.sin(tau) * normal))
    return torch.stack(pos, dim=1)


def seconds_per_call(fns: dict[str, Callable[[], object]], calls: int, repeats: int) -> dict[str, float]:
    """Best over ``repeats`` of the mean time of ``calls`` calls of each of ``fns``, in seconds.

    The functions take turns within each repeat, so that a change in the machine's load
    reaches all of them alike.
    """
    best = dict.fromkeys(fns, float("inf"))
    for fn in fns.values():
        fn()
    for _ in range(repeats):
        for name, fn in fns.items():
            start = time.perf_counter()
            for _ in range(calls):
                fn()
            best[name] = min(best[name], (time.perf_counter() - start) / calls)
    return best


def calls_to_time(zmat: ZMatrix, axes: TorsionAxes, positions_nm: np.ndarray,
                  rng: np.random.Generator) -> dict[str, Callable[[], object]]:
    """The timed calls on one batch of positions ``(batch, n_atoms, 3)``, by table column."""
    ic = cartesian_to_internal(zmat, positions_nm)
    q = (ic.bonds_nm, ic.angles_rad, ic.torsions_rad)
    angles_rad = rng.uniform(-np.pi, np.pi, len(positions_nm))
    which = rng.integers(0, len(axes.rows), len(positions_nm))
    (a, b), moving = axes.axis_atoms[0], axes.moving[0]
    return {
        "row_by_row_us": lambda: row_by_row_nerf(zmat, *q),
        "levels_us": lambda: internal_to_cartesian(zmat, *q),
        "to_internal_us": lambda: cartesian_to_internal(zmat, positions_nm),
        "rotate_bond_us": lambda: rotate_about_bond(positions_nm, a, b, moving, angles_rad),
        "rotate_rows_us": lambda: rotate_torsions(positions_nm, axes, which, angles_rad),
    }


def measure(spec: str, calls: int, repeats: int) -> dict[int, dict]:
    """Table rows (one per batch size) for one molecule."""
    molsys = build(spec, BuildOptions(n_seeds=1, backbone_seeds=False))
    mol = molsys.mol
    bonds = [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    zmat = build_zmatrix(mol.GetNumAtoms(), bonds, heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()],
                         rotatable=rotatable_bonds(mol))
    axes = torsion_axes(zmat, bonds, rigid_rows(zmat, bonds, moving_torsions(zmat, mol)))
    rng = np.random.default_rng(0)
    out = {}
    for batch in BATCH_SIZES:
        timed = calls_to_time(zmat, axes, np.repeat(molsys.seeds_nm[:1], batch, axis=0), rng)
        row = {"atoms": zmat.n_atoms, "levels": int(zmat.placement_levels.max()), "batch": batch}
        row.update({name: 1e6 * t for name, t in seconds_per_call(timed, calls, repeats).items()})
        row["speedup"] = row["row_by_row_us"] / row["levels_us"]
        out[batch] = row
    return out


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--calls", type=int, default=100, help="calls per timing")
    parser.add_argument("--repeats", type=int, default=5, help="timings per entry (the best is kept)")
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    table = {}
    for name, spec in MOLECULES.items():
        for batch, row in measure(spec, args.calls, args.repeats).items():
            table[f"{name} x{batch}"] = row
    print_table(table, "molecule x batch", 22, 14)


if __name__ == "__main__":
    main()
