"""The sampler: the scheduler that runs the moves over the walkers, training then production.

Each cycle, for each walker in turn (moves in :mod:`hopwell.moves`, each with its exact
Metropolis-Hastings ratio in its own docstring):

1. a local segment (:class:`~hopwell.moves.langevin.LangevinSegment`, Langevin or GHMC);
2. a block of flow proposals (:class:`~hopwell.moves.flow_block.FlowBlock`);
3. one-torsion redraws (:class:`~hopwell.moves.one_torsion.OneTorsion`) and seed darts between
   the basins of the minimized seeds (:class:`~hopwell.moves.darts.SeedDarts`).

After the moves, basin probes look for minima outside every known basin
(:mod:`hopwell.sampling.probes`; they work on copies and never change a walker).

The chain state is recorded after the local segment and after the other moves (a fixed
sub-sampling of a stationary chain is stationary). During training the flow is refit every few
cycles on recent walker states (:class:`~hopwell.flow.training.FlowTrainer`); the chain is then
adaptive, not Markov, so these samples are kept for diagnostics only. Training ends at a set
cycle or time; from then on the flow is frozen and every walker state and every flow proposal
(with energy, log q and log J) is recorded as production. See :mod:`hopwell.sampling.store` for
the crash-safe run directory.
"""

from __future__ import annotations

import io
import json
import signal
import threading
import time

import numpy as np
import torch
from rdkit import Chem

from hopwell.coords.guards import ProposalGuard, refuse_failing_seeds
from hopwell.coords.internal import build_zmatrix, cartesian_to_internal
from hopwell.flow.training import FlowTrainer
from hopwell.moves.base import MoveCounters, RandomStreams, Walkers
from hopwell.coords.torsions import rotatable_rows
from hopwell.moves.darts import SeedDarts, build_darts, region_rows, rows_placing, rows_within
from hopwell.moves.flow_block import FlowBlock
from hopwell.moves.langevin import LangevinSegment
from hopwell.moves.one_torsion import OneTorsion
from hopwell.sampling.probes import BasinProbe, FoundBasin
from hopwell.sampling.records import ChunkQueue, Snapshot
from hopwell.sampling.settings import Budget, SamplerSettings
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore
from hopwell.systems.builder import rotatable_bonds
from hopwell.systems.energy import EnergyEvaluator, kT_kj
from hopwell.systems.rings import saturated_six_rings


