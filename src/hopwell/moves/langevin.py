"""Local moves: a short Langevin (or GHMC) segment per walker, run by OpenMM.

Velocities are drawn afresh from Maxwell-Boltzmann at the start of each segment and moved to the
integrator's half step (:meth:`hopwell.systems.energy.EnergyEvaluator.langevin`). There is no
Metropolis-Hastings ratio for unadjusted Langevin: it leaves the Boltzmann distribution
invariant up to the time step's own error (measured and stated in DEVELOPERS.md). The GHMC
integrator (``local_move="ghmc"``, :mod:`hopwell.systems.integrators`) accepts each step with::

    alpha = min(1, exp(-(H(x', v') - H(x, v)) / kT))

and is exact for any time step. A segment whose energy rises by more than ``EXPLOSION_KJ`` or
turns non-finite is an integration failure, not thermal motion: it is undone (the walker keeps
its state), logged and counted (``rolled_back``); such vetoes after the fact bias the chain if
they are frequent, so the report shows the count.

The Monte Carlo moves reject every proposal that fails the clash or stereo guard
(:mod:`hopwell.coords.guards`), so they are reversible only among states that pass it. Seeds that
fail it are refused; in production each state a segment leads to is checked, and those that fail
are counted (``outside_guard``, expected 0; the verdict warns otherwise).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from hopwell.moves.base import MoveCounters, MoveResult, RandomStreams, Walkers
from hopwell.systems.energy import EnergyEvaluator

# Energy rise (kJ/mol) over one Langevin segment taken as an explosion, not thermal motion:
# thermal fluctuations of U are ~ kT sqrt(3N/2), a few tens of kJ/mol for N < 300.
EXPLOSION_KJ = 5.0e3


@dataclass
class LangevinSettings:
    """Settings of the local move.

    Attributes
    ----------
    local_move : {"langevin", "ghmc"}
        Unadjusted Langevin or exact GHMC segments (:mod:`hopwell.systems.integrators`).
    timestep_fs, friction_per_ps : float
        Integrator settings; no constraints, so 1 fs (DEVELOPERS.md states the measured bias).
    langevin_steps : int
        Steps per segment.
    buffer_frames_per_segment : int
        During training, frames per segment handed back for the flow fit (the segment is run
        in this many pieces, velocities carried over).
    """

    local_move: str = "langevin"
    timestep_fs: float = 1.0
    friction_per_ps: float = 1.0
    langevin_steps: int = 250
    buffer_frames_per_segment: int = 5


@dataclass
class LangevinCounters(MoveCounters):
    """Segments run (``proposed``), kept (``accepted``) and undone after an explosion
    (``rolled_back``); ``outside_guard`` counts production states that fail the clash or stereo
    guard (expected 0: the Monte Carlo moves are reversible only between states that pass)."""

    rolled_back: int = 0
    outside_guard: int = 0

    def to_json(self) -> dict:
        return super().to_json() | {"rolled_back": self.rolled_back, "outside_guard": self.outside_guard}

    @classmethod
    def from_json(cls, values: dict) -> LangevinCounters:
        base = MoveCounters.from_json(values)
        return cls(base.proposed, base.accepted, base.clash, base.stereo, base.recent,
                   int(values.get("rolled_back", 0)), int(values.get("outside_guard", 0)))


class LangevinSegment:
    """One local-move segment per walker (see the module docstring).

    Parameters
    ----------
    evaluators : list of EnergyEvaluator
        Their contexts and integrators run the segments: one for all walkers, or one per walker
        (the rungs of a temperature ladder); an evaluator's temperature is its segments'.
    steps : int
        Steps per segment.
    log : callable
        ``log(message)``: where rolled-back segments are reported (the scheduler prefixes the
        cycle).
    name : str
        The move's key in the checkpoint's counters.
    guard : ProposalGuard, optional
        Checks the states segments lead to while ``count_guard`` is set (the scheduler sets it
        in production); failures are counted in ``counters.outside_guard``.
    """

    def __init__(self, evaluators: list[EnergyEvaluator], steps: int, log, name: str = "langevin", guard=None):
        self.evaluators, self.steps, self.log, self.name = list(evaluators), int(steps), log, name
        self.guard, self.count_guard = guard, False
        self.counters = LangevinCounters()
        self.pieces = 1  # > 1 during training: intermediate frames are handed back
        self.label = "walker"  # what a walker is called in log lines ("rung" for replicas)

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        accepted = np.zeros(len(which), dtype=bool)
        frames = []
        for k, walker in enumerate(which):
            evaluator = self.evaluators[walker if len(self.evaluators) > 1 else 0]
            x0, e0 = walkers.positions_nm[walker], walkers.energies_kj[walker]
            x, v, pieces = x0, None, []
            for steps in np.diff(np.linspace(0, self.steps, self.pieces + 1).astype(int)):
                x, v, e = evaluator.langevin(x, int(steps), v)
                pieces.append(x)
            self.counters.proposed += 1
            if not (np.isfinite(e) and np.all(np.isfinite(x))) or e - e0 > EXPLOSION_KJ:
                self.counters.rolled_back += 1
                self.log(f"{self.label} {walker}: Langevin segment gave energy"
                         f" {e:.4g} kJ/mol (from {e0:.4g}); rolled back to the previous state")
                continue
            walkers.set(walker, x, e)
            self.counters.accepted += 1
            accepted[k] = True
            frames.extend(pieces[:-1])
        if self.count_guard and self.guard is not None and accepted.any():
            # A rolled-back segment leaves the previous state, already counted or passed.
            new_states = walkers.positions_nm[np.asarray(which)[accepted]]
            self.counters.outside_guard += int(np.asarray(self.guard(new_states).rejected).sum())
        return MoveResult(accepted, frames_nm=np.stack(frames) if frames else None)

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = LangevinCounters.from_json(state.get(self.name, {}))
