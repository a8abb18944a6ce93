"""Benchmark of hopwell's conformer flow: physics base against plain base.

Run from the repository root (about 4.5 minutes of one core, longer when the cores are shared;
``--quick`` takes about a minute)::

    PYTHONPATH=src python -m hopwell.flow.bench [--quick]

For Ace-Ala-NMe (Amber ff14SB, vacuum), pregabalin (MMFF94, vacuum, 5 rotatable bonds,
acyclic) and lacosamide (MMFF94, vacuum, 8 rotatable bonds and a benzene ring, which the
independent ring torsions of a proposal easily break; see :mod:`hopwell.internal`) it draws a
plain Langevin sample at 300 K from the seeds and splits the frames, seed after seed, into
blocks of BLOCK_FRAMES: two blocks in eight are held out for the test, one in eight validates.
One flow is fitted on each base with the same budget (300 Adam steps, 60 with ``--quick``; the
state of best validation likelihood, checked every VALIDATE_EVERY steps, is kept). Per flow
the table gives the time to draw and score 1000 proposals (sample, log_prob,
internal_to_cartesian), the time per training step, the step kept, the held-out mean
log-likelihood of the base and of the flow (nats per conformer, internal coordinates), the
acceptance rate of an independence Metropolis chain of 10000 flow proposals started from a
held-out conformer and the importance-sampling efficiency of those proposals (Kish effective
sample size over 10000); the target in internal coordinates is ``exp(-u(x)) J(x)`` (see
:func:`hopwell.internal.internal_to_cartesian`). Torch runs on one thread.
"""

from __future__ import annotations

import argparse
import copy
import time

import numpy as np
import torch

from hopwell.energy import EnergyEvaluator
from hopwell.flow.base import InternalBase, pack, unpack
from hopwell.flow.model import ConformerFlow
from hopwell.internal import ZMatrix, build_zmatrix, cartesian_to_internal, internal_to_cartesian
from hopwell.systems.builder import MolecularSystem, build

SYSTEMS = {
    "Ace-Ala-NMe": "systems/ace_ala_nme.pdb",
    "pregabalin": "CC(C)C[C@H](CN)CC(=O)O",  # (S), as marketed; acyclic
    "lacosamide": "CC(=O)N[C@H](COC)C(=O)NCc1ccccc1",  # (R), as marketed; a benzene ring
}
TEMPERATURE_K = 300.0
STEPS_PER_FRAME = 100  # 0.1 ps at the 1 fs default time step
EQUILIBRATION_STEPS = 2000
BLOCK_FRAMES = 25
N_TIMED = 1000
N_PROPOSALS = 10000
BATCH = 256
LEARNING_RATE = 1e-3
VALIDATE_EVERY = 10


def zmatrix_of(molsys: MolecularSystem) -> ZMatrix:
    """The Z-matrix of a built system, rotatable bonds flagged."""
    mol = molsys.mol
    bonds = [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()]
    heavy = [a.GetAtomicNum() > 1 for a in mol.GetAtoms()]
    return build_zmatrix(mol.GetNumAtoms(), bonds, heavy, molsys.rotatable_bonds())


def langevin_frames(evaluator: EnergyEvaluator, seeds_nm: np.ndarray,
                    n_frames: int) -> list[np.ndarray]:
    """One Langevin trajectory per seed, ``n_frames`` frames in all; each (frames, n_atoms, 3)."""
    per_seed = np.array_split(np.arange(n_frames), len(seeds_nm))
    out = []
    for seed_nm, frames in zip(seeds_nm, per_seed):
        pos, vel, _ = evaluator.langevin(seed_nm, EQUILIBRATION_STEPS)
        traj = []
        for _ in frames:
            pos, vel, _ = evaluator.langevin(pos, STEPS_PER_FRAME, vel)
            traj.append(pos)
        out.append(np.array(traj).reshape(len(frames), -1, 3))
    return out


def log_weights(flow: ConformerFlow, zmat: ZMatrix, evaluator: EnergyEvaluator, x: torch.Tensor,
                log_q: torch.Tensor) -> np.ndarray:
    """Importance log-weights ``-u(x) + log J(x) - log q(x)``, -inf where the energy fails."""
    positions_nm, log_jacobian = internal_to_cartesian(zmat, *unpack(x, zmat.n_atoms))
    u = evaluator.reduced(positions_nm.numpy())
    w = -u + (log_jacobian - log_q).numpy()
    return np.where(np.isfinite(w), w, -np.inf)