class Sampler:
    """Owns the OpenMM context, the flow, the walkers, the moves and the RNGs of one run.

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
        self.streams = RandomStreams.seeded(settings.seed)
        self.evaluator = self._evaluator(settings.temperature_K, platform)
        self.zmat = build_zmatrix(
            mol.GetNumAtoms(), [(b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds()],
            heavy=[a.GetAtomicNum() > 1 for a in mol.GetAtoms()], rotatable=rotatable_bonds(mol))
        self.guard = ProposalGuard.from_mol(mol, seeds_nm[0])
        # Saturated six-rings and their heavy substituents: the darts' pucker coordinates.
        self.ring_atoms = [ring.atoms for ring in saturated_six_rings(mol)]
        self.pucker_atoms = sorted({a for ring in saturated_six_rings(mol)
                                    for a in ring.atoms + tuple(x for _, x in ring.substituents)})
        self.trainer = FlowTrainer(self.zmat, mol, seeds_nm, settings, settings.seed)
        # The known basins: the minimized seeds and the probes' finds in training (the dart
        # centres), then the finds in production; all kept in the checkpoint.
        self.dart_centres_nm = None
        if settings.method == "flow" and settings.darts_per_cycle > 0:
            self.dart_centres_nm = self.evaluator.minimize(seeds_nm)
        self.found_basins: list[FoundBasin] = []
        n_walkers = n_walkers or len(seeds_nm)
        positions = np.stack([seeds_nm[k % len(seeds_nm)] for k in range(n_walkers)])
        self.walkers = Walkers(positions, self.evaluator.energies_kj(positions))
        if not np.all(np.isfinite(self.walkers.energies_kj)):
            raise ValueError("a seed structure has a non-finite energy")
        refuse_failing_seeds(self.guard, seeds_nm)  # walkers start from the seeds in turn
        self._build_moves()
        self.cycle, self.training_end_cycle, self.elapsed_s = 0, -1, 0.0
        self.next_chunk, self.production_samples = 0, 0
        self._stop = False
        self.queue = ChunkQueue()
        self._cycle_start = time.perf_counter()

    def _evaluator(self, temperature_K: float, platform: str | None) -> EnergyEvaluator:
        """A fresh context and integrator at ``temperature_K``, its noise seeded from the run's RNG."""
        s = self.settings
        return EnergyEvaluator(self.system, temperature_K, platform=platform, timestep_ps=s.timestep_fs * 1e-3,
                               friction_per_ps=s.friction_per_ps, seed=int(self.streams.numpy.integers(1, 2**31 - 1)),
                               local_move=s.local_move)

    def _log(self, message: str) -> None:
        self.store.log(f"cycle {self.cycle} {message}")

    def _build_moves(self) -> None:
        """The moves over the current evaluator and dart centres."""
        s = self.settings
        self.local = LangevinSegment(self._segment_evaluators(), s.langevin_steps, self._log, guard=self.guard)
        self.flow_move = FlowBlock(self.trainer, self.guard, self.evaluator, s.proposals_per_cycle)
        self.one_torsion = OneTorsion(self.trainer, self.guard, self.evaluator, s.single_moves_per_cycle)
        self._build_darts()
        pucker_rows = rows_placing(self.zmat, self.pucker_atoms)
        self.basin_probe = (BasinProbe(self.zmat, rotatable_rows(self.zmat, self.trainer.all_moving),
                                       region_rows(self.zmat, self.trainer.all_moving, pucker_rows), self.guard,
                                       self.evaluator, s, kT_kj(s.temperature_K))
                            if self.dart_centres_nm is not None and s.probes_per_cycle + s.probe_every_production > 0
                            else None)  # the dart centres are the known basins

    def _build_darts(self) -> None:
        """The seed darts over the current dart centres (their counters kept when rebuilt)."""
        old = getattr(self, "seed_darts", None)
        darts = (build_darts(self.zmat, self.trainer.all_moving, self.dart_centres_nm,
                             rows_placing(self.zmat, self.pucker_atoms),
                             np.concatenate([rows_within(self.zmat, r) for r in self.ring_atoms] + [[]]).astype(int))
                 if self.dart_centres_nm is not None else None)
        self.seed_darts = (SeedDarts(darts, self.zmat, self.guard, self.evaluator, self.settings.darts_per_cycle)
                           if darts else None)
        if old is not None and self.seed_darts is not None:
            self.seed_darts.counters = old.counters
        # Production walker states per dart region (index 0: outside every region).
        self.basin_counts = np.zeros(1 + (darts.n_centres if darts else 0), dtype=np.int64)

    def _segment_evaluators(self) -> list[EnergyEvaluator]:
        """The evaluators the local segments run on: the sampler's, for every walker."""
        return [self.evaluator]

    @property
    def _all_moves(self) -> list:
        """Every move built, scheduled or not: their counters are all checkpointed."""
        return [self.local, self.flow_move, self.one_torsion] + ([self.seed_darts] if self.seed_darts else [])

    @property
    def moves(self) -> list:
        """The moves that run each cycle, in order."""
        s = self.settings
        if s.method == "md":
            return [self.local]
        return [self.local] + [m for m, on in ((self.flow_move, s.proposals_per_cycle),
                                               (self.one_torsion, s.single_moves_per_cycle),
                                               (self.seed_darts, self.seed_darts is not None)) if on]

    @property
    def stats(self) -> dict[str, MoveCounters]:
        """Every move's counters by checkpoint key (``training``/``production`` for the flow)."""
        return {**self.flow_move.counters, "single": self.one_torsion.counters,
                "dart": self.seed_darts.counters if self.seed_darts else MoveCounters(),
                "langevin": self.local.counters}

    @property
    def n_walkers(self) -> int:
        return len(self.walkers)

    @property
    def production(self) -> bool:
        return self.training_end_cycle >= 0

    def _set_phase(self) -> None:
        self.flow_move.production = self.production
        self.local.pieces = 1 if self.production else self.settings.buffer_frames_per_segment
        # Production Langevin states failing the guard: only the Monte Carlo moves ("flow") use it.
        self.local.count_guard = self.production and self.settings.method == "flow"

    def _maybe_end_training(self) -> None:
        s = self.settings
        if not self.production and (self.cycle >= s.training_cycles or (
                s.training_seconds is not None and self.elapsed_s >= s.training_seconds)):
            self.training_end_cycle = self.cycle
            self.store.log(f"cycle {self.cycle}: training ended, flow frozen; acceptance in"
                           f" training {self.stats['training'].acceptance():.3f}")
        self._set_phase()

    def basin_populations(self) -> np.ndarray | None:
        """Running share of production walker states in each seed's basin (dart region).

        A progress indicator, not an estimate: regions are balls around the minimized seeds,
        and the share outside all of them comes last. None without darts or samples yet.
        """
        total = self.basin_counts.sum()
        if self.seed_darts is None or total == 0:
            return None
        return np.concatenate([self.basin_counts[1:], self.basin_counts[:1]]) / total

    def run_cycle(self) -> None:
        """One cycle over all walkers; queues the records for the next chunk.

        Each move is applied to all walkers at once, so that a move can batch its work over
        them (the flow block's networks, the guards, the energy loops). Every walker still sees
        the moves in the same order (local segment, then the others); the walkers are
        independent, so the order across walkers changes nothing.
        """
        production = self.production
        local, *others = self.moves
        which = np.arange(self.n_walkers)
        result = local.apply(self.walkers, which, self.streams)
        if result.frames_nm is not None:
            self.trainer.add(result.frames_nm)
        after_local = self.snapshot()
        moved = np.zeros(self.n_walkers, dtype=bool)
        for move in others:
            result = move.apply(self.walkers, which, self.streams)
            if move is self.flow_move:
                moved = np.asarray(result.accepted, dtype=bool)
                if result.proposals is not None:
                    self.queue.add_proposals(result.proposals | {
                        "cycle": np.full(len(result.proposals["walker"]), self.cycle, np.int64)})
        after_all = self.snapshot()
        self._probe()
        for walker in which:  # records in walker order, each walker's local state first
            self.queue.add_state(after_local, walker, self.cycle, MOVE_LANGEVIN, production)
            if others:
                self.queue.add_state(after_all, walker, self.cycle, MOVE_FLOW, production,
                                     accepted=bool(moved[walker]))
        recorded = [after_local] + ([after_all] if others else [])
        if not production:  # the training buffer gets the recorded states, in the same order
            self.trainer.add(np.stack([s.positions_nm for s in recorded], axis=1)
                             .reshape(-1, *self.walkers.positions_nm.shape[1:]).astype(np.float32))
        else:
            self.production_samples += self.n_walkers * len(recorded)
            if self.seed_darts is not None:  # running occupancy of the seeds' basins, for progress
                with torch.no_grad():
                    ic = cartesian_to_internal(self.zmat, torch.as_tensor(self.walkers.positions_nm))
                self.basin_counts += np.bincount(self.seed_darts.darts.region(ic.torsions_rad.numpy()) + 1,
                                                 minlength=len(self.basin_counts))
        self.cycle += 1
        if not production and self.cycle % self.settings.fit_every == 0:
            self.trainer.fit(self.streams.numpy, self.streams.torch, self._log)

    def snapshot(self) -> Snapshot:
        """The walkers' positions and energies now, and the run's elapsed seconds."""
        return Snapshot(self.walkers.positions_nm.copy(), self.walkers.energies_kj.copy(),
                        self.elapsed_s + time.perf_counter() - self._cycle_start)

    def _probe(self) -> None:
        """This cycle's basin probes; a find in training becomes a dart centre."""
        s = self.settings
        if self.basin_probe is None:
            return
        n = (s.probes_per_cycle if not self.production else
             int(s.probe_every_production > 0 and self.cycle % s.probe_every_production == 0))
        for _ in range(n):
            known = np.concatenate([self.dart_centres_nm] + [b.positions_nm[None] for b in self.found_basins
                                                              if b.production])
            known_kj = self.evaluator.energies_kj(known)
            walker = int(self.streams.numpy.integers(self.n_walkers))
            found = self.basin_probe.probe(self.walkers.positions_nm[walker], known, known_kj, self.streams.numpy)
            if found is None:
                continue
            positions_nm, energy_kj = found
            lowest = float(known_kj.min())
            self.found_basins.append(FoundBasin(self.cycle, self.production, energy_kj, energy_kj - lowest, positions_nm))
            self._log(f"probe found a basin {energy_kj - lowest:.1f} kJ/mol above the lowest known minimum"
                      + (" in production: no move targets it" if self.production else "; it is a dart centre now"))
            if not self.production:
                self.dart_centres_nm = np.concatenate([self.dart_centres_nm, positions_nm[None]])
                self._build_darts()

    # -- persistence ----------------------------------------------------------------------
    def _counters_json(self) -> dict:
        out = {"dart": MoveCounters().to_json()}
        for move in self._all_moves:
            out.update(move.state_dict())
        return out | (self.basin_probe.state_dict() if self.basin_probe else {})

    def flush(self) -> None:
        """Write queued cycles as one chunk, then the checkpoint that counts it."""
        if self.queue:
            self.store.write_chunk(self.next_chunk, *self.queue.take())
            self.next_chunk += 1
        # Atomic like every other file: a flush at the checkpoint's own cycle (the run's last
        # one, or a resume from checkpoint zero) rewrites the flow file state.npz names.
        buffer = io.BytesIO()
        torch.save(self.trainer.state_dict(), buffer)
        flow_path = self.store.write_flow(self.cycle, buffer.getvalue())
        self.store.write_state({
            "cycle": np.int64(self.cycle), "next_chunk": np.int64(self.next_chunk),
            "training_end_cycle": np.int64(self.training_end_cycle), "elapsed_s": np.float64(self.elapsed_s),
            "production_samples": np.int64(self.production_samples),
            "positions_nm": self.walkers.positions_nm, "energies_kj": self.walkers.energies_kj,
            "flow_file": np.str_(flow_path.name),
            **self.streams.state_arrays(),
            "stats": np.str_(json.dumps(self._counters_json())),
            **({} if self.dart_centres_nm is None else {"dart_centres_nm": self.dart_centres_nm,
                                                        "basin_counts": self.basin_counts}),
            **({} if not self.found_basins else {
                "found_basins": np.str_(json.dumps([b.as_dict() for b in self.found_basins])),
                "found_positions_nm": np.stack([b.positions_nm for b in self.found_basins])}),
        })
        self.store.prune_flows()

    def restore(self, state: dict, flow_state: dict) -> None:
        """Continue from a checkpoint: drop chunks it does not count, reload everything else.

        Parameters
        ----------
        state : dict
            The checkpoint's arrays (:class:`~hopwell.sampling.checkpoint.Checkpoint`).
        flow_state : dict
            The flow checkpoint it names, loaded with ``weights_only=True``.
        """
        self.cycle, self.training_end_cycle = int(state["cycle"]), int(state["training_end_cycle"])
        self.elapsed_s, self.next_chunk = float(state["elapsed_s"]), int(state["next_chunk"])
        self.production_samples = int(state["production_samples"])
        removed = self.store.discard_chunks_from(self.next_chunk)
        if removed:
            self.store.log(f"resume: removed {removed} chunk(s) written after the last checkpoint")
        self.walkers = Walkers(np.array(state["positions_nm"]), np.array(state["energies_kj"]))
        self.trainer.load_state_dict(flow_state)
        self.streams.load_state_arrays(state)
        # Fresh noise: the integrator's seed is fixed when its context is made, so a resumed run
        # would otherwise replay the Langevin noise of the run's start.
        self.evaluator = self._evaluator(self.settings.temperature_K, self.evaluator.platform.getName())
        if "dart_centres_nm" in state:  # the first start's centres, not a re-minimization
            self.dart_centres_nm = np.array(state["dart_centres_nm"])
        self._build_moves()
        if "basin_counts" in state:
            self.basin_counts = np.array(state["basin_counts"])
        self.found_basins = [FoundBasin(**found, positions_nm=x) for found, x in zip(
            json.loads(str(state.get("found_basins", "[]"))), state.get("found_positions_nm", []))]
        counters = json.loads(str(state["stats"]))
        for move in self._all_moves + ([self.basin_probe] if self.basin_probe else []):
            move.load_state_dict(counters)
        self._set_phase()
        if not self.production:  # rebuild the training buffer from the recorded training states
            # (a damaged chunk's states are left out; resume has named it already)
            for chunk in self.store.iter_chunks(upto=self.next_chunk, damaged=[]):
                pos = chunk["state_positions_nm"][~chunk["state_production"].astype(bool)]
                if len(pos):
                    self.trainer.add(pos)

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
        in_main = threading.current_thread() is threading.main_thread()  # a Dask task runs in a worker thread
        previous = {sig: signal.signal(sig, self.request_stop) for sig in (signal.SIGINT, signal.SIGTERM)
                    if in_main}
        try:
            if self.cycle == 0 and self.next_chunk == 0:
                self.flush()  # checkpoint zero: resume works even before the first chunk
            self._maybe_end_training()
            while not self._stop and not budget.done(self.production_samples, self.elapsed_s) \
                    and not (budget.training_only and self.production):
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

