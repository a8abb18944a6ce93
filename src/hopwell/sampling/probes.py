"""Probes for basins nobody seeded: kick a copy of a walker, minimize it, compare with the known basins.

The method's known limit is that walkers sample the basins they are shown or can reach. A probe
looks beyond them without touching the chain: it copies one walker's structure, redraws between
one and ``probe_max_torsions`` of its rotatable torsions uniformly on the circle (each turning its
whole group rigidly about the bond, bonds and angles kept), refuses the copy if it clashes or
changes a stereocentre (:class:`hopwell.coords.guards.ProposalGuard`), minimizes it with OpenMM's
L-BFGS and reads the region torsions of the minimum (those of the seed darts: the rotatable and
ring-pucker torsions, :func:`hopwell.moves.darts.region_rows`). The minimum is a new basin when it
lies at least :data:`hopwell.moves.darts.MIN_SEPARATION_RAD` from every known basin centre in
those torsions (the darts' own criterion for distinct centres), passes the guard, and its energy
is at most ``probe_window_kT`` above the lowest known minimum.

While the flow trains, a new basin becomes a dart centre (the darts adapt only in that phase,
like the flow), so the walkers can jump there from then on. In production nothing changes; a
basin found then is recorded, and the verdict calls the run not converged: no move was built to
reach it, so its population may be missing from the estimate. Every find is written to the
checkpoint with its structure, and the report lists it ("found during the run: seed it next
time").

The walkers' states, energies and Metropolis decisions never depend on a probe (it works on a
copy and only draws from the shared random stream), so the chain's stationary distribution is
the same with or without probes.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np
import torch

from hopwell.coords.guards import ProposalGuard
from hopwell.coords.internal import ZMatrix, cartesian_to_internal, internal_to_cartesian
from hopwell.moves.darts import MIN_SEPARATION_RAD, torsion_distance

MINIMIZE_ITERATIONS = 2000  # L-BFGS iterations per probe at most


@dataclass
class ProbeSettings:
    """Settings of the basin probes.

    Attributes
    ----------
    probes_per_cycle : int
        Probes per cycle while the flow trains (0 turns the probes off).
    probe_every_production : int
        Cycles between probes in production (0: none in production).
    probe_window_kT : float
        A minimum more than this many kT above the lowest known one is not reported.
    probe_max_torsions : int
        At most this many rotatable torsions are redrawn per probe.
    """

    probes_per_cycle: int = 1
    probe_every_production: int = 20
    probe_window_kT: float = 10.0
    probe_max_torsions: int = 3


@dataclass
class ProbeCounters:
    """What the probes did: run, refused by the guard before or after minimizing, new basins."""

    probes: int = 0
    refused_before: int = 0
    refused_after: int = 0
    found: int = 0

    def to_json(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class FoundBasin:
    """A minimum outside every known basin.

    Attributes
    ----------
    cycle : int
    production : bool
        Found in production (it is then not a dart centre).
    energy_kj : float
        Its minimized energy.
    above_lowest_kj : float
        Its energy above the lowest known minimum when it was found.
    positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
    """

    cycle: int
    production: bool
    energy_kj: float
    above_lowest_kj: float
    positions_nm: np.ndarray = field(repr=False)

    def as_dict(self) -> dict:
        """Everything but the positions, for the checkpoint's JSON and the summary."""
        return {"cycle": self.cycle, "production": self.production, "energy_kj": self.energy_kj,
                "above_lowest_kj": self.above_lowest_kj}


def kicked_torsions(torsions_rad: np.ndarray, kick_rows: np.ndarray, max_torsions: int,
                    rng: np.random.Generator) -> np.ndarray:
    """A copy of ``torsions_rad`` with 1 to ``max_torsions`` of ``kick_rows`` drawn uniformly on the circle."""
    out = np.array(torsions_rad, dtype=float)
    n = int(rng.integers(1, min(max_torsions, len(kick_rows)) + 1))
    rows = rng.choice(kick_rows, size=n, replace=False)
    out[rows] = rng.uniform(-np.pi, np.pi, size=n)
    return out


