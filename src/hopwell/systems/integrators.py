"""Local-move integrators: unadjusted Langevin and its Metropolized form, GHMC.

GHMC (generalized hybrid Monte Carlo; Horowitz, Phys. Lett. B 268:247, 1991) refreshes the
velocities partially (v <- a v + sqrt(1 - a^2) sqrt(kT/m) xi, a = exp(-gamma dt)), takes one
velocity-Verlet step, and accepts it with probability min(1, exp(-dH/kT)); a rejection restores
the positions and reverses the velocities. It samples the Boltzmann distribution exactly for
any time step, at the price of rejected steps; unadjusted Langevin has a small time-step bias.
"""

from __future__ import annotations

import math

import openmm
from openmm import unit

LOCAL_MOVES = ("langevin", "ghmc")


def ghmc_integrator(temperature_K: float, friction_per_ps: float, timestep_ps: float,
                    kT_kj: float) -> openmm.CustomIntegrator:
    """A GHMC ``CustomIntegrator``; globals ``naccept`` and ``ntrials`` count its steps."""
    integrator = openmm.CustomIntegrator(timestep_ps * unit.picosecond)
    a = math.exp(-friction_per_ps * timestep_ps)
    integrator.addGlobalVariable("a", a)
    integrator.addGlobalVariable("b", math.sqrt(1.0 - a * a))
    integrator.addGlobalVariable("kT", kT_kj)
    for name in ("ke", "Eold", "Enew", "accept", "naccept", "ntrials"):
        integrator.addGlobalVariable(name, 0.0)
    for name in ("sigma", "xold", "vold"):
        integrator.addPerDofVariable(name, 0.0)
    integrator.addComputePerDof("sigma", "sqrt(kT/m)")
    integrator.addUpdateContextState()
    integrator.addComputePerDof("v", "a*v + b*sigma*gaussian")
    integrator.addComputeSum("ke", "0.5*m*v*v")
    integrator.addComputeGlobal("Eold", "ke + energy")
    integrator.addComputePerDof("xold", "x")
    integrator.addComputePerDof("vold", "v")
    integrator.addComputePerDof("v", "v + 0.5*dt*f/m")
    integrator.addComputePerDof("x", "x + dt*v")
    integrator.addComputePerDof("v", "v + 0.5*dt*f/m")
    integrator.addComputeSum("ke", "0.5*m*v*v")
    integrator.addComputeGlobal("Enew", "ke + energy")
    integrator.addComputeGlobal("accept", "step(exp(-(Enew - Eold)/kT) - uniform)")
    integrator.addComputePerDof("x", "x*accept + xold*(1 - accept)")
    integrator.addComputePerDof("v", "v*accept - vold*(1 - accept)")
    integrator.addComputeGlobal("naccept", "naccept + accept")
    integrator.addComputeGlobal("ntrials", "ntrials + 1")
    integrator.addComputePerDof("v", "a*v + b*sigma*gaussian")
    return integrator


def make_integrator(kind: str, temperature_K: float, friction_per_ps: float, timestep_ps: float,
                    kT_kj: float) -> openmm.Integrator:
    """``LangevinMiddleIntegrator`` (kind "langevin") or GHMC (kind "ghmc")."""
    if kind == "langevin":
        return openmm.LangevinMiddleIntegrator(
            temperature_K * unit.kelvin, friction_per_ps / unit.picosecond, timestep_ps * unit.picosecond)
    if kind == "ghmc":
        return ghmc_integrator(temperature_K, friction_per_ps, timestep_ps, kT_kj)
    raise ValueError(f"unknown local move {kind!r}; use one of {', '.join(LOCAL_MOVES)}")
