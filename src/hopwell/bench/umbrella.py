"""Reference populations along one slow torsion by umbrella sampling and MBAR.

Umbrella sampling (Torrie & Valleau, J. Comput. Phys. 23:187, 1977): Langevin dynamics in a
set of windows, each holding the torsion near its own centre with a periodic harmonic
restraint, the centres evenly spaced on the circle so that together they cover every angle,
barriers included. Neighbouring windows exchange structures now and then (replica exchange
umbrella sampling, Sugita, Kitao & Okamoto, J. Chem. Phys. 113:6042, 2000), which carries
degrees of freedom that relax slowly near a barrier in from the windows beside it. MBAR
(Shirts & Chodera, J. Chem. Phys. 129:124105, 2008; the ``pymbar`` package) then combines the
decorrelated samples of all windows into the unbiased distribution of the torsion. Every
window shares the unrestrained Hamiltonian, so the reduced potential of a sample in window
``k`` is ``u0 + restraint_k / kT`` and only the restraint terms reach MBAR.

The result is a population per state (an arc of the torsion between two ``--split``
boundaries) with a 95% interval (1.96 MBAR standard errors), and a free-energy profile on a
grid: a reference for hopwell's benchmarks that does not depend on hopwell's sampler.

Reproduce the two shipped references (``--json-out FILE`` writes the numbers)::

    # Ace-Ala-NMe (amber14, vacuum): population of phi > 0 (phi = C(Ace)-N-CA-C)
    python -m hopwell.bench.umbrella systems/ace_ala_nme.pdb \\
        --smarts '[CX3]N[CX4H1][CX3]' --split 0,180

    # N-methylacetamide (MMFF94, vacuum): cis fraction, |omega| < 90 deg (omega = C-C(=O)-N-C)
    python -m hopwell.bench.umbrella 'CC(=O)NC' --forcefield mmff94 \\
        --smarts '[CH3][CX3][NX3][CH3]' --split=-90,90

(write a negative first boundary as ``--split=-90,90`` so that it is not read as an option).
The restraint acts on the rotation of the torsion's central bond, the circular mean of every
torsion about it less its starting offset (``--restrain-one`` restrains the torsion itself):
dragging only C-C(=O)-N-C of an amide to cis can leave the N-H behind on a pyramidal nitrogen,
and the windows near 90 degrees then split into two valleys that no restraint of that one
torsion holds together (measured on N-methylacetamide: no exchanges accepted there, and a cis
fraction of 1e-8 against about 1e-2 with the bond rotation restrained).
``--quick`` shortens the runs for a smoke test; its numbers are not references.
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
import json
import time
from pathlib import Path

import numpy as np
import openmm
from openmm import unit
from pymbar import MBAR, timeseries
from rdkit import Chem

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.systems.builder import FORCEFIELDS, SOLVENTS, BuildOptions, build
from hopwell.systems.energy import (
    DEFAULT_FRICTION_PER_PS,
    DEFAULT_TIMESTEP_PS,
    EnergyEvaluator,
    kT_kj,
)

# 95% interval half-width in standard errors (normal approximation).
Z95 = 1.96
DEFAULT_WINDOWS = 36
DEFAULT_NS_PER_WINDOW = 0.2
DEFAULT_EQUILIBRATION_PS = 10.0
DEFAULT_SAMPLE_INTERVAL_PS = 0.1
DEFAULT_EXCHANGE_INTERVAL_PS = 1.0
DEFAULT_PROFILE_BINS = 24
QUICK_NS_PER_WINDOW = 0.02
QUICK_EQUILIBRATION_PS = 2.0


@dataclasses.dataclass
class UmbrellaResult:
    """Unbiased torsion populations from umbrella sampling and MBAR.

    Attributes
    ----------
    ranges_rad : numpy.ndarray, shape ``(n_states, 2)``
        Each state's arc ``[lo, hi)``, ``lo`` in ``[-pi, pi)`` and ``lo < hi <= lo + 2 pi``.
    populations : numpy.ndarray, shape ``(n_states,)``
    populations_sigma : numpy.ndarray, shape ``(n_states,)``
        MBAR standard errors of ``populations``.
    profile_centres_rad : numpy.ndarray, shape ``(n_bins,)``
    profile_kj_mol : numpy.ndarray, shape ``(n_bins,)``
        Free energy of the torsion per bin, ``-kT ln(p / width)``, zero at its minimum; infinite
        for bins no sample reached.
    profile_sigma_kj_mol : numpy.ndarray, shape ``(n_bins,)``
        Standard error of each bin's free energy from its own probability (``kT sigma_p / p``).
    k_kj_mol_rad2 : float
        Restraint constant.
    inefficiency : numpy.ndarray, shape ``(n_windows,)``
        Statistical inefficiency ``g`` used to decorrelate each window (pymbar); see
        :func:`mbar_populations`.
    n_samples : numpy.ndarray of int, shape ``(n_windows,)``
        Decorrelated samples each window gave MBAR.
    min_neighbour_overlap : float
        Smallest MBAR overlap-matrix element between neighbouring windows; near zero means the
        windows do not overlap and the estimate is unreliable.
    temperature_K : float
    exchange_acceptance : numpy.ndarray, shape ``(n_windows,)``
        Fraction of accepted exchanges between windows ``w`` and ``w + 1`` (NaN without
        exchanges); empty where the samples did not come from :func:`sample_windows`.
    """

    ranges_rad: np.ndarray
    populations: np.ndarray
    populations_sigma: np.ndarray
    profile_centres_rad: np.ndarray
    profile_kj_mol: np.ndarray
    profile_sigma_kj_mol: np.ndarray
    k_kj_mol_rad2: float
    inefficiency: np.ndarray
    n_samples: np.ndarray
    min_neighbour_overlap: float
    temperature_K: float
    exchange_acceptance: np.ndarray = dataclasses.field(default_factory=lambda: np.empty(0))

    @property
    def ci95(self) -> np.ndarray:
        """95% intervals of the populations, ``p +- 1.96 sigma`` clipped to [0, 1]."""
        half = Z95 * self.populations_sigma
        return np.clip(np.stack([self.populations - half, self.populations + half], axis=1), 0.0, 1.0)


def wrap_rad(angle_rad):
    """Angles wrapped onto ``[-pi, pi)``."""
    return np.mod(np.asarray(angle_rad) + np.pi, 2.0 * np.pi) - np.pi


def dihedral_rad(xyz_nm: np.ndarray, atoms) -> np.ndarray:
    """Dihedral angle of four atoms (IUPAC sign convention, as OpenMM's ``theta``).

    Parameters
    ----------
    xyz_nm : numpy.ndarray, shape ``(n_frames, n_atoms, 3)`` or ``(n_atoms, 3)``
    atoms : sequence of 4 int

    Returns
    -------
    numpy.ndarray, shape ``(n_frames,)``
        In ``(-pi, pi]``.
    """
    x = np.asarray(xyz_nm, dtype=float)
    if x.ndim == 2:
        x = x[None]
    p0, p1, p2, p3 = (x[:, a] for a in atoms)
    b0, b1, b2 = p1 - p0, p2 - p1, p3 - p2
    n1, n2 = np.cross(b0, b1), np.cross(b1, b2)
    y = np.linalg.norm(b1, axis=1) * np.einsum("ij,ij->i", b0, n2)
    return np.arctan2(y, np.einsum("ij,ij->i", n1, n2))


def default_k_kj_mol_rad2(n_windows: int, temperature_K: float) -> float:
    """Restraint constant that makes neighbouring windows overlap: ``4 kT / spacing^2``.

    On a flat profile each window's torsion is then normal with standard deviation half the
    spacing of the centres, so neighbours meet one standard deviation from either centre.
    For 36 windows at 300 K it is 327 kJ/mol/rad^2, about twice the negative curvature at the top
    of N-methylacetamide's cis/trans barrier in this module's MMFF94 profile, so no window is
    split in two by the barrier it sits on.
    """
    spacing_rad = 2.0 * np.pi / n_windows
    return 4.0 * kT_kj(temperature_K) / spacing_rad**2


def bond_torsions(mol: Chem.Mol, torsion_atoms) -> list[tuple[int, int, int, int]]:
    """Every torsion about the central bond of ``torsion_atoms``, that torsion first.

    These are ``(a, j, k, b)`` for each neighbour ``a`` of ``j`` other than ``k`` and each
    neighbour ``b`` of ``k`` other than ``j``.
    """
    i, j, k, l = (int(a) for a in torsion_atoms)
    first = (i, j, k, l)
    others = [
        (a.GetIdx(), j, k, b.GetIdx())
        for a in mol.GetAtomWithIdx(j).GetNeighbors() if a.GetIdx() != k
        for b in mol.GetAtomWithIdx(k).GetNeighbors() if b.GetIdx() != j
    ]
    return [first] + [t for t in others if t != first]


def bond_rotation_rad(theta_rad: np.ndarray, offsets_rad) -> np.ndarray:
    """The restrained coordinate: circular mean of the torsions, each less its offset.

    Parameters
    ----------
    theta_rad : numpy.ndarray, shape ``(n_torsions, n_samples)`` or ``(n_samples,)``
    offsets_rad : sequence of float
        One per torsion; the first is 0, so that for one torsion the coordinate is the torsion.

    Returns
    -------
    numpy.ndarray, shape ``(n_samples,)``
        In ``(-pi, pi]``.
    """
    theta = np.atleast_2d(np.asarray(theta_rad, dtype=float))
    offsets = np.asarray(offsets_rad, dtype=float)[:, None]
    return np.angle(np.exp(1j * (theta - offsets)).sum(axis=0))


def restraint_expression(torsions) -> tuple[str, list[int]]:
    """OpenMM expression of the umbrella restraint on the rotation of the given torsions.

    ``0.5 umbrella_k d^2`` with ``d`` the difference of :func:`bond_rotation_rad` from
    ``umbrella_theta0``, wrapped onto (-pi, pi] so that the restraint is continuous across
    +-180 degrees; per-bond parameters ``offset0``, ``offset1``, ... The global parameter names
    are hopwell's own, so they cannot collide with parameters of the system.

    Returns
    -------
    expression : str
        For a ``CustomCompoundBondForce``.
    particles : list of int
        The distinct atoms of the torsions, in the order the expression's ``p1, p2, ...`` refer to.
    """
    particles = list(dict.fromkeys(int(a) for atoms in torsions for a in atoms))
    slot = {a: f"p{i + 1}" for i, a in enumerate(particles)}
    terms = [
        f"(dihedral({','.join(slot[int(a)] for a in atoms)}) - offset{m})" for m, atoms in enumerate(torsions)
    ]
    sines = " + ".join(f"sin{t}" for t in terms)
    cosines = " + ".join(f"cos{t}" for t in terms)
    expression = (
        "0.5*umbrella_k*d^2;"
        " d = atan2(sin(rotation - umbrella_theta0), cos(rotation - umbrella_theta0));"
        f" rotation = atan2({sines}, {cosines})"
    )
    return expression, particles


def restrained_copy(system: openmm.System, torsions, offsets_rad) -> openmm.System:
    """A copy of ``system`` with the umbrella restraint (:func:`restraint_expression`).

    One torsion gets the same restraint as a ``CustomTorsionForce``: Langevin steps of a
    restrained four-atom chain took 2.3 us with it against 8.2 us with the compound-bond form
    (Reference platform, measured here). Its global parameters ``umbrella_k``
    (kJ/mol/rad^2) and ``umbrella_theta0`` (rad) are zero here; set them on the context.

    Parameters
    ----------
    system : openmm.System
        Not modified.
    torsions : sequence of 4-tuples of int
    offsets_rad : sequence of float
        One per torsion; see :func:`bond_rotation_rad`.
    """
    restrained = copy.deepcopy(system)
    if len(torsions) == 1:
        restraint = openmm.CustomTorsionForce(
            "0.5*umbrella_k*d^2; d = atan2(sin(theta - umbrella_theta0), cos(theta - umbrella_theta0))"
        )
        restraint.addTorsion(*(int(a) for a in torsions[0]), [])
    else:
        expression, particles = restraint_expression(torsions)
        restraint = openmm.CustomCompoundBondForce(len(particles), expression)
        for m in range(len(torsions)):
            restraint.addPerBondParameter(f"offset{m}")
        restraint.addBond(particles, [float(offset) for offset in offsets_rad])
    restraint.addGlobalParameter("umbrella_k", 0.0)
    restraint.addGlobalParameter("umbrella_theta0", 0.0)
    restrained.addForce(restraint)
    return restrained


def restraint_energies_kj(theta_rad: np.ndarray, centres_rad: np.ndarray, k_kj_mol_rad2: float,
                          offsets_rad=None) -> np.ndarray:
    """Restraint energy of each sample in each window, shape ``(n_windows, n_samples)``.

    Parameters
    ----------
    theta_rad : numpy.ndarray, shape ``(n_torsions, n_samples)`` or ``(n_samples,)``
        The restrained torsions of each sample.
    centres_rad : numpy.ndarray, shape ``(n_windows,)``
    k_kj_mol_rad2 : float
    offsets_rad : numpy.ndarray, shape ``(n_torsions,)``, optional
        Zero when omitted; see :func:`bond_rotation_rad`.
    """
    theta = np.atleast_2d(np.asarray(theta_rad, dtype=float))
    offsets = np.zeros(len(theta)) if offsets_rad is None else offsets_rad
    rotation = bond_rotation_rad(theta, offsets)
    d = wrap_rad(rotation[None, :] - np.asarray(centres_rad, dtype=float)[:, None])
    return 0.5 * k_kj_mol_rad2 * d**2


def state_ranges_rad(boundaries_rad) -> np.ndarray:
    """The arcs between consecutive boundaries on the circle, shape ``(n_states, 2)``.

    Boundaries are wrapped onto ``[-pi, pi)`` and sorted; state ``s`` runs from boundary ``s``
    to the next, the last one wrapping past +180 degrees to the first.

    Raises
    ------
    ValueError
        For fewer than two distinct boundaries.
    """
    b = np.unique(wrap_rad(np.asarray(boundaries_rad, dtype=float)))
    if len(b) < 2:
        raise ValueError("at least two distinct state boundaries are needed")
    return np.stack([b, np.append(b[1:], b[0] + 2.0 * np.pi)], axis=1)


def in_arc(theta_rad: np.ndarray, lo_rad: float, hi_rad: float) -> np.ndarray:
    """Whether each angle lies on the arc ``[lo, hi)`` (``lo < hi <= lo + 2 pi``)."""
    return np.mod(np.asarray(theta_rad) - lo_rad, 2.0 * np.pi) < hi_rad - lo_rad


def sample_windows(
    system: openmm.System,
    positions_nm: np.ndarray,
    torsions,
    offsets_rad,
    centres_rad: np.ndarray,
    k_kj_mol_rad2: float,
    temperature_K: float,
    n_steps: int,
    n_equilibration_steps: int,
    sample_interval_steps: int,
    exchange_steps: int = 0,
    timestep_ps: float = DEFAULT_TIMESTEP_PS,
    friction_per_ps: float = DEFAULT_FRICTION_PER_PS,
    seed: int = 1,
    platform: str | None = None,
) -> tuple[list[np.ndarray], np.ndarray]:
    """Restrained Langevin dynamics in each window; the torsions every ``sample_interval_steps``.

    Each window is first equilibrated: the windows are visited in two sweeps from the one whose
    centre is nearest the starting value of the first torsion, one sweep up and one down the
    circle, each window starting from the last structure and velocities of the window before it.
    Production then runs all windows side by side in segments of ``exchange_steps``; after each
    segment, neighbouring windows (pairs ``(w, w + 1)`` around the circle, even and odd ``w`` in
    turn) swap structures and velocities with the Metropolis probability
    ``min(1, exp(-[u_w(x') + u_w'(x) - u_w(x) - u_w'(x')]))`` of the reduced restraint energies,
    the shared Hamiltonian cancelling (replica exchange umbrella sampling, Sugita, Kitao &
    Okamoto, J. Chem. Phys. 113:6042, 2000). Each window still samples its own restrained
    ensemble, but a degree of freedom that relaxes slowly within a window near a barrier (an
    amide nitrogen's pyramidal sense, say) is carried in relaxed from the windows beside it.

    Parameters
    ----------
    system : openmm.System
        Not modified.
    positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
        Starting structure (minimized in the first window's restraint at the start of each sweep).
    torsions : sequence of 4-tuples of int
        The torsions whose rotation is restrained (:func:`bond_rotation_rad`).
    offsets_rad : sequence of float
        One per torsion; see :func:`bond_rotation_rad`.
    centres_rad : numpy.ndarray, shape ``(n_windows,)``
        Window centres, increasing around the circle.
    k_kj_mol_rad2, temperature_K : float
    n_steps, n_equilibration_steps, sample_interval_steps : int
        Production steps, equilibration steps and steps between samples, per window.
    exchange_steps : int
        Steps between exchange attempts, a multiple of ``sample_interval_steps``; 0 runs each
        window's production on its own, without exchanges.
    timestep_ps, friction_per_ps : float
        ``LangevinMiddleIntegrator`` settings.
    seed : int
        Seeds the Langevin integrator, the velocities and the exchanges (0 picks one at random).
    platform : str, optional

    Returns
    -------
    samples : list of numpy.ndarray, each of shape ``(n_torsions, n_samples)``
        The torsion samples (rad) of each window, in the order of ``centres_rad``.
    acceptance : numpy.ndarray, shape ``(n_windows,)``
        Fraction of accepted exchanges between windows ``w`` and ``w + 1``; NaN without exchanges.
    """
    evaluator = EnergyEvaluator(
        restrained_copy(system, torsions, offsets_rad), temperature_K, platform=platform,
        timestep_ps=timestep_ps, friction_per_ps=friction_per_ps, seed=seed,
    )
    context, integrator = evaluator.context, evaluator.integrator
    context.setParameter("umbrella_k", float(k_kj_mol_rad2))
    n_windows = len(centres_rad)
    start = int(np.argmin(np.abs(wrap_rad(centres_rad - dihedral_rad(positions_nm, torsions[0])[0]))))
    up = [(start + i) % n_windows for i in range(n_windows - n_windows // 2)]
    down = [(start - i) % n_windows for i in range(1, n_windows // 2 + 1)]
    states: list = [None] * n_windows
    for sweep in (up, down):
        context.setParameter("umbrella_theta0", float(centres_rad[sweep[0]]))
        context.setPositions(evaluator.minimize(positions_nm)[0])
        context.setVelocities(evaluator.maxwell_boltzmann())
        for window in sweep:
            context.setParameter("umbrella_theta0", float(centres_rad[window]))
            integrator.step(n_equilibration_steps)
            states[window] = context.getState(getPositions=True, getVelocities=True)

    # Only the torsions' atoms are kept from each sample, renumbered in the order of ``atoms``.
    atoms = list(dict.fromkeys(int(a) for t in torsions for a in t))
    local = [tuple(atoms.index(int(a)) for a in t) for t in torsions]
    segment_steps = exchange_steps if exchange_steps > 0 else n_steps
    frames: list[list[np.ndarray]] = [[] for _ in range(n_windows)]
    # A stream of its own: the evaluator's generator, seeded with ``seed`` too, draws velocities.
    rng = np.random.default_rng((seed, 1) if seed else None)
    attempts, accepted = np.zeros(n_windows), np.zeros(n_windows)
    for segment in range(n_steps // segment_steps):
        for window in range(n_windows):
            context.setParameter("umbrella_theta0", float(centres_rad[window]))
            context.setState(states[window])
            for _ in range(segment_steps // sample_interval_steps):
                integrator.step(sample_interval_steps)
                state = context.getState(getPositions=True)
                frames[window].append(state.getPositions(asNumpy=True).value_in_unit(unit.nanometer)[atoms])
            states[window] = context.getState(getPositions=True, getVelocities=True)
        if exchange_steps <= 0:
            continue
        current = np.stack([[dihedral_rad(f[-1], t)[0] for t in local] for f in frames], axis=1)
        u = restraint_energies_kj(current, centres_rad, k_kj_mol_rad2, offsets_rad) / evaluator.kT
        for w in range(segment % 2, n_windows - n_windows % 2, 2):
            v = (w + 1) % n_windows
            attempts[w] += 1
            if rng.random() < np.exp(min(0.0, u[w, w] + u[v, v] - u[w, v] - u[v, w])):
                accepted[w] += 1
                states[w], states[v] = states[v], states[w]
    samples = [np.stack([dihedral_rad(np.stack(f), t) for t in local]) for f in frames]
    with np.errstate(invalid="ignore", divide="ignore"):
        return samples, accepted / attempts


def mbar_populations(
    samples_rad: list[np.ndarray],
    offsets_rad,
    centres_rad: np.ndarray,
    k_kj_mol_rad2: float,
    temperature_K: float,
    boundaries_rad,
    profile_bins: int = DEFAULT_PROFILE_BINS,
) -> UmbrellaResult:
    """Unbiased state populations and torsion profile from umbrella-window samples by MBAR.

    Each window's samples are decorrelated first, keeping one every ``g`` samples where ``g`` is
    the largest pymbar statistical inefficiency of the window's restraint energy in its own and
    its two neighbouring windows (the energies that carry MBAR's free-energy differences; with
    little friction they decorrelate more slowly than the torsion itself, whose harmonic
    oscillation in the window averages out within a period). MBAR is then given the reduced
    restraint energies of every kept sample in every window, and the populations are MBAR
    expectations of state indicators of the first torsion in the unrestrained state (reduced
    potential zero relative to the shared ``u0``).

    Parameters
    ----------
    samples_rad : list of numpy.ndarray, each of shape ``(n_torsions, n_samples)``
        Samples of the restrained torsions in each window, in the order of ``centres_rad``.
    offsets_rad : sequence of float
        One per torsion; see :func:`bond_rotation_rad`.
    centres_rad : numpy.ndarray, shape ``(n_windows,)``
    k_kj_mol_rad2, temperature_K : float
    boundaries_rad : sequence of float
        State boundaries on the first torsion; see :func:`state_ranges_rad`.
    profile_bins : int
        Bins of the free-energy profile over the full circle.

    Returns
    -------
    UmbrellaResult

    Raises
    ------
    ValueError
        For fewer than two boundaries, or where MBAR's uncertainty cannot be computed because
        neighbouring windows hardly overlap.
    """
    ranges = state_ranges_rad(boundaries_rad)
    kT = kT_kj(temperature_K)
    centres = np.asarray(centres_rad, dtype=float)
    n_windows = len(centres)
    kept, inefficiency = [], []
    for window, theta in enumerate(samples_rad):
        neighbours = [(window + shift) % n_windows for shift in (-1, 0, 1)]
        energies = restraint_energies_kj(theta, centres[neighbours], k_kj_mol_rad2, offsets_rad)
        g = max(timeseries.statistical_inefficiency(u) for u in energies)
        kept.append(theta[:, timeseries.subsample_correlated_data(energies[1], g=g)])
        inefficiency.append(g)
    n_k = np.array([t.shape[1] for t in kept])
    theta_mn = np.concatenate(kept, axis=1)
    mbar = MBAR(restraint_energies_kj(theta_mn, centres, k_kj_mol_rad2, offsets_rad) / kT, n_k)
    theta_n = theta_mn[0]
    overlap = mbar.compute_overlap()["matrix"]
    neighbour_overlap = overlap[np.arange(n_windows), (np.arange(n_windows) + 1) % n_windows]
    unbiased_u_n = np.zeros(len(theta_n))
    states = np.stack([in_arc(theta_n, lo, hi) for lo, hi in ranges]).astype(float)
    width_rad = 2.0 * np.pi / profile_bins
    edges = -np.pi + width_rad * np.arange(profile_bins)
    bins = np.stack([in_arc(theta_n, lo, lo + width_rad) for lo in edges]).astype(float)
    # pymbar takes log(0) for samples outside a state or bin, and 0/0 for bins without samples.
    with np.errstate(divide="ignore", invalid="ignore"):
        try:
            pops = mbar.compute_multiple_expectations(states, unbiased_u_n)
            prof = mbar.compute_multiple_expectations(bins, unbiased_u_n)
        except np.linalg.LinAlgError as exc:
            raise ValueError(
                "MBAR's uncertainties failed: neighbouring windows overlap too little (smallest"
                f" overlap {np.min(neighbour_overlap):.2g}); use more windows or a stiffer restraint"
            ) from exc
        f_kj = -kT * np.log(prof["mu"] / width_rad)
        f_sigma = kT * prof["sigma"] / prof["mu"]
    return UmbrellaResult(
        ranges_rad=ranges,
        populations=np.asarray(pops["mu"]),
        populations_sigma=np.asarray(pops["sigma"]),
        profile_centres_rad=edges + 0.5 * width_rad,
        profile_kj_mol=f_kj - np.min(f_kj),
        profile_sigma_kj_mol=f_sigma,
        k_kj_mol_rad2=float(k_kj_mol_rad2),
        inefficiency=np.asarray(inefficiency),
        n_samples=n_k,
        min_neighbour_overlap=float(np.min(neighbour_overlap)),
        temperature_K=float(temperature_K),
    )


def umbrella_populations(
    system: openmm.System,
    positions_nm: np.ndarray,
    torsion_atoms,
    boundaries_rad,
    temperature_K: float = 300.0,
    n_windows: int = DEFAULT_WINDOWS,
    k_kj_mol_rad2: float | None = None,
    ns_per_window: float = DEFAULT_NS_PER_WINDOW,
    equilibration_ps: float = DEFAULT_EQUILIBRATION_PS,
    sample_interval_ps: float = DEFAULT_SAMPLE_INTERVAL_PS,
    exchange_interval_ps: float = DEFAULT_EXCHANGE_INTERVAL_PS,
    timestep_ps: float = DEFAULT_TIMESTEP_PS,
    friction_per_ps: float = DEFAULT_FRICTION_PER_PS,
    partner_torsions=(),
    profile_bins: int = DEFAULT_PROFILE_BINS,
    seed: int = 1,
    platform: str | None = None,
) -> UmbrellaResult:
    """Populations of torsion states by umbrella sampling and MBAR.

    Parameters
    ----------
    system : openmm.System
        Any OpenMM system (not modified); a copy carries the restraint.
    positions_nm : numpy.ndarray, shape ``(n_atoms, 3)``
        Starting structure.
    torsion_atoms : sequence of 4 int
        0-based particle indices of the torsion whose states are counted.
    boundaries_rad : sequence of float
        State boundaries on the torsion; see :func:`state_ranges_rad`.
    temperature_K : float
    n_windows : int
        Window centres ``-pi + 2 pi i / n_windows``.
    k_kj_mol_rad2 : float, optional
        Restraint constant; :func:`default_k_kj_mol_rad2` when omitted.
    ns_per_window, equilibration_ps, sample_interval_ps : float
        Production length, equilibration length and time between samples, per window.
    exchange_interval_ps : float
        Time between exchange attempts of neighbouring windows, rounded to a multiple of
        ``sample_interval_ps``; 0 for independent windows. See :func:`sample_windows`.
    timestep_ps, friction_per_ps : float
        ``LangevinMiddleIntegrator`` settings.
    partner_torsions : sequence of 4-tuples of int
        Further torsions, usually the others about the same bond (:func:`bond_torsions`). The
        restrained coordinate is then the rotation of the bond, the circular mean of all the
        torsions less their offsets from the first in ``positions_nm``
        (:func:`bond_rotation_rad`), rather than the first torsion alone. Pyramidalizing an atom
        of the bond moves its substituents' torsions in opposite directions and barely changes
        the rotation, so it stays free in every window; one torsion alone can instead be
        turned by pyramidalizing (an amide's N-H left behind as its C-C(=O)-N-C torsion is
        dragged to cis), which splits the windows near the barrier into two valleys.
    profile_bins : int
    seed : int
    platform : str, optional

    Returns
    -------
    UmbrellaResult

    Raises
    ------
    ValueError
        For fewer than two windows or boundaries, runs shorter than one sample, or windows that
        hardly overlap (see :func:`mbar_populations`).

    Examples
    --------
    N-methylacetamide's cis fraction (omega = C-C(=O)-N-C, atoms 0, 1, 3, 4 of the SMILES):

    >>> molsys = build("CC(=O)NC", BuildOptions(forcefield="mmff94", n_seeds=1))  # doctest: +SKIP
    >>> omega = (0, 1, 3, 4)
    >>> partners = bond_torsions(molsys.mol, omega)[1:]  # doctest: +SKIP
    >>> result = umbrella_populations(molsys.system, molsys.seeds_nm[0], omega, np.radians([-90, 90]),
    ...                               partner_torsions=partners)  # doctest: +SKIP
    """
    if n_windows < 2:
        raise ValueError(f"at least two windows are needed, got {n_windows}")
    if k_kj_mol_rad2 is None:
        k_kj_mol_rad2 = default_k_kj_mol_rad2(n_windows, temperature_K)
    torsions = [tuple(int(a) for a in torsion_atoms)] + [tuple(int(a) for a in t) for t in partner_torsions]
    start = np.array([dihedral_rad(positions_nm, atoms)[0] for atoms in torsions])
    offsets = wrap_rad(start - start[0])
    centres = -np.pi + 2.0 * np.pi * np.arange(n_windows) / n_windows
    interval = max(1, int(round(sample_interval_ps / timestep_ps)))
    exchange_steps = interval * int(round(exchange_interval_ps / (interval * timestep_ps)))
    n_steps = int(round(ns_per_window * 1000.0 / timestep_ps))
    if n_steps < max(interval, exchange_steps):
        raise ValueError(f"{ns_per_window} ns per window is shorter than one sample or exchange interval")
    samples, acceptance = sample_windows(
        system,
        positions_nm,
        torsions,
        offsets,
        centres,
        k_kj_mol_rad2,
        temperature_K,
        n_steps=n_steps,
        n_equilibration_steps=int(round(equilibration_ps / timestep_ps)),
        sample_interval_steps=interval,
        exchange_steps=exchange_steps,
        timestep_ps=timestep_ps,
        friction_per_ps=friction_per_ps,
        seed=seed,
        platform=platform,
    )
    result = mbar_populations(
        samples, offsets, centres, k_kj_mol_rad2, temperature_K, boundaries_rad, profile_bins
    )
    return dataclasses.replace(result, exchange_acceptance=acceptance)


def _torsion_from_args(parser: argparse.ArgumentParser, args, mol: Chem.Mol) -> tuple[int, ...]:
    """The four torsion atoms from ``--torsion`` or the first match of ``--smarts``."""
    if args.torsion is not None:
        try:
            atoms = tuple(int(a) for a in args.torsion.split(","))
        except ValueError:
            parser.error(f"--torsion wants four comma-separated atom indices, got {args.torsion!r}")
    else:
        query = Chem.MolFromSmarts(args.smarts)
        if query is None:
            parser.error(f"--smarts {args.smarts!r} is not valid SMARTS")
        if query.GetNumAtoms() != 4:
            parser.error(f"--smarts must have exactly 4 atoms, {args.smarts!r} has {query.GetNumAtoms()}")
        matches = mol.GetSubstructMatches(query)
        if not matches:
            parser.error(f"--smarts {args.smarts!r} matches nothing in the molecule")
        atoms = matches[0]
    if len(atoms) != 4 or len(set(atoms)) != 4 or not all(0 <= a < mol.GetNumAtoms() for a in atoms):
        parser.error(f"the torsion needs four distinct atoms of the molecule (0..{mol.GetNumAtoms() - 1})")
    if any(mol.GetBondBetweenAtoms(a, b) is None for a, b in zip(atoms, atoms[1:])):
        parser.error(f"atoms {atoms} are not a chain of bonded atoms")
    return atoms


def _range_text(values: np.ndarray) -> str:
    """``min-max`` of the finite values, or ``none``."""
    finite = values[np.isfinite(values)]
    return f"{finite.min():.2f}-{finite.max():.2f}" if len(finite) else "none"


def _degrees(value: float) -> float:
    """An angle in degrees, rounded for the JSON report."""
    return round(float(np.degrees(value)), 6)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("input", help="SMILES or structure file")
    which = parser.add_mutually_exclusive_group(required=True)
    which.add_argument("--torsion", metavar="I,J,K,L", help="0-based atom indices of the torsion")
    which.add_argument("--smarts", metavar="PATTERN", help="4-atom SMARTS; its first match is the torsion")
    parser.add_argument("--split", required=True, metavar="DEG[,DEG...]",
                        help="state boundaries on the torsion, degrees (at least two)")
    parser.add_argument("--restrain-one", action="store_true",
                        help="restrain the torsion itself [default: the rotation of its central bond,"
                             " the circular mean of every torsion about it]")
    parser.add_argument("--windows", type=int, default=DEFAULT_WINDOWS, help="umbrella windows")
    parser.add_argument("--k", type=float, default=None, metavar="KJ_MOL_RAD2",
                        help="restraint constant, kJ/mol/rad^2 [default: 4 kT / spacing^2]")
    parser.add_argument("--ns-per-window", type=float, default=None,
                        help=f"production per window, ns [default: {DEFAULT_NS_PER_WINDOW}]")
    parser.add_argument("--equilibration-ps", type=float, default=None,
                        help=f"equilibration per window, ps [default: {DEFAULT_EQUILIBRATION_PS}]")
    parser.add_argument("--exchange-ps", type=float, default=DEFAULT_EXCHANGE_INTERVAL_PS,
                        help="time between exchange attempts of neighbouring windows, ps (0: none)"
                             f" [default: {DEFAULT_EXCHANGE_INTERVAL_PS}]")
    parser.add_argument("--temperature", type=float, default=300.0, help="K")
    parser.add_argument("--forcefield", choices=FORCEFIELDS, default=None)
    parser.add_argument("--solvent", choices=SOLVENTS, default="vacuum")
    parser.add_argument("--profile-bins", type=int, default=DEFAULT_PROFILE_BINS)
    parser.add_argument("--seed", type=int, default=1, help="Langevin and velocity seed")
    parser.add_argument("--platform", default=None, help="OpenMM platform [default: by atom count]")
    parser.add_argument("--json-out", type=Path, default=None, metavar="FILE")
    parser.add_argument("--quick", action="store_true",
                        help=f"{QUICK_NS_PER_WINDOW} ns and {QUICK_EQUILIBRATION_PS} ps per window"
                             " (smoke test)")
    args = parser.parse_args(argv)
    ns_per_window = args.ns_per_window if args.ns_per_window is not None else (
        QUICK_NS_PER_WINDOW if args.quick else DEFAULT_NS_PER_WINDOW)
    equilibration_ps = args.equilibration_ps if args.equilibration_ps is not None else (
        QUICK_EQUILIBRATION_PS if args.quick else DEFAULT_EQUILIBRATION_PS)
    try:
        boundaries_deg = [float(b) for b in args.split.split(",")]
    except ValueError:
        parser.error(f"--split wants comma-separated degrees, got {args.split!r}")

    try:
        molsys = build(args.input, BuildOptions(forcefield=args.forcefield, solvent=args.solvent, n_seeds=1))
    except InputError as exc:
        parser.error(str(exc))
    atoms = _torsion_from_args(parser, args, molsys.mol)
    partners = [] if args.restrain_one else bond_torsions(molsys.mol, atoms)[1:]
    start = time.perf_counter()
    try:
        result = umbrella_populations(
            molsys.system, molsys.seeds_nm[0], atoms, np.radians(boundaries_deg),
            temperature_K=args.temperature, n_windows=args.windows, k_kj_mol_rad2=args.k,
            ns_per_window=ns_per_window, equilibration_ps=equilibration_ps,
            exchange_interval_ps=args.exchange_ps, partner_torsions=partners,
            profile_bins=args.profile_bins, seed=args.seed, platform=args.platform,
        )
    except ValueError as exc:
        parser.error(str(exc))
    runtime_s = time.perf_counter() - start

    print(f"torsion {atoms} (+{len(partners)} about the same bond)  {molsys.forcefield}/{molsys.solvent}"
          f"  {args.temperature:g} K  "
          f"{args.windows} windows x {ns_per_window:g} ns  k {result.k_kj_mol_rad2:.1f} kJ/mol/rad^2")
    print(f"decorrelated samples {int(result.n_samples.sum())} (per window {result.n_samples.min()}"
          f"-{result.n_samples.max()}), smallest neighbour overlap {result.min_neighbour_overlap:.3f}, "
          f"exchange acceptance {_range_text(result.exchange_acceptance)}, {runtime_s:.0f} s")
    print()
    print(f"{'state (deg)':<18} {'population':>10}  95% interval")
    for (lo, hi), p, (a, b) in zip(result.ranges_rad, result.populations, result.ci95):
        print(f"[{np.degrees(lo):7.1f},{np.degrees(hi):7.1f}) {p:>10.4f}  [{a:.4f}, {b:.4f}]")
    print()
    print(f"{'torsion (deg)':>13} {'F (kJ/mol)':>11} {'+-95%':>7}")
    for c, f, s in zip(result.profile_centres_rad, result.profile_kj_mol, result.profile_sigma_kj_mol):
        print(f"{np.degrees(c):>13.1f} {f:>11.2f} {Z95 * s:>7.2f}")

    if args.json_out is not None:
        finite = np.isfinite(result.profile_kj_mol)
        report = {
            "method": "umbrella+MBAR",
            "input": args.input,
            "torsion": [int(a) for a in atoms],
            "partner_torsions": [[int(a) for a in t] for t in partners],
            "forcefield": molsys.forcefield,
            "solvent": molsys.solvent,
            "temperature_K": result.temperature_K,
            "windows": int(args.windows),
            "k_kj_mol_rad2": result.k_kj_mol_rad2,
            "ns_per_window": ns_per_window,
            "equilibration_ps": equilibration_ps,
            "exchange_ps": args.exchange_ps,
            "seed": args.seed,
            "states": [
                {"range_deg": [_degrees(lo), _degrees(hi)], "population": float(p),
                 "ci95": [float(a), float(b)]}
                for (lo, hi), p, (a, b) in zip(result.ranges_rad, result.populations, result.ci95)
            ],
            "profile": [
                {"centre_deg": _degrees(c), "free_energy_kj_mol": float(f) if ok else None,
                 "ci95_half_kj_mol": float(Z95 * s) if ok else None}
                for c, f, s, ok in zip(result.profile_centres_rad, result.profile_kj_mol,
                                       result.profile_sigma_kj_mol, finite)
            ],
            "decorrelated_samples": [int(n) for n in result.n_samples],
            "statistical_inefficiency": [round(float(g), 3) for g in result.inefficiency],
            "min_neighbour_overlap": result.min_neighbour_overlap,
            "exchange_acceptance": [None if np.isnan(a) else float(a) for a in result.exchange_acceptance],
            "runtime_s": round(runtime_s, 1),
        }
        atomic_write_bytes(args.json_out, (json.dumps(report, indent=2) + "\n").encode())


if __name__ == "__main__":
    main()
