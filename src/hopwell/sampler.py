"""The sampler: walkers alternate Langevin segments with flow proposals under exact MH.

Each cycle, for each walker:

1. a Langevin segment (``LangevinMiddleIntegrator``, velocities drawn afresh from
   Maxwell-Boltzmann at the start of the segment and moved to the integrator's half step,
   which leaves the Boltzmann distribution invariant up to the step's own error);
2. a block of proposals from the flow of the torsions about rotatable single bonds, given the
   walker's bond angles (:mod:`hopwell.moves`), drawn and scored in one batch, each accepted
   with the Metropolis-Hastings ratio of an independence sampler in internal coordinates q,
   whose target is p(q) ~ exp(-u(x(q))) J(q) (see :mod:`hopwell.internal`)::

       alpha = min(1, exp(-u(x') + u(x)) * J(q') / J(q) * q_flow(q) / q_flow(q'))

   Proposals flagged by the clash or stereo guard have target density zero: rejected, and
   never sent to OpenMM.
3. one-torsion redraws from the base's marginals (:meth:`Sampler._single_moves`) and seed darts
   between the basins of the minimized seeds (:mod:`hopwell.darts`), both exact MH moves.

The chain state is recorded after the Langevin segment and after the other moves (a fixed
sub-sampling of a stationary chain is stationary). During training the flow is refit every
few cycles on a bounded buffer of recent walker states (the chain is then adaptive, not
Markov, so these samples are kept for diagnostics only). Training ends at a set cycle; from then
on the flow is frozen and every walker state and every proposal (with energy, log q and log J)
is recorded as production. See :mod:`hopwell.store` for the crash-safe run directory.
"""

from __future__ import annotations

import copy
import io
import json
import math
import signal
import time
from collections import deque
from dataclasses import asdict, dataclass, field

import numpy as np
import torch
from rdkit import Chem

from hopwell.atomic import atomic_write_bytes
from hopwell.darts import build_darts, rotatable_rows
from hopwell.energy import EnergyEvaluator
from hopwell.guards import ProposalGuard
from hopwell.internal import build_zmatrix, cartesian_to_internal, internal_to_cartesian
from hopwell.moves import TorsionFlow, context_angles, moving_torsions, stiff_rows
from hopwell.store import MOVE_FLOW, MOVE_LANGEVIN, STATE_FIELDS, RunStore
from hopwell.systems.builder import rotatable_bonds

# Energy rise (kJ/mol) over one Langevin segment taken as an explosion, not thermal motion:
# thermal fluctuations of U are ~ kT sqrt(3N/2), a few tens of kJ/mol for N < 300.
EXPLOSION_KJ = 5.0e3
REJECT_NONE, REJECT_CLASH, REJECT_STEREO = 0, 1, 2