def is_new_basin(torsions_rad: np.ndarray, centre_torsions_rad: np.ndarray, rows: np.ndarray) -> bool:
    """True if ``torsions_rad`` is at least the darts' minimum separation from every centre in ``rows``."""
    if len(centre_torsions_rad) == 0:
        return True
    distance = torsion_distance(np.asarray(torsions_rad)[None, rows], np.asarray(centre_torsions_rad)[:, rows])
    return bool(distance.min() >= MIN_SEPARATION_RAD)


class BasinProbe:
    """Runs probes (see the module docstring) against a growing list of known basin centres.

    Parameters
    ----------
    zmat : ZMatrix
    kick_rows : numpy.ndarray of int
        Torsion rows a probe may redraw (principal rows about rotatable bonds).
    region_rows : numpy.ndarray of int
        Torsion rows that tell basins apart.
    guard : ProposalGuard
    evaluator : EnergyEvaluator
    settings : ProbeSettings
    kT_kj : float
    """

    def __init__(self, zmat: ZMatrix, kick_rows: np.ndarray, region_rows: np.ndarray, guard: ProposalGuard,
                 evaluator, settings: ProbeSettings, kT_kj: float):
        self.zmat, self.kick_rows, self.region_rows = zmat, np.asarray(kick_rows, int), np.asarray(region_rows, int)
        self.guard, self.evaluator, self.settings, self.kT_kj = guard, evaluator, settings, kT_kj
        self.counters = ProbeCounters()

    def _torsions(self, positions_nm: np.ndarray) -> tuple:
        with torch.no_grad():
            return cartesian_to_internal(self.zmat, torch.as_tensor(np.asarray(positions_nm, float)))

    def probe(self, positions_nm: np.ndarray, centres_nm: np.ndarray, centre_energies_kj: np.ndarray,
              rng: np.random.Generator) -> tuple[np.ndarray, float] | None:
        """One probe from ``positions_nm`` (one structure); the new minimum and its energy, or None.

        Parameters
        ----------
        positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
        centres_nm : numpy.ndarray, shape ``(n_centres, n_atoms, 3)``
            The known basins' minima.
        centre_energies_kj : numpy.ndarray, shape ``(n_centres,)``
        rng : numpy.random.Generator
        """
        if len(self.kick_rows) == 0:
            return None
        self.counters.probes += 1
        ic = self._torsions(positions_nm[None])
        torsions = kicked_torsions(ic.torsions_rad.numpy()[0], self.kick_rows, self.settings.probe_max_torsions, rng)
        with torch.no_grad():
            start, _ = internal_to_cartesian(self.zmat, ic.bonds_nm, ic.angles_rad, torch.as_tensor(torsions)[None])
        start = start.numpy()
        if self.guard(start).rejected[0]:
            self.counters.refused_before += 1
            return None
        minimum = self.evaluator.minimize(start, max_iterations=MINIMIZE_ITERATIONS)
        if self.guard(minimum).rejected[0]:
            self.counters.refused_after += 1
            return None
        energy_kj = float(self.evaluator.energies_kj(minimum)[0])
        lowest_kj = float(np.min(centre_energies_kj)) if len(centre_energies_kj) else energy_kj
        if not np.isfinite(energy_kj) or energy_kj - lowest_kj > self.settings.probe_window_kT * self.kT_kj:
            return None
        centre_torsions = self._torsions(centres_nm).torsions_rad.numpy() if len(centres_nm) else np.empty((0, 0))
        if not is_new_basin(self._torsions(minimum).torsions_rad.numpy()[0], centre_torsions, self.region_rows):
            return None
        self.counters.found += 1
        return minimum[0], energy_kj

    def state_dict(self) -> dict:
        return {"probe": self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = ProbeCounters(**state.get("probe", {}))
