"""The known basins of a run: where the seed darts aim, and what the basin probes look beyond.

The known basins are the minimized seeds, then each basin a probe finds while the flow trains
(it becomes a dart centre, and the darts are rebuilt over the new centres); a basin found in
production is only recorded, since no move was built to reach it (:mod:`hopwell.sampling.probes`).
Production walker states are also counted per dart region: a running progress line for the
terminal, not an estimate. Everything here is checkpointed with the sampler's state.
"""

from __future__ import annotations

import json

import numpy as np
import torch
from rdkit import Chem

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import ZMatrix, cartesian_to_internal
from hopwell.coords.torsions import rotatable_rows
from hopwell.moves.base import MoveCounters, Walkers
from hopwell.moves.darts import (
    SeedDarts,
    build_darts,
    region_rows,
    rows_placing,
    rows_within,
)
from hopwell.sampling.probes import BasinProbe, FoundBasin
from hopwell.sampling.settings import SamplerSettings
from hopwell.systems.energy import EnergyEvaluator, kT_kj
from hopwell.systems.rings import saturated_six_rings


class KnownBasins:
    """Dart centres, the probes' finds, the darts and probe over them, and production occupancy.

    Parameters
    ----------
    zmat : ZMatrix
    moving : numpy.ndarray
        The Z-matrix rows the non-local moves turn (:attr:`FlowTrainer.all_moving`).
    mol : rdkit.Chem.Mol
        Its saturated six-rings and their heavy substituents are the darts' pucker coordinates.
    guard : ProposalGuard
    settings : SamplerSettings
    centres_nm : numpy.ndarray or None, shape ``(n_centres, n_atoms, 3)``
        The minimized seeds; None for a run without darts (then there is no probe either).
    """

    def __init__(self, zmat: ZMatrix, moving: np.ndarray, mol: Chem.Mol, guard: ProposalGuard,
                 settings: SamplerSettings, centres_nm: np.ndarray | None):
        self.zmat, self.moving, self.guard, self.settings = zmat, moving, guard, settings
        rings = saturated_six_rings(mol)
        self.ring_atoms = [ring.atoms for ring in rings]
        self.pucker_atoms = sorted({a for ring in rings for a in ring.atoms + tuple(x for _, x in ring.substituents)})
        self.centres_nm = centres_nm
        self.found: list[FoundBasin] = []
        self.darts: SeedDarts | None = None
        self.probe_move: BasinProbe | None = None
        self.counts = np.zeros(1, dtype=np.int64)  # production walker states per region, 0: outside all

    def build(self, evaluator: EnergyEvaluator) -> None:
        """The darts and the probe over ``evaluator`` and the current centres."""
        if self.centres_nm is None:
            return
        s = self.settings
        self._build_darts(evaluator)
        if s.probes_per_cycle + s.probe_every_production > 0:
            self.probe_move = BasinProbe(self.zmat, rotatable_rows(self.zmat, self.moving),
                                         region_rows(self.zmat, self.moving, self._pucker_rows()), self.guard,
                                         evaluator, s, kT_kj(s.temperature_K))

    def _pucker_rows(self) -> np.ndarray:
        return rows_placing(self.zmat, self.pucker_atoms)

    def _build_darts(self, evaluator: EnergyEvaluator) -> None:
        """The darts over the current centres, their counters kept; occupancy reset if regions changed."""
        darts = build_darts(self.zmat, self.moving, self.centres_nm, self._pucker_rows(),
                            np.concatenate([rows_within(self.zmat, r) for r in self.ring_atoms] + [[]]).astype(int))
        old = self.darts
        self.darts = SeedDarts(darts, self.zmat, self.guard, evaluator, self.settings.darts_per_cycle) if darts else None
        if old is not None and self.darts is not None:
            self.darts.counters = old.counters
        n_regions = 1 + (darts.n_centres if darts else 0)
        if len(self.counts) != n_regions:
            self.counts = np.zeros(n_regions, dtype=np.int64)

    @property
    def dart_counters(self) -> MoveCounters:
        return self.darts.counters if self.darts else MoveCounters()

    def probe(self, walkers: Walkers, cycle: int, production: bool, rng: np.random.Generator,
              log) -> None:
        """This cycle's probes from random walkers; a find in training becomes a dart centre."""
        s = self.settings
        if self.probe_move is None:
            return
        n = (s.probes_per_cycle if not production else
             int(s.probe_every_production > 0 and cycle % s.probe_every_production == 0))
        for _ in range(n):
            known = np.concatenate([self.centres_nm] + [b.positions_nm[None] for b in self.found if b.production])
            known_kj = self.probe_move.evaluator.energies_kj(known)
            walker = int(rng.integers(len(walkers)))
            found = self.probe_move.probe(walkers.positions_nm[walker], known, known_kj, rng)
            if found is None:
                continue
            positions_nm, energy_kj = found
            above_kj = energy_kj - float(known_kj.min())
            self.found.append(FoundBasin(cycle, production, energy_kj, above_kj, positions_nm))
            log(f"probe found a basin {above_kj:.1f} kJ/mol above the lowest known minimum"
                + (" in production: no move targets it" if production else "; it is a dart centre now"))
            if not production:
                self.centres_nm = np.concatenate([self.centres_nm, positions_nm[None]])
                self._build_darts(self.probe_move.evaluator)

    def count(self, positions_nm: np.ndarray) -> None:
        """Add production walker states to the per-region occupancy."""
        if self.darts is None:
            return
        with torch.no_grad():
            ic = cartesian_to_internal(self.zmat, torch.as_tensor(positions_nm))
        self.counts += np.bincount(self.darts.darts.region(ic.torsions_rad.numpy()) + 1, minlength=len(self.counts))

    def populations(self) -> np.ndarray | None:
        """Running share of production walker states in each seed's basin (dart region).

        A progress indicator, not an estimate: regions are balls around the minimized seeds,
        and the share outside all of them comes last. None without darts or samples yet.
        """
        total = self.counts.sum()
        if self.darts is None or total == 0:
            return None
        return np.concatenate([self.counts[1:], self.counts[:1]]) / total

    # -- persistence ----------------------------------------------------------------------
    def state_dict(self) -> dict:
        """The darts' and the probe's counters (entries of the checkpoint's ``stats``)."""
        return ({"dart": self.dart_counters.to_json()} | (self.darts.state_dict() if self.darts else {})
                | (self.probe_move.state_dict() if self.probe_move else {}))

    def load_state_dict(self, counters: dict) -> None:
        for part in (self.darts, self.probe_move):
            if part is not None:
                part.load_state_dict(counters)

    def state_arrays(self) -> dict:
        """Checkpoint arrays: the centres and occupancy (with darts), the finds (when any)."""
        out = {} if self.centres_nm is None else {"dart_centres_nm": self.centres_nm, "basin_counts": self.counts}
        if self.found:
            out |= {"found_basins": np.str_(json.dumps([b.as_dict() for b in self.found])),
                    "found_positions_nm": np.stack([b.positions_nm for b in self.found])}
        return out

    def load_state_arrays(self, state: dict) -> None:
        """Read :meth:`state_arrays` back (the first start's centres, not a re-minimization); then :meth:`build`."""
        if "dart_centres_nm" in state:
            self.centres_nm = np.array(state["dart_centres_nm"])
        if "basin_counts" in state:
            self.counts = np.array(state["basin_counts"])
        self.found = [FoundBasin(**found, positions_nm=x) for found, x in zip(
            json.loads(str(state.get("found_basins", "[]"))), state.get("found_positions_nm", []))]
