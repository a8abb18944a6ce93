"""The energy evaluator: one OpenMM context per system, used for batches of conformers.

Positions are nm, energies kJ/mol, times ps; reduced energies are u = U / kT.
"""

from __future__ import annotations

import numpy as np
import openmm
from openmm import unit

from hopwell.systems.integrators import make_integrator

# Molar gas constant, kJ/mol/K (CODATA 2018, exact by the SI definition of k_B and N_A).
GAS_CONSTANT_KJ = 0.00831446261815324
# Below this many atoms the Reference platform is used. Measured here (2 cores, OpenMM 8.6.1,
# `python -m hopwell.bench.energy` and DEVELOPERS.md): Reference was faster than CPU per energy
# call and per Langevin step at every size tried, 30x for the 22-atom peptide and 1.4x for a
# 140-atom MMFF molecule, the gap closing with size; the CPU platform is kept for larger ones.
REFERENCE_PLATFORM_MAX_ATOMS = 150
DEFAULT_TIMESTEP_PS = 0.001
DEFAULT_FRICTION_PER_PS = 1.0


def kT_kj(temperature_K: float) -> float:
    """Thermal energy k_B T in kJ/mol."""
    return GAS_CONSTANT_KJ * temperature_K


def choose_platform(n_atoms: int, name: str | None = None) -> openmm.Platform:
    """The OpenMM platform to use: ``name`` if given, else by atom count."""
    if name is None:
        name = "Reference" if n_atoms <= REFERENCE_PLATFORM_MAX_ATOMS else "CPU"
    try:
        return openmm.Platform.getPlatformByName(name)
    except Exception:  # OpenMM raises a plain Exception for unknown platforms
        names = [openmm.Platform.getPlatform(i).getName() for i in range(openmm.Platform.getNumPlatforms())]
        raise ValueError(f"unknown OpenMM platform {name!r}; available: {', '.join(names)}") from None