@dataclass
class SamplerSettings:
    """How the sampler runs; every field is written to the run's ``run.toml``.

    Attributes
    ----------
    temperature_K : float
    method : {"flow", "md", "remd"}
        "flow": Langevin plus flow and one-torsion moves; "md": the Langevin segments alone
        (the plain-MD baseline, from the same seeds, into the same kind of run directory);
        "remd": temperature replica exchange (:mod:`hopwell.replica`).
    replicas, top_temperature_K : int, float
        The "remd" ladder: this many temperatures, geometric from ``temperature_K`` to the top.
    local_move : {"langevin", "ghmc"}
        Unadjusted Langevin or exact GHMC segments (:mod:`hopwell.integrators`).
    timestep_fs, friction_per_ps : float
        Langevin settings; no constraints, so 1 fs (DEVELOPERS.md states the measured bias).
    langevin_steps : int
        Steps per Langevin segment.
    proposals_per_cycle : int
        Flow proposals (all the flow's torsions at once) per walker per cycle.
    single_moves_per_cycle : int
        One-torsion proposals per walker per cycle, each from the base's marginal of one
        randomly chosen moving torsion (see :meth:`Sampler._single_moves`).
    flow_torsions : {"rotatable", "all"}
        Torsions the flow and one-torsion moves redraw: the principal torsions about rotatable
        bonds (methyl and hydroxyl rotors left to Langevin), or every moving torsion.
    flow_stiff_torsions : bool
        Let the flow also redraw torsions about amide- and ester-like bonds; by default these
        are left to the one-torsion moves and darts unless the molecule has no other
        (:mod:`hopwell.moves` gives the measured reason).
    flow_context : bool
        Condition the flow on the bond angles at its torsions' central atoms and on the moving
        torsions it leaves out: it then models p(t | c) rather than the marginal p(t).
    context_noise : float
        Spread of the Gaussian noise added to the standardized context while fitting.
    darts_per_cycle : int
        Seed darts per walker per cycle (:mod:`hopwell.darts`): exact jumps between the basins
        of the seed structures.
    training_cycles : int
        Most cycles of the training phase; production follows with the flow frozen.
    training_seconds : float or None
        Training also ends once this much sampling time has passed (set from ``--hours``).
    fit_every, fit_steps, fit_batch : int
        Refit the flow every ``fit_every`` cycles with ``fit_steps`` AdamW steps on minibatches.
    learning_rate, weight_decay : float
        AdamW settings (decoupled weight decay, Loshchilov and Hutter 2019).
    buffer_size : int
        Most recent walker states kept for training (bounds memory).
    buffer_frames_per_segment : int
        During training, frames per Langevin segment added to the buffer (the segment is run
        in this many pieces, velocities carried over).
    cycles_per_chunk : int
        Cycles between chunk writes and checkpoints.
    flow_hidden, flow_layers, flow_bins : int
    seed : int
    """

    temperature_K: float = 300.0
    method: str = "flow"
    replicas: int = 6
    top_temperature_K: float = 600.0
    local_move: str = "langevin"
    timestep_fs: float = 1.0
    friction_per_ps: float = 1.0
    langevin_steps: int = 250
    proposals_per_cycle: int = 32
    single_moves_per_cycle: int = 16
    flow_torsions: str = "rotatable"
    flow_stiff_torsions: bool = False
    flow_context: bool = True
    context_noise: float = 1.0
    darts_per_cycle: int = 4
    training_cycles: int = 200
    training_seconds: float | None = None
    fit_every: int = 4
    fit_steps: int = 40
    fit_batch: int = 256
    learning_rate: float = 2.0e-3
    weight_decay: float = 1.0e-3
    buffer_size: int = 20000
    buffer_frames_per_segment: int = 5
    cycles_per_chunk: int = 10
    flow_hidden: int = 32
    flow_layers: int = 6
    flow_bins: int = 8
    seed: int = 2024


@dataclass
class Budget:
    """When to stop: production samples recorded, or sampling seconds spent (or both).

    Seconds count over the whole run, resumes included (the checkpoint keeps the elapsed time).
    """

    samples: int | None = None
    seconds: float | None = None

    def done(self, production_samples: int, elapsed_s: float) -> bool:
        if self.samples is not None and production_samples >= self.samples:
            return True
        return self.seconds is not None and elapsed_s >= self.seconds


@dataclass
class CycleStats:
    """Counts for progress display: proposals and acceptances by phase and cause."""

    proposed: int = 0
    accepted: int = 0
    clash: int = 0
    stereo: int = 0
    recent: deque = field(default_factory=lambda: deque(maxlen=20))

    def acceptance(self) -> float:
        return self.accepted / self.proposed if self.proposed else float("nan")

    def recent_acceptance(self) -> float:
        if not self.recent:
            return float("nan")
        a, p = np.sum(self.recent, axis=0)
        return a / p if p else float("nan")


