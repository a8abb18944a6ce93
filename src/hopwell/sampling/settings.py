"""The settings of a run and its budget.

:class:`SamplerSettings` is every setting of a run, flat as written to ``run.toml``; each group
lives with the part it belongs to (the moves, the flow's training) and is gathered here.
"""

from __future__ import annotations

from dataclasses import dataclass

from hopwell.flow.training import FlowSettings
from hopwell.moves.darts import DartSettings
from hopwell.moves.exchange import LadderSettings
from hopwell.moves.flow_block import FlowBlockSettings
from hopwell.moves.langevin import LangevinSettings
from hopwell.moves.one_torsion import OneTorsionSettings
from hopwell.moves.ring_flip import RingFlipSettings
from hopwell.moves.torsion_pair import TorsionPairSettings
from hopwell.sampling.probes import ProbeSettings


@dataclass
class ScheduleSettings:
    """Settings of the run as a whole.

    Attributes
    ----------
    temperature_K : float
    method : {"flow", "md", "remd"}
        "flow": local segments plus flow, one-torsion and dart moves; "md": the local segments
        alone (the plain-MD baseline, from the same seeds, into the same kind of run directory);
        "remd": temperature replica exchange (:mod:`hopwell.sampling.replica`).
    cycles_per_chunk : int
        Cycles between chunk writes and checkpoints.
    seed : int
    """

    temperature_K: float = 300.0
    method: str = "flow"
    cycles_per_chunk: int = 10
    seed: int = 2024


@dataclass
class SamplerSettings(ProbeSettings, FlowSettings, DartSettings, RingFlipSettings, TorsionPairSettings, OneTorsionSettings,
                      FlowBlockSettings, LadderSettings, LangevinSettings, ScheduleSettings):
    """Every setting of a run, flat as written to ``run.toml``; each group is documented with the
    part it belongs to: :class:`ScheduleSettings`, :class:`~hopwell.moves.langevin.LangevinSettings`,
    :class:`~hopwell.moves.exchange.LadderSettings`, :class:`~hopwell.moves.flow_block.FlowBlockSettings`,
    :class:`~hopwell.moves.one_torsion.OneTorsionSettings`,
    :class:`~hopwell.moves.torsion_pair.TorsionPairSettings`, :class:`~hopwell.moves.ring_flip.RingFlipSettings`,
    :class:`~hopwell.moves.darts.DartSettings`,
    :class:`~hopwell.sampling.probes.ProbeSettings` and :class:`~hopwell.flow.training.FlowSettings`."""


@dataclass
class Budget:
    """When to stop: production samples recorded, or sampling seconds spent (or both).

    Seconds count over the whole run, resumes included (the checkpoint keeps the elapsed time).
    """

    samples: int | None = None
    seconds: float | None = None
    training_only: bool = False  # stop when training ends (sharded runs: production is in shards)

    def done(self, production_samples: int, elapsed_s: float) -> bool:
        if self.samples is not None and production_samples >= self.samples:
            return True
        return self.seconds is not None and elapsed_s >= self.seconds
