"""Seed darts: exact jumps between the basins of the seed structures.

Smart darting Monte Carlo (Andricioaei, Straub & Voter 2001, J. Chem. Phys. 114, 6994), here in
internal coordinates. Each seed, minimized, is a dart centre ``c_k`` (bonds, angles, torsions).
Around each centre lies a region: the states whose rotatable torsions (principal torsions about
rotatable bonds) are within ``radius`` of the centre's, in the Euclidean norm of the wrapped
differences. The radius is at most half the smallest distance between centres, so regions never
overlap. A dart from a state ``q`` in region ``i`` picks another centre ``j`` uniformly and
proposes ``q' = q + (c_j - c_i)`` in every internal coordinate: the walker's thermal displacement
from its own basin's minimum is carried to the other basin, bond lengths and angles included,
which a torsion-only jump cannot do (a rigid (phi, psi) jump of Ace-Ala-NMe from C7eq into C7ax
was measured here to cost 12 kJ/mol at best and 47 kJ/mol at the median).

``q'`` lies in region ``j`` at the same offset, and the reverse dart (chosen with the same
probability ``1 / (K - 1)``) returns exactly to ``q``. The translation has unit Jacobian in
internal coordinates, where the target is ``exp(-u) J(q)``, so::

    alpha = min(1, exp(-u(x') + u(x)) * J(q') / J(q))

States outside every region make no dart (the move is then the identity), and proposals with an
angle outside (0, pi) have target density zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from hopwell.coords.internal import (
    InternalCoords,
    ZMatrix,
    cartesian_to_internal,
    internal_to_cartesian,
)
from hopwell.coords.torsions import rotatable_rows
from hopwell.moves.base import MoveCounters, MoveResult, RandomStreams, Walkers

MIN_SEPARATION_RAD = np.radians(60.0)  # centres closer than this to a kept one are dropped
MAX_RADIUS_RAD = np.radians(90.0)


def wrapped(angle_rad: np.ndarray) -> np.ndarray:
    """Angles mapped to ``[-pi, pi)``."""
    return np.remainder(np.asarray(angle_rad) + np.pi, 2 * np.pi) - np.pi


def torsion_distance(a_rad: np.ndarray, b_rad: np.ndarray) -> np.ndarray:
    """Euclidean norm of wrapped differences over the last axis (broadcasting)."""
    return np.sqrt(np.sum(wrapped(np.asarray(a_rad) - np.asarray(b_rad)) ** 2, axis=-1))


def distinct_centres(rotatable_rad: np.ndarray, min_separation_rad: float = MIN_SEPARATION_RAD) -> np.ndarray:
    """Indices of centres kept in order, each at least ``min_separation_rad`` from those kept."""
    kept: list[int] = []
    for k in range(len(rotatable_rad)):
        if all(torsion_distance(rotatable_rad[k], rotatable_rad[j]) >= min_separation_rad for j in kept):
            kept.append(k)
    return np.array(kept, dtype=int)


@dataclass(frozen=True)
class Darts:
    """Dart centres in internal coordinates and the shared region radius.

    Attributes
    ----------
    bonds_nm, angles_rad, torsions_rad : numpy.ndarray, shapes ``(K, n_atoms - 1)`` etc.
        The centres' internal coordinates (:class:`hopwell.coords.internal.InternalCoords` layout).
    rows : numpy.ndarray of int
        Torsion rows that define the regions.
    radius_rad : float
    """

    bonds_nm: np.ndarray
    angles_rad: np.ndarray
    torsions_rad: np.ndarray
    rows: np.ndarray
    radius_rad: float

    @property
    def n_centres(self) -> int:
        return len(self.bonds_nm)

    def region(self, torsions_rad: np.ndarray) -> np.ndarray:
        """Region index of each state (``-1`` outside all), from torsions ``(n, n_atoms - 3)``."""
        rotatable = np.asarray(torsions_rad)[:, None, self.rows]
        distance = torsion_distance(rotatable, self.torsions_rad[None, :, self.rows])
        inside = distance < self.radius_rad
        return np.where(inside.any(axis=1), np.argmax(inside, axis=1), -1)

    def displace(self, ic: InternalCoords, source: int, target: int) -> tuple[torch.Tensor, ...]:
        """``q + (c_target - c_source)`` as (bonds, angles, torsions) tensors, torsions wrapped."""
        def shift(values: torch.Tensor, centres: np.ndarray) -> torch.Tensor:
            return values + torch.as_tensor(centres[target] - centres[source], dtype=values.dtype)

        torsions = shift(ic.torsions_rad, self.torsions_rad)
        torsions = torch.remainder(torsions + np.pi, 2 * np.pi) - np.pi
        return shift(ic.bonds_nm, self.bonds_nm), shift(ic.angles_rad, self.angles_rad), torsions


def build_darts(zmat: ZMatrix, moving: np.ndarray, centres_nm: np.ndarray) -> Darts | None:
    """Darts between the distinct basins of ``centres_nm`` (minimized seeds); None if under two.

    Parameters
    ----------
    zmat : ZMatrix
    moving : numpy.ndarray of int
        The sampler's moving torsion rows (:func:`hopwell.flow.torsion.moving_torsions`).
    centres_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
    """
    rows = rotatable_rows(zmat, moving)
    if len(rows) == 0 or len(centres_nm) < 2:
        return None
    with torch.no_grad():
        ic = cartesian_to_internal(zmat, torch.as_tensor(np.asarray(centres_nm, dtype=float)))
    torsions = ic.torsions_rad.numpy()
    kept = distinct_centres(torsions[:, rows])
    if len(kept) < 2:
        return None
    rotatable = torsions[kept][:, rows]
    separation = min(torsion_distance(rotatable[i], rotatable[j]) for i in range(len(kept)) for j in range(i))
    return Darts(ic.bonds_nm.numpy()[kept], ic.angles_rad.numpy()[kept], torsions[kept], rows,
                 float(min(0.5 * separation, MAX_RADIUS_RAD)))


@dataclass
class DartSettings:
    """Settings of the seed darts.

    Attributes
    ----------
    darts_per_cycle : int
        Darts per walker per cycle: exact jumps between the basins of the seed structures.
    """

    darts_per_cycle: int = 4


class SeedDarts:
    """The seed-dart move (see the module docstring); a state outside every region stays put.

    Parameters
    ----------
    darts : Darts
    zmat : ZMatrix
    guard : ProposalGuard
    evaluator : EnergyEvaluator
    per_walker : int
        Darts per walker per application.
    """

    name = "dart"

    def __init__(self, darts: Darts, zmat: ZMatrix, guard, evaluator, per_walker: int):
        self.darts, self.zmat, self.guard, self.evaluator = darts, zmat, guard, evaluator
        self.per_walker = int(per_walker)
        self.counters = MoveCounters()

    def _walker(self, walkers: Walkers, walker: int, rng: np.random.Generator) -> bool:
        darts, kT, moved = self.darts, self.evaluator.kT, False
        with torch.no_grad():
            current = cartesian_to_internal(self.zmat, torch.as_tensor(walkers.positions_nm[walker:walker + 1]))
        for _ in range(self.per_walker):
            source = int(darts.region(current.torsions_rad.numpy())[0])
            if source < 0:
                break  # no dart moves a state outside every region: the rest would not either
            target = int(rng.integers(0, darts.n_centres - 1))
            target += target >= source  # uniform over the other centres
            bonds, angles, torsions = darts.displace(current, source, target)
            self.counters.proposed += 1
            if not bool(((angles > 0) & (angles < np.pi)).all()) or bool((bonds <= 0).any()):
                continue
            with torch.no_grad():
                positions, log_j = internal_to_cartesian(self.zmat, bonds, angles, torsions)
            positions = positions.numpy()
            mask = self.guard(positions)
            if mask.rejected[0]:
                self.counters.clash += int(mask.clash[0])
                self.counters.stereo += int(mask.stereo[0] and not mask.clash[0])
                continue
            # q' is in the target region by construction; checked on the coordinates the next
            # dart will read, so that round-off at a region's edge cannot break reversibility.
            with torch.no_grad():
                landed = cartesian_to_internal(self.zmat, torch.as_tensor(positions))
            if int(darts.region(landed.torsions_rad.numpy())[0]) != target:
                continue
            energy = float(self.evaluator.energies_kj(positions)[0])
            log_alpha = -(energy - walkers.energies_kj[walker]) / kT + float(log_j[0] - current.log_jacobian[0])
            if np.isfinite(energy) and np.log(rng.random()) < log_alpha:
                self.counters.accepted += 1
                walkers.set(walker, positions[0], energy)
                current, moved = landed, True  # the new state's coordinates, already computed
        return moved

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        return MoveResult(np.array([self._walker(walkers, int(w), streams.numpy) for w in which], dtype=bool))

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = MoveCounters.from_json(state.get(self.name, {}))