def independence_acceptance(flow: ConformerFlow, zmat: ZMatrix, evaluator: EnergyEvaluator,
                            x_start: torch.Tensor, rng: np.random.Generator,
                            generator: torch.Generator) -> tuple[float, float]:
    """Acceptance rate of an independence Metropolis chain of N_PROPOSALS flow proposals, and
    the proposals' importance-sampling efficiency (Kish effective sample size / N_PROPOSALS)."""
    with torch.no_grad():
        current = log_weights(flow, zmat, evaluator, x_start[None], flow.log_prob(x_start[None]))[0]
        proposals = np.concatenate([
            log_weights(flow, zmat, evaluator, *flow.sample(N_TIMED, generator))
            for _ in range(N_PROPOSALS // N_TIMED)])
    accepted = 0
    for w in proposals:
        if np.log(rng.random()) < w - current:
            current, accepted = w, accepted + 1
    w = np.exp(proposals - proposals.max())
    return accepted / N_PROPOSALS, float(w.sum() ** 2 / (w ** 2).sum()) / N_PROPOSALS


def benchmark(name: str, spec: str, n_frames: int, train_steps: int, seed: int) -> list[dict]:
    """Rows of the table for one system (physics base, then plain base)."""
    molsys = build(spec)
    zmat = zmatrix_of(molsys)
    evaluator = EnergyEvaluator(molsys.system, TEMPERATURE_K, seed=seed + 1)
    trajectories = langevin_frames(evaluator, molsys.seeds_nm, n_frames)
    frames = np.concatenate(trajectories)
    block = (np.arange(len(frames)) // BLOCK_FRAMES) % 8
    coords = cartesian_to_internal(zmat, frames[~np.isin(block, (3, 5, 7))])
    x_train = pack(coords)
    x_val, x_test = (pack(cartesian_to_internal(zmat, frames[np.isin(block, b)]))
                     for b in ((5,), (3, 7)))
    rows = []
    for kind in ("physics", "plain"):
        torch.manual_seed(seed)
        generator = torch.Generator().manual_seed(seed)
        base = InternalBase.fit(coords, zmat.is_principal, plain=kind == "plain")
        flow = ConformerFlow.for_zmatrix(zmat, base)
        with torch.no_grad():
            base_ll = float(base.log_prob(x_test).mean())
        optimizer = torch.optim.Adam(flow.parameters(), lr=LEARNING_RATE)
        best = (-np.inf, 0, copy.deepcopy(flow.state_dict()))
        step_s = 0.0
        for step in range(1, train_steps + 1):
            batch = torch.randint(len(x_train), (BATCH,), generator=generator)
            start = time.perf_counter()
            flow.fit_step(optimizer, x_train[batch])
            step_s += (time.perf_counter() - start) / train_steps
            if step % VALIDATE_EVERY == 0:
                with torch.no_grad():
                    val_ll = float(flow.log_prob(x_val).mean())
                if val_ll > best[0]:
                    best = (val_ll, step, copy.deepcopy(flow.state_dict()))
        flow.load_state_dict(best[2])
        with torch.no_grad():
            start = time.perf_counter()
            x, _ = flow.sample(N_TIMED, generator)
            flow.log_prob(x)
            internal_to_cartesian(zmat, *unpack(x, zmat.n_atoms))
            draw_s = time.perf_counter() - start
            flow_ll = float(flow.log_prob(x_test).mean())
        acceptance, efficiency = independence_acceptance(flow, zmat, evaluator, x_test[0],
                                              np.random.default_rng(seed), generator)
        rows.append({"system": name, "dims": x_train.shape[1], "base": kind, "draw_s": draw_s,
                     "step_ms": 1e3 * step_s, "best_step": best[1], "base_ll": base_ll,
                     "flow_ll": flow_ll, "acceptance": acceptance, "efficiency": efficiency})
    return rows


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer frames and training steps")
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args(argv)
    torch.set_num_threads(1)  # timings per core; extra threads only contend on a shared machine
    n_frames, train_steps = (400, 60) if args.quick else (2000, 300)
    print(f"{n_frames} Langevin frames per system ({STEPS_PER_FRAME} steps apart,"
          f" {TEMPERATURE_K:.0f} K); {train_steps} Adam steps of batch {BATCH},"
          " best validated state kept")
    header = (f"{'system':<12} {'dims':>4} {'base':<8} {'draw+score 1000 (s)':>19} {'step (ms)':>9}"
              f" {'best step':>9} {'held-out LL base':>16} {'held-out LL flow':>16}"
              f" {'IMH acceptance':>14} {'IS efficiency':>13}")
    print(header)
    for name, spec in SYSTEMS.items():
        for r in benchmark(name, spec, n_frames, train_steps, args.seed):
            print(f"{r['system']:<12} {r['dims']:>4} {r['base']:<8} {r['draw_s']:>19.3f}"
                  f" {r['step_ms']:>9.1f} {r['best_step']:>9d} {r['base_ll']:>16.1f}"
                  f" {r['flow_ll']:>16.1f}"
                  f" {r['acceptance']:>14.4f} {r['efficiency']:>13.4f}")


if __name__ == "__main__":
    main()