class Sampler:
    """Owns the OpenMM context, the flow, the walkers and the RNGs of one run.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Molecule with explicit hydrogens (graph, stereo reference).
    system : openmm.System
    seeds_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
    settings : SamplerSettings
    store : RunStore
    n_walkers : int, optional
        Defaults to one per seed; more are spread over the seeds in turn.
    platform : str, optional
    """

    def __init__(self, mol: Chem.Mol, system, seeds_nm: np.ndarray, settings: SamplerSettings,
                 store: RunStore, n_walkers: int | None = None, platform: str | None = None):
        self.settings, self.store, self.system = settings, store, system
        self.rng = np.random.default_rng(settings.seed)
        self.torch_rng = torch.Generator().manual_seed(settings.seed)
        self.evaluator = EnergyEvaluator(
            system, settings.temperature_K, platform=platform,
            timestep_ps=settings.timestep_fs * 1e-3, friction_per_ps=settings.friction_per_ps,
            seed=int(self.rng.integers(1, 2**31 - 1)), local_move=settings.local_move,
        )
        n_atoms = mol.GetNumAtoms()
        self.zmat = build_zmatrix(
            n_atoms,
            [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
            heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()],
            rotatable=rotatable_bonds(mol),
        )
        self.guard = ProposalGuard.from_mol(mol, seeds_nm[0])
        if settings.flow_torsions not in ("rotatable", "all"):
            raise ValueError(f"flow_torsions must be 'rotatable' or 'all', got {settings.flow_torsions!r}")
        moving = moving_torsions(self.zmat, mol)
        rotatable = rotatable_rows(self.zmat, moving)
        self.moving = rotatable if settings.flow_torsions == "rotatable" and len(rotatable) else moving
        if len(self.moving) == 0:
            raise ValueError("the molecule has no torsion about an acyclic bond to sample")
        self._all_moving = moving
        self.dart_centres_nm = None  # the minimized seeds, kept in the checkpoint
        self.darts = None
        if settings.method == "flow" and settings.darts_per_cycle > 0:
            self.dart_centres_nm = self.evaluator.minimize(seeds_nm)
            self.darts = build_darts(self.zmat, moving, self.dart_centres_nm)
        # Production walker states per dart region (index 0: outside every region).
        self.basin_counts = np.zeros(1 + (self.darts.n_centres if self.darts else 0), dtype=np.int64)
        stiff = stiff_rows(self.zmat, mol, self.moving)
        # Columns of self.moving the flow redraws. Its context: the angle columns
        # self.context_columns, then the moving torsions it leaves out (an amide's cis/trans
        # state changes which positions of its neighbours clash).
        self.flow_columns = (np.arange(len(self.moving)) if settings.flow_stiff_torsions or stiff.all()
                             else np.flatnonzero(~stiff))
        self.other_rows = np.setdiff1d(self.moving, self.moving[self.flow_columns])
        if not settings.flow_context:
            self.context_columns, self.other_rows = np.zeros(0, dtype=int), np.zeros(0, dtype=int)
        else:
            self.context_columns = context_angles(self.zmat, self.moving[self.flow_columns])
        periodic = np.r_[np.zeros(len(self.context_columns), bool), np.ones(len(self.other_rows), bool)]
        seeds_ic = cartesian_to_internal(self.zmat, torch.as_tensor(seeds_nm))
        with torch.random.fork_rng():  # the network's initial weights follow settings.seed
            torch.manual_seed(settings.seed)
            self.flow = TorsionFlow(seeds_ic.torsions_rad[:, self.moving].numpy(), self.flow_columns,
                                    periodic, transforms=settings.flow_layers,
                                    hidden=settings.flow_hidden, bins=settings.flow_bins)
        self.optimizer = torch.optim.AdamW(self.flow.parameters(), lr=settings.learning_rate,
                                           weight_decay=settings.weight_decay)
        n_walkers = n_walkers or len(seeds_nm)
        self.positions_nm = np.stack([seeds_nm[k % len(seeds_nm)] for k in range(n_walkers)])
        self.energies_kj = self.evaluator.energies_kj(self.positions_nm)
        if not np.all(np.isfinite(self.energies_kj)):
            raise ValueError("a seed structure has a non-finite energy")
        self.cycle = 0
        self.training_end_cycle = -1  # set when the flow is frozen
        self.elapsed_s = 0.0
        self.next_chunk = 0
        self.buffer: deque = deque(maxlen=settings.buffer_size)
        self.stats = {"training": CycleStats(), "production": CycleStats(), "single": CycleStats(),
                      "dart": CycleStats()}
        self.production_samples = 0
        self._stop = False
        self._pending: list[tuple[dict, dict]] = []
        self._cycle_start = time.perf_counter()

    # -- phase ----------------------------------------------------------------------------
    @property
    def n_walkers(self) -> int:
        return len(self.positions_nm)

    @property
    def production(self) -> bool:
        return self.training_end_cycle >= 0

    def _maybe_end_training(self) -> None:
        s = self.settings
        if self.production:
            return
        by_time = s.training_seconds is not None and self.elapsed_s >= s.training_seconds
        if self.cycle >= s.training_cycles or by_time:
            self.training_end_cycle = self.cycle
            self.store.log(f"cycle {self.cycle}: training ended, flow frozen; acceptance in"
                           f" training {self.stats['training'].acceptance():.3f}")

    # -- moves ----------------------------------------------------------------------------
    def _langevin(self, walker: int) -> None:
        x0, e0 = self.positions_nm[walker], self.energies_kj[walker]
        pieces = 1 if self.production else self.settings.buffer_frames_per_segment
        x, v, frames = x0, None, []
        for steps in np.diff(np.linspace(0, self.settings.langevin_steps, pieces + 1).astype(int)):
            x, v, e = self.evaluator.langevin(x, int(steps), v)
            frames.append(x)
        if not (np.isfinite(e) and np.all(np.isfinite(x))) or e - e0 > EXPLOSION_KJ:
            self.store.log(f"cycle {self.cycle} walker {walker}: Langevin segment gave energy"
                           f" {e:.4g} kJ/mol (from {e0:.4g}); rolled back to the previous state")
            return
        self.positions_nm[walker], self.energies_kj[walker] = x, e
        if not self.production and pieces > 1:  # intermediate frames: more data for the fit
            self._buffer_add(np.stack(frames[:-1]))

    def _propose(self, walker: int) -> dict:
        """One block of flow proposals for one walker; returns the proposal records."""
        k = self.settings.proposals_per_cycle
        kT = self.evaluator.kT
        with torch.no_grad():
            current = cartesian_to_internal(self.zmat, torch.as_tensor(self.positions_nm[walker:walker + 1]))
            context = self.conditioning(current)[0]
            rows = self.moving[self.flow_columns]
            t_new, log_q_new = self.flow.sample(k, context, self.torch_rng)
            torsions = current.torsions_rad.repeat(k, 1)
            torsions[:, rows] = t_new
            pos_new, log_j_new = internal_to_cartesian(
                self.zmat, current.bonds_nm.repeat(k, 1), current.angles_rad.repeat(k, 1), torsions)
            log_q_cur = float(self.flow.log_prob(current.torsions_rad[:, rows], context)[0])
        pos_new = pos_new.numpy()
        log_q_new, log_j_new = log_q_new.numpy(), log_j_new.numpy()
        mask = self.guard(pos_new)
        rejected_by = np.where(mask.clash, REJECT_CLASH, np.where(mask.stereo, REJECT_STEREO, REJECT_NONE))
        energy = np.full(k, np.nan)
        ok = rejected_by == REJECT_NONE
        if ok.any():
            energy[ok] = self.evaluator.energies_kj(pos_new[ok])
        rejected_by[ok & ~np.isfinite(energy)] = REJECT_CLASH
        accepted = np.zeros(k, dtype=bool)
        u_cur = self.energies_kj[walker] / kT
        log_u = np.log(self.rng.random(k))
        for i in np.flatnonzero(rejected_by == REJECT_NONE):
            # J(q') = J(q): bonds and angles are kept (see hopwell.moves).
            log_alpha = -(energy[i] / kT - u_cur) + (log_q_cur - log_q_new[i])
            if log_u[i] < log_alpha:
                accepted[i] = True
                u_cur, log_q_cur = energy[i] / kT, log_q_new[i]
                self.positions_nm[walker], self.energies_kj[walker] = pos_new[i], energy[i]
        stats = self.stats["production" if self.production else "training"]
        stats.proposed += k
        stats.accepted += int(accepted.sum())
        stats.clash += int((rejected_by == REJECT_CLASH).sum())
        stats.stereo += int((rejected_by == REJECT_STEREO).sum())
        stats.recent.append((int(accepted.sum()), k))
        return {
            "positions_nm": pos_new.astype(np.float32), "energy_kj": energy, "log_q": log_q_new,
            "log_jacobian": log_j_new, "walker": np.full(k, walker, np.int32),
            "cycle": np.full(k, self.cycle, np.int64), "accepted": accepted,
            "rejected_by": rejected_by.astype(np.int8),
        }

    def _single_moves(self, walker: int) -> None:
        """One-torsion moves: redraw one moving torsion from its base marginal q_i, keep the rest.

        The MH ratio is ``exp(-u(x') + u(x)) q_i(t_i) / q_i(t_i')`` (an independence proposal
        for t_i given everything else; J is unchanged). Proposals are scored in batches built
        from the current state; after an acceptance the rest are rebuilt from the new state.
        """
        remaining = self.settings.single_moves_per_cycle
        stats = self.stats["single"]
        kT = self.evaluator.kT
        moving = torch.as_tensor(self.moving)
        while remaining > 0:
            with torch.no_grad():
                current = cartesian_to_internal(self.zmat, torch.as_tensor(self.positions_nm[walker:walker + 1]))
                index = torch.as_tensor(self.rng.integers(0, len(self.moving), remaining))
                new = self.flow.marginal_sample(index, self.torch_rng)
                torsions = current.torsions_rad.repeat(remaining, 1)
                rows, cols = torch.arange(remaining), moving[index]
                old = torsions[rows, cols].clone()
                torsions[rows, cols] = new
                positions, _ = internal_to_cartesian(
                    self.zmat, current.bonds_nm.repeat(remaining, 1), current.angles_rad.repeat(remaining, 1), torsions)
                log_q_ratio = (self.flow.marginal_log_prob(index, old) - self.flow.marginal_log_prob(index, new)).numpy()
            positions = positions.numpy()
            ok = ~np.asarray(self.guard(positions).rejected)
            energy = np.full(remaining, np.inf)
            if ok.any():
                energy[ok] = self.evaluator.energies_kj(positions[ok])
            log_u = np.log(self.rng.random(remaining))
            log_alpha = -(energy - self.energies_kj[walker]) / kT + log_q_ratio
            hits = np.flatnonzero(np.isfinite(energy) & (log_u < log_alpha))
            used = int(hits[0]) + 1 if len(hits) else remaining
            stats.proposed += used
            if len(hits):
                stats.accepted += 1
                self.positions_nm[walker], self.energies_kj[walker] = positions[hits[0]], energy[hits[0]]
            remaining -= used

    def basin_populations(self) -> np.ndarray | None:
        """Running share of production walker states in each seed's basin (dart region).

        A progress indicator, not an estimate: regions are balls around the minimized seeds,
        and the share outside all of them comes last. None without darts or samples yet.
        """
        total = self.basin_counts.sum()
        if self.darts is None or total == 0:
            return None
        return np.concatenate([self.basin_counts[1:], self.basin_counts[:1]]) / total

    def _darts(self, walker: int) -> None:
        """Seed darts (see :mod:`hopwell.darts`); a state outside every region stays put."""
        stats, kT = self.stats["dart"], self.evaluator.kT
        with torch.no_grad():
            current = cartesian_to_internal(self.zmat, torch.as_tensor(self.positions_nm[walker:walker + 1]))
        for _ in range(self.settings.darts_per_cycle):
            source = int(self.darts.region(current.torsions_rad.numpy())[0])
            if source < 0:
                break  # no dart moves a state outside every region: the rest would not either
            target = int(self.rng.integers(0, self.darts.n_centres - 1))
            target += target >= source  # uniform over the other centres
            bonds, angles, torsions = self.darts.displace(current, source, target)
            stats.proposed += 1
            if not bool(((angles > 0) & (angles < np.pi)).all()) or bool((bonds <= 0).any()):
                continue
            with torch.no_grad():
                positions, log_j = internal_to_cartesian(self.zmat, bonds, angles, torsions)
            positions = positions.numpy()
            if self.guard(positions).rejected[0]:
                continue
            # q' is in the target region by construction; checked on the coordinates the next
            # dart will read, so that round-off at a region's edge cannot break reversibility.
            with torch.no_grad():
                landed = cartesian_to_internal(self.zmat, torch.as_tensor(positions))
            if int(self.darts.region(landed.torsions_rad.numpy())[0]) != target:
                continue
            energy = float(self.evaluator.energies_kj(positions)[0])
            log_alpha = -(energy - self.energies_kj[walker]) / kT + float(log_j[0] - current.log_jacobian[0])
            if np.isfinite(energy) and np.log(self.rng.random()) < log_alpha:
                stats.accepted += 1
                self.positions_nm[walker], self.energies_kj[walker] = positions[0], energy
                current = landed  # the new state's coordinates, already computed

    def conditioning(self, ic) -> torch.Tensor:
        """The flow's conditioning input of states ``ic``: angles, then left-out torsions."""
        return torch.cat([ic.angles_rad[:, self.context_columns], ic.torsions_rad[:, self.other_rows]], 1)

    def _buffer_add(self, positions_nm: np.ndarray) -> None:
        """Queue states for the flow fit: moving torsions, then the flow's context (float32)."""
        with torch.no_grad():
            ic = cartesian_to_internal(self.zmat, torch.as_tensor(positions_nm, dtype=torch.float64))
        rows = torch.cat([ic.torsions_rad[:, self.moving], self.conditioning(ic)], 1)
        self.buffer.extend(rows.numpy().astype(np.float32))

    def _fit(self) -> None:
        """Refit base and splines on the buffer; undo the refit if the flow diverges."""
        data = torch.as_tensor(np.stack(self.buffer), dtype=torch.float64)
        m = len(self.moving)
        torsions, context = data[:, :m], data[:, m:]
        flow_t = torsions[:, torch.as_tensor(self.flow_columns)]
        saved = (copy.deepcopy(self.flow.state_dict()), copy.deepcopy(self.optimizer.state_dict()))
        self.flow.refit_base(torsions.numpy(), context.numpy())
        loss = float("nan")
        for _ in range(self.settings.fit_steps):
            index = torch.as_tensor(self.rng.integers(0, len(data), self.settings.fit_batch))
            loss = self.flow.fit_step(self.optimizer, flow_t[index], context[index],
                                      self.settings.context_noise, self.torch_rng)
        with torch.no_grad():
            # the newest states, least seen by the fit
            check = self.flow.log_prob(flow_t[-512:], context[-512:])
            base = self.flow.base_log_prob(flow_t[-512:])
        if not (math.isfinite(loss) and torch.isfinite(check).all()):
            self.flow.load_state_dict(saved[0])
            self.optimizer.load_state_dict(saved[1])
            self.store.log(f"cycle {self.cycle}: flow refit diverged (loss {loss}); rolled back")
        elif check.mean() < base.mean():
            # Worse than its own base on the newest data (overfitting or a moved base):
            # start the splines again from the identity, which is the base.
            self.flow.reset_transforms()

    def run_cycle(self) -> None:
        """One cycle over all walkers; queues the records for the next chunk."""
        production = self.production
        states = {k: [] for k in STATE_FIELDS}
        proposals = []
        for walker in range(self.n_walkers):
            self._langevin(walker)
            self._record_state(states, walker, MOVE_LANGEVIN, production)
            if self.settings.method == "md":
                continue
            block = self._propose(walker) if self.settings.proposals_per_cycle else None
            if self.settings.single_moves_per_cycle:
                self._single_moves(walker)
            if self.darts is not None:
                self._darts(walker)
            if production and block is not None:
                proposals.append(block)
            self._record_state(states, walker, MOVE_FLOW, production,
                               accepted=block is not None and bool(block["accepted"].any()))
        if not production:
            self._buffer_add(np.stack(states["positions_nm"]))
        else:
            self.production_samples += len(states["walker"])
            if self.darts is not None:  # running occupancy of the seeds' basins, for progress
                with torch.no_grad():
                    ic = cartesian_to_internal(self.zmat, torch.as_tensor(self.positions_nm))
                self.basin_counts += np.bincount(self.darts.region(ic.torsions_rad.numpy()) + 1,
                                                 minlength=self.darts.n_centres + 1)
        self._pending.append((states, _concat(proposals)))
        self.cycle += 1
        if not production and self.cycle % self.settings.fit_every == 0:
            self._fit()

    def _record_state(self, states, walker, move, production, accepted=True) -> None:
        states["positions_nm"].append(self.positions_nm[walker].astype(np.float32))
        states["energy_kj"].append(self.energies_kj[walker])
        states["walker"].append(walker)
        states["cycle"].append(self.cycle)
        states["move"].append(move)
        states["accepted"].append(accepted)
        states["production"].append(production)
        states["time_s"].append(self.elapsed_s + time.perf_counter() - self._cycle_start)

    # -- persistence ----------------------------------------------------------------------
    def flush(self) -> None:
        """Write queued cycles as one chunk, then the checkpoint that counts it."""
        if self._pending:
            states = {k: np.concatenate([np.asarray(s[k]) for s, _ in self._pending])
                      for k in self._pending[0][0]}
            proposals = _concat([p for _, p in self._pending if p])
            self.store.write_chunk(self.next_chunk, states, proposals)
            self.next_chunk += 1
            self._pending = []
        flow_path = self.store.flow_path(self.cycle)
        # Atomic like every other file: a flush at the checkpoint's own cycle (the run's last
        # one, or a resume from checkpoint zero) rewrites the flow file state.npz names.
        buffer = io.BytesIO()
        torch.save({"flow": self.flow.state_dict(), "optimizer": self.optimizer.state_dict()}, buffer)
        atomic_write_bytes(flow_path, buffer.getvalue())
        stats = {k: asdict(v) | {"recent": list(v.recent)} for k, v in self.stats.items()}
        self.store.write_state({
            "cycle": np.int64(self.cycle), "next_chunk": np.int64(self.next_chunk),
            "training_end_cycle": np.int64(self.training_end_cycle),
            "elapsed_s": np.float64(self.elapsed_s),
            "production_samples": np.int64(self.production_samples),
            "positions_nm": self.positions_nm, "energies_kj": self.energies_kj,
            "flow_file": np.str_(flow_path.name),
            "rng": np.str_(json.dumps(self.rng.bit_generator.state)),
            "torch_rng": self.torch_rng.get_state().numpy(),
            "stats": np.str_(json.dumps(stats)),
            **({} if self.dart_centres_nm is None else {"dart_centres_nm": self.dart_centres_nm,
                                                        "basin_counts": self.basin_counts}),
        })
        self.store.prune_flows(keep=flow_path)

    def restore(self, state: dict) -> None:
        """Continue from a checkpoint: drop chunks it does not count, reload everything else."""
        self.cycle = int(state["cycle"])
        self.training_end_cycle = int(state["training_end_cycle"])
        self.elapsed_s = float(state["elapsed_s"])
        self.next_chunk = int(state["next_chunk"])
        self.production_samples = int(state["production_samples"])
        removed = self.store.discard_chunks_from(self.next_chunk)
        if removed:
            self.store.log(f"resume: removed {removed} chunk(s) written after the last checkpoint")
        self.positions_nm = np.array(state["positions_nm"])
        self.energies_kj = np.array(state["energies_kj"])
        saved = torch.load(self.store.path / str(state["flow_file"]), weights_only=True)
        self.flow.load_state_dict(saved["flow"])
        self.optimizer.load_state_dict(saved["optimizer"])
        self.rng.bit_generator.state = json.loads(str(state["rng"]))
        self.torch_rng.set_state(torch.from_numpy(np.array(state["torch_rng"])))
        # Fresh noise: the integrator's seed is fixed when its context is made, so a resumed run
        # would otherwise replay the Langevin noise of the run's start.
        self.evaluator = EnergyEvaluator(
            self.system, self.settings.temperature_K,
            platform=self.evaluator.platform.getName(), timestep_ps=self.settings.timestep_fs * 1e-3,
            friction_per_ps=self.settings.friction_per_ps, seed=int(self.rng.integers(1, 2**31 - 1)),
            local_move=self.settings.local_move,
        )
        if "dart_centres_nm" in state:  # the first start's centres, not a re-minimization
            self.dart_centres_nm = np.array(state["dart_centres_nm"])
            self.darts = build_darts(self.zmat, self._all_moving, self.dart_centres_nm)
            self.basin_counts = np.array(state["basin_counts"])
        for name, values in json.loads(str(state["stats"])).items():
            recent = values.pop("recent")
            self.stats[name] = CycleStats(**values, recent=deque(map(tuple, recent), maxlen=20))
        if not self.production:  # rebuild the training buffer from the recorded training states
            for chunk in self.store.iter_chunks(upto=self.next_chunk):
                pos = chunk["state_positions_nm"][~chunk["state_production"].astype(bool)]
                if len(pos):
                    self._buffer_add(pos)

    # -- the loop -------------------------------------------------------------------------
    def request_stop(self, *_args) -> None:
        """Finish the current cycle, write a final checkpoint and return (SIGINT/SIGTERM)."""
        self._stop = True

    def run(self, budget: Budget, progress=None, stop_when=None) -> None:
        """Run cycles until the budget is spent or a stop is requested; checkpoint at the end.

        Parameters
        ----------
        budget : Budget
        progress : callable, optional
            Called as ``progress(sampler)`` after each cycle.
        stop_when : callable, optional
            Called as ``stop_when(sampler)`` after each checkpoint; True ends the run there.
        """
        previous = {sig: signal.signal(sig, self.request_stop) for sig in (signal.SIGINT, signal.SIGTERM)}
        try:
            if self.cycle == 0 and self.next_chunk == 0:
                self.flush()  # checkpoint zero: resume works even before the first chunk
            self._maybe_end_training()
            while not self._stop and not budget.done(self.production_samples, self.elapsed_s):
                self._cycle_start = time.perf_counter()
                self.run_cycle()
                self.elapsed_s += time.perf_counter() - self._cycle_start
                self._maybe_end_training()
                if progress is not None:
                    progress(self)
                if self.cycle % self.settings.cycles_per_chunk == 0:
                    self.flush()
                    if stop_when is not None and stop_when(self):
                        self.store.log(f"cycle {self.cycle}: stopping early, the stop condition holds")
                        break
            self.flush()
        finally:
            for sig, handler in previous.items():
                signal.signal(sig, handler)


def _concat(blocks: list[dict]) -> dict:
    if not blocks:
        return {}
    return {k: np.concatenate([b[k] for b in blocks]) for k in blocks[0]}
