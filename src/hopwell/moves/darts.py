"""Seed darts: exact jumps between the basins of the seed structures.

Smart darting Monte Carlo (Andricioaei, Straub & Voter 2001, J. Chem. Phys. 114, 6994), here in
internal coordinates. Each seed, minimized, is a dart centre ``c_k`` (bonds, angles, torsions).
Around each centre lies a region: the states whose rotatable torsions (principal torsions about
rotatable bonds) and pucker torsions (the rows placing the atoms of saturated six-rings and their
heavy substituents, so that the two chairs of a ring are different centres) are within ``radius``
of the centre's, in the Euclidean norm of the wrapped differences. The radius is at most half the smallest distance between centres, so regions never
overlap. A dart from a state ``q`` in region ``i`` picks another centre ``j`` uniformly and
proposes ``q' = q + (c_j - c_i)`` in every internal coordinate: the walker's thermal displacement
from its own basin's minimum is carried to the other basin, bond lengths and angles included,
which a torsion-only jump cannot do (a rigid (phi, psi) jump of Ace-Ala-NMe from C7eq into C7ax
was measured here to cost 12 kJ/mol at best and 47 kJ/mol at the median).

Between the two chairs of a saturated ring (centres whose pucker torsions mostly change sign),
the torsions are carried mirrored instead: ``t' = c_j - (t - c_i)``, bonds and angles still
``+ (c_j - c_i)``. A chair's mirror image is the other chair, so this carries the ring's thermal
distortion as the other chair has it; translated unchanged, it stretched the ring-closure bond
(not a coordinate) by up to 0.3 A and cost a median 23-32 kT on methylcyclohexane (measured
here). The map is again a translation composed with a sign flip, so its Jacobian determinant in
internal coordinates is 1 in absolute value, it preserves the distance to the centre, and the
reverse dart undoes it.

``q'`` lies in region ``j`` at the same offset, and the reverse dart (chosen with the same
probability ``1 / (K - 1)``) returns exactly to ``q``. The translation has unit Jacobian in
internal coordinates, where the target is ``exp(-u) J(q)``, so::

    alpha = min(1, exp(-u(x') + u(x)) * J(q') / J(q))

States outside every region make no dart (the move is then the identity), and proposals with an
angle outside (0, pi) have target density zero.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import torch

from hopwell.coords.guards import GuardMask
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
    mirrored : numpy.ndarray of bool, shape ``(K, K)``, optional
        Symmetric; where set, a dart between the two centres carries the torsions' displacement
        negated (the two centres are the two chairs of a ring: see the module docstring).
    """

    bonds_nm: np.ndarray
    angles_rad: np.ndarray
    torsions_rad: np.ndarray
    rows: np.ndarray
    radius_rad: float
    mirrored: np.ndarray | None = None

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
        """``q + (c_target - c_source)`` as (bonds, angles, torsions) tensors, torsions wrapped;
        between mirrored centres the torsions are ``c_target - (t - c_source)``."""
        def shift(values: torch.Tensor, centres: np.ndarray) -> torch.Tensor:
            return values + torch.as_tensor(centres[target] - centres[source], dtype=values.dtype)

        torsions = shift(ic.torsions_rad, self.torsions_rad)
        if self.mirrored is not None and self.mirrored[source, target]:
            c = torch.as_tensor(self.torsions_rad, dtype=ic.torsions_rad.dtype)
            torsions = c[target] - (ic.torsions_rad - c[source])
        torsions = torch.remainder(torsions + np.pi, 2 * np.pi) - np.pi
        return shift(ic.bonds_nm, self.bonds_nm), shift(ic.angles_rad, self.angles_rad), torsions


def rows_placing(zmat: ZMatrix, atoms) -> np.ndarray:
    """Torsion rows (positions in the torsion array) whose placed atom is one of ``atoms``."""
    wanted = {int(a) for a in atoms}
    return np.array([k for k in range(zmat.n_atoms - 3) if int(zmat.order[k + 3]) in wanted], dtype=int)


def rows_within(zmat: ZMatrix, atoms) -> np.ndarray:
    """Torsion rows whose placed atom and three reference atoms are all among ``atoms``."""
    wanted = {int(a) for a in atoms}
    return np.array([k for k in range(zmat.n_atoms - 3)
                     if {int(zmat.order[k + 3]), int(zmat.bond_ref[k + 3]), int(zmat.angle_ref[k + 3]),
                         int(zmat.torsion_ref[k + 3])} <= wanted], dtype=int)


def region_rows(zmat: ZMatrix, moving: np.ndarray, pucker_rows: np.ndarray = ()) -> np.ndarray:
    """The torsion rows that tell basins apart: rotatable principal rows and ring-pucker rows."""
    return np.union1d(rotatable_rows(zmat, moving), np.asarray(pucker_rows, dtype=int)).astype(int)


