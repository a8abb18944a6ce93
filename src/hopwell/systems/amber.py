"""Amber ff14SB for capped peptides, through OpenMM's ``amber14-all.xml``."""

from __future__ import annotations

import numpy as np
import openmm
from openmm import app, unit

from hopwell.errors import InputError
from hopwell.systems.solvent import add_obc2

AMBER_FORCE_GROUP = 0


def amber_forcefield(solvent: str | None) -> app.ForceField:
    """OpenMM's Amber ff14SB force field (``amber14-all.xml``); the solvent is added separately."""
    del solvent  # implicit water is added with the built-in GB force, see hopwell.systems.solvent
    return app.ForceField("amber14-all.xml")


def amber_system(topology, solvent: str) -> openmm.System:
    """An OpenMM system for a peptide: ff14SB, no cutoff, no constraints, optional OBC2.

    No constraints keep the ensemble the same for Langevin moves in Cartesian space and flow
    moves in internal coordinates (X-H bonds remain flexible).
    """
    try:
        system = amber_forcefield(solvent).createSystem(
            topology, nonbondedMethod=app.NoCutoff, constraints=None, rigidWater=False
        )
    except ValueError as exc:
        raise InputError(f"Amber ff14SB cannot parameterize this peptide: {exc}") from None
    for force in system.getForces():
        force.setForceGroup(AMBER_FORCE_GROUP)
    if solvent == "obc2":
        add_obc2(system, topology, system_charges(system))
    return system


def system_charges(system: openmm.System) -> np.ndarray:
    """Partial charges (e) of the system's NonbondedForce, shape ``(n_atoms,)``."""
    nb = next(f for f in system.getForces() if isinstance(f, openmm.NonbondedForce))
    return np.array(
        [nb.getParticleParameters(i)[0].value_in_unit(unit.elementary_charge)
         for i in range(nb.getNumParticles())]
    )


def amber_net_charge(topology) -> int:
    """Net charge of a peptide under ff14SB (an integer for standard residues)."""
    total = system_charges(amber_system(topology, "vacuum")).sum()
    return int(round(total))