class EnergyEvaluator:
    """Energies, forces, minimization and Langevin dynamics for one OpenMM system.

    Parameters
    ----------
    system : openmm.System
    temperature_K : float
        Sets kT for reduced energies and the Langevin thermostat.
    platform : str, optional
        OpenMM platform name; chosen from the atom count when omitted.
    timestep_ps, friction_per_ps : float
        ``LangevinMiddleIntegrator`` settings.
    local_move : {"langevin", "ghmc"}
        Unadjusted ``LangevinMiddleIntegrator`` or exact GHMC (see :mod:`hopwell.systems.integrators`).
    seed : int
        Seed of the integrator's random numbers and of the initial velocities drawn for each
        Langevin segment (0 picks one at random).

    Examples
    --------
    >>> from hopwell.systems.builder import build
    >>> molsys = build("CCO")
    >>> evaluator = EnergyEvaluator(molsys.system, 300.0)
    >>> evaluator.energies_kj(molsys.seeds_nm).shape == (len(molsys.seeds_nm),)
    True
    """

    def __init__(
        self,
        system: openmm.System,
        temperature_K: float,
        platform: str | None = None,
        timestep_ps: float = DEFAULT_TIMESTEP_PS,
        friction_per_ps: float = DEFAULT_FRICTION_PER_PS,
        seed: int = 0,
        local_move: str = "langevin",
    ):
        if temperature_K <= 0:
            raise ValueError(f"temperature must be positive, got {temperature_K} K")
        self.n_atoms = system.getNumParticles()
        self.temperature_K = float(temperature_K)
        self.kT = kT_kj(temperature_K)
        self.integrator = make_integrator(local_move, temperature_K, friction_per_ps, timestep_ps, self.kT)
        self.integrator.setRandomNumberSeed(seed)
        self.rng = np.random.default_rng(seed if seed else None)
        self.platform = choose_platform(self.n_atoms, platform)
        self.context = openmm.Context(system, self.integrator, self.platform)
        self.masses_da = np.array(
            [system.getParticleMass(i).value_in_unit(unit.dalton) for i in range(self.n_atoms)]
        )

    def _check(self, positions_nm) -> np.ndarray:
        x = np.asarray(positions_nm, dtype=float)
        if x.ndim == 2:
            x = x[None]
        if x.ndim != 3 or x.shape[1:] != (self.n_atoms, 3):
            raise ValueError(
                f"positions_nm must have shape (batch, {self.n_atoms}, 3), got {np.shape(positions_nm)}"
            )
        return x

    def energies_kj(self, positions_nm, groups: set[int] | None = None) -> np.ndarray:
        """Potential energies (kJ/mol), shape ``(batch,)``; non-finite where OpenMM fails."""
        x = self._check(positions_nm)
        out = np.empty(len(x))
        kwargs = {"groups": groups} if groups is not None else {}
        for k, xyz in enumerate(x):
            self.context.setPositions(xyz)
            state = self.context.getState(getEnergy=True, **kwargs)
            out[k] = state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
        return out

    def reduced(self, positions_nm) -> np.ndarray:
        """Reduced potential energies u = U / kT, shape ``(batch,)``."""
        return self.energies_kj(positions_nm) / self.kT

    def forces_kj_nm(self, positions_nm) -> np.ndarray:
        """Forces (kJ/mol/nm), shape ``(batch, n_atoms, 3)``."""
        x = self._check(positions_nm)
        out = np.empty_like(x)
        for k, xyz in enumerate(x):
            self.context.setPositions(xyz)
            state = self.context.getState(getForces=True)
            out[k] = state.getForces(asNumpy=True).value_in_unit(unit.kilojoule_per_mole / unit.nanometer)
        return out

    def minimize(self, positions_nm, tolerance_kj_nm: float = 1.0, max_iterations: int = 0) -> np.ndarray:
        """Local energy minimization (L-BFGS, OpenMM), shape ``(batch, n_atoms, 3)``."""
        x = self._check(positions_nm)
        out = np.empty_like(x)
        for k, xyz in enumerate(x):
            self.context.setPositions(xyz)
            openmm.LocalEnergyMinimizer.minimize(self.context, tolerance_kj_nm, max_iterations)
            out[k] = self.context.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer)
        return out

    def local_acceptance(self) -> float | None:
        """Fraction of accepted GHMC steps so far (None for Langevin)."""
        if not isinstance(self.integrator, openmm.CustomIntegrator):
            return None
        trials = self.integrator.getGlobalVariableByName("ntrials")
        return self.integrator.getGlobalVariableByName("naccept") / trials if trials else float("nan")

    def maxwell_boltzmann(self) -> np.ndarray:
        """Velocities (nm/ps) drawn from Maxwell-Boltzmann at the evaluator's temperature.

        Each component is normal with variance kT/m; with kT in kJ/mol and m in Da,
        kT/m is in (nm/ps)^2. Shape ``(n_atoms, 3)``.
        """
        sigma = np.sqrt(self.kT / self.masses_da)[:, None]
        return sigma * self.rng.standard_normal((self.n_atoms, 3))

    def langevin(self, positions_nm, n_steps: int, velocities_nm_ps=None):
        """Run ``n_steps`` of Langevin dynamics from one structure.

        Parameters
        ----------
        positions_nm : array, shape ``(n_atoms, 3)``
        n_steps : int
        velocities_nm_ps : array, shape ``(n_atoms, 3)``, optional
            The integrator's own velocities, as returned by a previous call (half a step behind
            the positions for Langevin). When omitted, drawn from Maxwell-Boltzmann at the
            evaluator's temperature and shifted to the integrator's half step.

        Returns
        -------
        positions_nm, velocities_nm_ps : numpy.ndarray, shape ``(n_atoms, 3)``
        energy_kj : float
        """
        x = self._check(positions_nm)[0]
        self.context.setPositions(x)
        if velocities_nm_ps is None:
            velocities_nm_ps = self.maxwell_boltzmann()
            if isinstance(self.integrator, openmm.LangevinMiddleIntegrator):
                # This integrator keeps velocities half a step behind the positions (leapfrog
                # form): v(t - dt/2) = v(t) - (dt/2) f(x(t)) / m. Setting an on-step draw as is
                # correlates v with x wrongly, and the bond vibrations amplify that at some
                # segment lengths: measured on the four-atom chain, 50-step segments from
                # fresh velocities gave a bond+angle energy of 2.83 kT against 2.50 exact.
                forces = self.context.getState(getForces=True).getForces(asNumpy=True)
                dt_ps = self.integrator.getStepSize().value_in_unit(unit.picosecond)
                velocities_nm_ps = velocities_nm_ps - 0.5 * dt_ps * forces.value_in_unit(
                    unit.kilojoule_per_mole / unit.nanometer) / self.masses_da[:, None]
        self.context.setVelocities(np.asarray(velocities_nm_ps, dtype=float))
        self.integrator.step(int(n_steps))
        state = self.context.getState(getPositions=True, getVelocities=True, getEnergy=True)
        return (
            state.getPositions(asNumpy=True).value_in_unit(unit.nanometer),
            state.getVelocities(asNumpy=True).value_in_unit(unit.nanometer / unit.picosecond),
            state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole),
        )
