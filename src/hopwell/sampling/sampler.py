"""The sampler: the scheduler that runs the moves over the walkers, training then production.

Each cycle, for each walker in turn (moves in :mod:`hopwell.moves`, each with its exact
Metropolis-Hastings ratio in its own docstring):

1. a local segment (:class:`~hopwell.moves.langevin.LangevinSegment`, Langevin or GHMC);
2. a block of flow proposals (:class:`~hopwell.moves.flow_block.FlowBlock`);
3. one-torsion redraws (:class:`~hopwell.moves.one_torsion.OneTorsion`), torsion-pair redraws
   when switched on (:class:`~hopwell.moves.torsion_pair.TorsionPair`), ring flips where the
   molecule has a saturated ring (:class:`~hopwell.moves.ring_flip.RingFlip`) and seed darts
   between the basins of the minimized seeds (:class:`~hopwell.sampling.basins.KnownBasins`).

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
from hopwell.coords.ring_flip import flippable_rings
from hopwell.coords.torsions import molecule_zmatrix
from hopwell.errors import InputError
from hopwell.flow.training import FlowTrainer
from hopwell.moves.base import MoveCounters, RandomStreams, Walkers
from hopwell.moves.flow_block import FlowBlock
from hopwell.moves.langevin import LangevinSegment
from hopwell.moves.one_torsion import OneTorsion
from hopwell.moves.ring_flip import RingFlip
from hopwell.moves.torsion_pair import TorsionPair
from hopwell.sampling.basins import KnownBasins
from hopwell.sampling.records import ChunkQueue, Snapshot
from hopwell.sampling.settings import Budget, SamplerSettings
from hopwell.sampling.store import MOVE_FLOW, MOVE_LANGEVIN, RunStore
from hopwell.systems.energy import EnergyEvaluator


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
        self.zmat = molecule_zmatrix(mol)
        self.guard = ProposalGuard.from_mol(mol, seeds_nm[0])
        self.rings = flippable_rings(mol)
        self.trainer = FlowTrainer(self.zmat, mol, seeds_nm, settings, settings.seed)
        darts = settings.method == "flow" and settings.darts_per_cycle > 0
        self.basins = KnownBasins(self.zmat, self.trainer.all_moving, mol, self.guard, settings,
                                  self.evaluator.minimize(seeds_nm) if darts else None)
        n_walkers = n_walkers or len(seeds_nm)
        positions = np.stack([seeds_nm[k % len(seeds_nm)] for k in range(n_walkers)])
        self.walkers = Walkers(positions, self.evaluator.energies_kj(positions))
        bad = np.flatnonzero(~np.isfinite(self.walkers.energies_kj))
        if len(bad):
            raise InputError(f"seed structure {int(bad[0]) % len(seeds_nm) + 1} has a non-finite energy"
                             " (overlapping atoms?); fix or drop it")
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
        self.torsion_pair = TorsionPair(self.trainer, self.guard, self.evaluator, s.pair_moves_per_cycle)
        self.ring_flip = RingFlip(self.rings, self.guard, self.evaluator, s.ring_flips_per_cycle)
        self.basins.build(self.evaluator)  # the seed darts and basin probes

    def _segment_evaluators(self) -> list[EnergyEvaluator]:
        """The evaluators the local segments run on: the sampler's, for every walker."""
        return [self.evaluator]

    @property
    def _all_moves(self) -> list:
        """Every move built, scheduled or not, the darts and probe aside: their counters are checkpointed."""
        return [self.local, self.flow_move, self.one_torsion, self.torsion_pair, self.ring_flip]

    @property
    def moves(self) -> list:
        """The moves that run each cycle, in order."""
        s = self.settings
        if s.method == "md":
            return [self.local]
        return [self.local] + [m for m, on in ((self.flow_move, s.proposals_per_cycle),
                                               (self.one_torsion, s.single_moves_per_cycle),
                                               (self.torsion_pair, s.pair_moves_per_cycle),
                                               (self.ring_flip, s.ring_flips_per_cycle and self.rings),
                                               (self.basins.darts, self.basins.darts is not None)) if on]

    @property
    def stats(self) -> dict[str, MoveCounters]:
        """Every move's counters by checkpoint key (``training``/``production`` for the flow)."""
        return {**self.flow_move.counters, "single": self.one_torsion.counters, "pair": self.torsion_pair.counters,
                "ring": self.ring_flip.counters, "dart": self.basins.dart_counters, "langevin": self.local.counters}

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
        self.basins.probe(self.walkers, self.cycle, production, self.streams.numpy, self._log)
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
            self.basins.count(self.walkers.positions_nm)  # running occupancy of the seeds' basins
        self.cycle += 1
        if not production and self.cycle % self.settings.fit_every == 0:
            self.trainer.fit(self.streams.numpy, self.streams.torch, self._log)

    def snapshot(self) -> Snapshot:
        """The walkers' positions and energies now, and the run's elapsed seconds."""
        return Snapshot(self.walkers.positions_nm.copy(), self.walkers.energies_kj.copy(),
                        self.elapsed_s + time.perf_counter() - self._cycle_start)

    # -- persistence ----------------------------------------------------------------------
    def _counters_json(self) -> dict:
        out = self.basins.state_dict()
        for move in self._all_moves:
            out.update(move.state_dict())
        return out

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
            **self.basins.state_arrays(),
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
        self.basins.load_state_arrays(state)
        self._build_moves()
        counters = json.loads(str(state["stats"]))
        for move in self._all_moves + [self.basins]:
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