def build_darts(zmat: ZMatrix, moving: np.ndarray, centres_nm: np.ndarray,
                pucker_rows: np.ndarray = (), ring_rows: np.ndarray = ()) -> Darts | None:
    """Darts between the distinct basins of ``centres_nm`` (minimized seeds); None if under two.

    Parameters
    ----------
    zmat : ZMatrix
    moving : numpy.ndarray of int
        The sampler's moving torsion rows (:func:`hopwell.flow.torsion.moving_torsions`).
    centres_nm : numpy.ndarray, shape ``(n_seeds, n_atoms, 3)``
    pucker_rows : numpy.ndarray of int, optional
        More torsion rows that define the regions: those placing the atoms of saturated rings
        and their heavy substituents (:func:`rows_placing`), so that two chairs of a ring, or
        one chair with a substituent axial and equatorial, are different centres.
    ring_rows : numpy.ndarray of int, optional
        The rows among those that are ring torsions (all four atoms in one saturated ring,
        :func:`rows_within`): centres where most of them change sign are mirrored.
    """
    rows = region_rows(zmat, moving, pucker_rows)
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
    pucker = torsions[kept][:, np.asarray(ring_rows, dtype=int)]
    # Two chairs of a ring: most pucker torsions change sign between the centres.
    opposite = (np.abs(wrapped(pucker[:, None] + pucker[None])).sum(axis=-1)
                < np.abs(wrapped(pucker[:, None] - pucker[None])).sum(axis=-1))
    return Darts(ic.bonds_nm.numpy()[kept], ic.angles_rad.numpy()[kept], torsions[kept], rows,
                 float(min(0.5 * separation, MAX_RADIUS_RAD)), opposite if opposite.any() else None)


class DartProposal(NamedTuple):
    """One dart before the Metropolis decision (see :meth:`SeedDarts.propose`).

    Attributes
    ----------
    positions_nm : numpy.ndarray, shape ``(1, n_atoms, 3)``, or None
        The proposed structure (None where its internal coordinates have density zero).
    landed : InternalCoords or None
        Its internal coordinates as read back from ``positions_nm`` (None before the guard passes).
    energy_kj : float
        Its potential energy (nan where not computed).
    log_alpha : float
        Log of the Metropolis-Hastings ratio, before ``min(1, .)``.
    guard : GuardMask or None
        The guard's verdict on ``positions_nm``.
    """

    positions_nm: np.ndarray | None
    landed: InternalCoords | None
    energy_kj: float
    log_alpha: float
    guard: GuardMask | None


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

    def propose(self, current: InternalCoords, energy_kj: float, source: int, target: int) -> DartProposal:
        """The dart from ``current`` (one state, in region ``source``) into region ``target``.

        Parameters
        ----------
        current : InternalCoords
            Batch of one.
        energy_kj : float
            Its potential energy.
        source, target : int
            Region indices, ``source != target``.

        Returns
        -------
        DartProposal
            ``log_alpha`` is ``-(u(x') - u(x)) + log J(q') - log J(q)``, or ``-inf`` where ``q'``
            has target density zero (an angle outside ``(0, pi)``, a bond not positive), fails
            the guard or, after round-off, lies outside region ``target``.
        """
        bonds, angles, torsions = self.darts.displace(current, source, target)
        if not bool(((angles > 0) & (angles < np.pi)).all()) or bool((bonds <= 0).any()):
            return DartProposal(None, None, float("nan"), -np.inf, None)
        with torch.no_grad():
            positions, log_j = internal_to_cartesian(self.zmat, bonds, angles, torsions)
        positions = positions.numpy()
        mask = self.guard(positions)
        if mask.rejected[0]:
            return DartProposal(positions, None, float("nan"), -np.inf, mask)
        # q' is in the target region by construction; checked on the coordinates the next
        # dart will read, so that round-off at a region's edge cannot break reversibility.
        with torch.no_grad():
            landed = cartesian_to_internal(self.zmat, torch.as_tensor(positions))
        if int(self.darts.region(landed.torsions_rad.numpy())[0]) != target:
            return DartProposal(positions, landed, float("nan"), -np.inf, mask)
        energy = float(self.evaluator.energies_kj(positions)[0])
        log_alpha = -(energy - energy_kj) / self.evaluator.kT + float(log_j[0] - current.log_jacobian[0])
        return DartProposal(positions, landed, energy, log_alpha if np.isfinite(energy) else -np.inf, mask)

    def _walker(self, walkers: Walkers, walker: int, rng: np.random.Generator) -> bool:
        darts, moved = self.darts, False
        with torch.no_grad():
            current = cartesian_to_internal(self.zmat, torch.as_tensor(walkers.positions_nm[walker:walker + 1]))
        for _ in range(self.per_walker):
            source = int(darts.region(current.torsions_rad.numpy())[0])
            if source < 0:
                break  # no dart moves a state outside every region: the rest would not either
            target = int(rng.integers(0, darts.n_centres - 1))
            target += target >= source  # uniform over the other centres
            dart = self.propose(current, float(walkers.energies_kj[walker]), source, target)
            self.counters.proposed += 1
            if dart.guard is not None and dart.guard.rejected[0]:
                self.counters.clash += int(dart.guard.clash[0])
                self.counters.stereo += int(dart.guard.stereo[0] and not dart.guard.clash[0])
            if np.isfinite(dart.log_alpha) and np.log(rng.random()) < dart.log_alpha:
                self.counters.accepted += 1
                walkers.set(walker, dart.positions_nm[0], dart.energy_kj)
                current, moved = dart.landed, True  # the new state's coordinates, already computed
        return moved

    def apply(self, walkers: Walkers, which: np.ndarray, streams: RandomStreams) -> MoveResult:
        return MoveResult(np.array([self._walker(walkers, int(w), streams.numpy) for w in which], dtype=bool))

    def state_dict(self) -> dict:
        return {self.name: self.counters.to_json()}

    def load_state_dict(self, state: dict) -> None:
        self.counters = MoveCounters.from_json(state.get(self.name, {}))
