"""Energy-evaluation and Langevin throughput against platform, solvent and batch size.

Run ``python -m hopwell.bench.energy`` (``--quick`` for a shorter run). Prints two tables:

1. energy calls per second for batches of conformers and Langevin steps per second, for a
   22-atom peptide and a drug-like molecule, on the Reference and CPU platforms, in vacuum and
   OBC2;
2. for the drug-like molecule in vacuum, the library's MMFF system (Reference platform) beside
   other ways of writing the same energy, each built here from the library's own parameters:
   the previous construction (stretch-bend and out-of-plane terms through OpenMM's
   ``angle()``/``dihedral()`` functions) and the non-bonded pairs as one ``CustomNonbondedForce``
   (per-type tables, 1-2/1-3/1-4 exclusions, the 1-4 pairs as a bond force), on the Reference
   and on the CPU platform.
   "speed-up" is the library's rate over the row's; the largest energy difference from the
   library over the timed conformers is printed beside each, so that every row times the same
   energy function. ``--construction-only`` prints this table alone.
"""

from __future__ import annotations

import argparse
import time
from functools import partial
from pathlib import Path

import numpy as np
import openmm
from rdkit import Chem

from hopwell.systems import mmff
from hopwell.systems.builder import BuildOptions, build
from hopwell.systems.energy import EnergyEvaluator

SYSTEMS = {
    "Ace-Ala-NMe (amber14)": str(Path(__file__).resolve().parents[3] / "systems" / "ace_ala_nme.pdb"),
    # A drug-like aryloxyacetamide with a tertiary amide (made up for benchmarking).
    "aryloxyacetamide (mmff94)": "COc1ccc(OCC(=O)N(C)Cc2ccccc2)cc1",
}
MMFF_LABEL = "aryloxyacetamide (mmff94)"
LANGEVIN_STEPS = 100

_DEG = f"{mmff.DEG_PER_RAD!r}"
_KCAL = f"{mmff.KJ_PER_KCAL!r}"
# The previous construction's expressions: the same terms as the library's, geometry from
# OpenMM's angle(), distance() and dihedral() functions (particles as in the library).
_GEOMETRIC_FUNCTION_EXPR = {
    "MMFF stretch_bend": (
        f"{_KCAL}*c5*dt*(kijk*(10*distance(p1,p2) - rij0) + kkji*(10*distance(p3,p2) - rkj0));"
        f"c5 = {mmff.MDYNE_A_TO_KCAL}/{_DEG}; dt = angle(p1,p2,p3)*{_DEG} - theta0"
    ),
    "MMFF out_of_plane": (
        f"{_KCAL}*0.5*c2*koop*chi^2; c2 = {mmff.MDYNE_A_TO_KCAL}/{_DEG}^2;"
        f"chi = {_DEG}*asin(sin(angle(p4,p2,p1))*sin(dihedral(p4,p2,p1,p3)))"
    ),
}


def _rate(fn, min_seconds: float) -> float:
    """Calls of ``fn`` per second, repeating until ``min_seconds`` have passed."""
    fn()  # warm up (context caches, JIT on the CPU platform)
    count, start = 0, time.perf_counter()
    while time.perf_counter() - start < min_seconds:
        fn()
        count += 1
    return count / (time.perf_counter() - start)


def _force_index(system: openmm.System, name: str) -> int:
    names = [system.getForce(k).getName() for k in range(system.getNumForces())]
    if name not in names:
        raise ValueError(f"system has no force named {name!r}; it has {', '.join(names)}")
    return names.index(name)


def _replace_force(system: openmm.System, name: str, new_forces) -> None:
    """Swap the force called ``name`` for ``new_forces``, which take over its group and name."""
    index = _force_index(system, name)
    group = system.getForce(index).getForceGroup()
    system.removeForce(index)
    for force in new_forces:
        force.setForceGroup(group)
        force.setName(name)
        system.addForce(force)


def geometric_function_system(system: openmm.System) -> openmm.System:
    """A copy of an MMFF ``system`` with the previous stretch-bend and out-of-plane forces.

    Parameters
    ----------
    system : openmm.System
        Built by :func:`hopwell.systems.mmff.add_mmff_forces`.

    Returns
    -------
    openmm.System
        The same terms and parameters, written with OpenMM's ``angle()``, ``distance()`` and
        ``dihedral()`` functions inside ``CustomCompoundBondForce`` objects.
    """
    copy = openmm.XmlSerializer.clone(system)
    for name, expression in _GEOMETRIC_FUNCTION_EXPR.items():
        current = copy.getForce(_force_index(copy, name))
        force = openmm.CustomCompoundBondForce(current.getNumParticlesPerBond(), expression)
        for k in range(current.getNumPerBondParameters()):
            force.addPerBondParameter(current.getPerBondParameterName(k))
        for k in range(current.getNumBonds()):
            force.addBond(*current.getBondParameters(k))
        _replace_force(copy, name, [force])
    return copy


def _pair_tables(mol: Chem.Mol, props) -> tuple[list, np.ndarray, np.ndarray]:
    """MMFF atom types present and RDKit's vdW pair parameters (R*, epsilon) between them."""
    n_atoms = mol.GetNumAtoms()
    types = sorted({props.GetMMFFAtomType(i) for i in range(n_atoms)})
    example = {t: next(i for i in range(n_atoms) if props.GetMMFFAtomType(i) == t) for t in types}
    rstar, epsilon = np.empty((len(types),) * 2), np.empty((len(types),) * 2)
    for a, ta in enumerate(types):
        for b, tb in enumerate(types):
            _, _, rstar[a, b], epsilon[a, b] = props.GetMMFFVdWParams(example[ta], example[tb])
    return types, rstar, epsilon


def _pairs_nonbonded(mol: Chem.Mol, props) -> list:
    """Buffered 14-7 plus buffered Coulomb as one ``CustomNonbondedForce`` over pairs 1-5 and
    beyond (RDKit's pair parameters tabulated by MMFF atom type), and the 1-4 pairs (vdW whole,
    Coulomb scaled by 0.75) as a ``CustomBondForce``.

    One force with one exclusion list, because OpenMM's CPU platform requires every
    ``CustomNonbondedForce`` of a system to exclude the same pairs.
    """
    n_atoms = mol.GetNumAtoms()
    types, rstar, epsilon = _pair_tables(mol, props)
    charges = mmff.mmff_charges(props, n_atoms)
    dielectric = props.GetMMFFDielectricConstant()
    model = "distance" if mmff._is_distance_dielectric(props) else "constant"
    vdw = mmff._VDW_EXPR.split(";")[0]  # the energy, before its "d = 10*r" definition
    energy = f"{vdw} + {mmff._ELE_EXPR[model]}; d = 10*r"
    pairs = openmm.CustomNonbondedForce(f"{energy}; qq = q1*q2/{dielectric!r}; rs = rstar(c1, c2);"
                                        " eps = epsilon(c1, c2)")
    # Discrete2DFunction(xsize, ysize, values) reads values[x + xsize*y]; both tables are symmetric.
    for table_name, table in (("rstar", rstar), ("epsilon", epsilon)):
        pairs.addTabulatedFunction(
            table_name, openmm.Discrete2DFunction(len(types), len(types), table.ravel().tolist())
        )
    pairs.addPerParticleParameter("c")
    pairs.addPerParticleParameter("q")
    for i in range(n_atoms):
        pairs.addParticle([float(types.index(props.GetMMFFAtomType(i))), float(charges[i])])
    one_four = openmm.CustomBondForce(energy)
    for name in ("rs", "eps", "qq"):
        one_four.addPerBondParameter(name)
    topo = Chem.GetDistanceMatrix(mol)
    for i, j in zip(*np.nonzero(np.triu(topo <= 3, k=1))):
        pairs.addExclusion(int(i), int(j))
        if topo[i, j] == 3:
            _, _, rs, eps = props.GetMMFFVdWParams(int(i), int(j))
            one_four.addBond(int(i), int(j), [rs, eps, 0.75 * charges[i] * charges[j] / dielectric])
    return [pairs, one_four]


def custom_nonbonded_system(system: openmm.System, mol: Chem.Mol, props) -> openmm.System:
    """A copy of an MMFF ``system`` with its pair forces as a ``CustomNonbondedForce``.

    Parameters
    ----------
    system : openmm.System
        Built by :func:`hopwell.systems.mmff.add_mmff_forces` from ``mol`` and ``props``.
    mol : rdkit.Chem.Mol
    props : rdkit.ForceField.rdForceField.MMFFMolProperties

    Returns
    -------
    openmm.System
        The same energy, with no cutoff: both pair terms in the van der Waals force's group
        (:func:`_pairs_nonbonded`), the electrostatic force removed.
    """
    copy = openmm.XmlSerializer.clone(system)
    _replace_force(copy, "MMFF vdw", _pairs_nonbonded(mol, props))
    copy.removeForce(_force_index(copy, "MMFF electrostatic"))
    return copy


def _throughput_table(seconds: float, rng: np.random.Generator) -> None:
    header = f"{'system':<27} {'atoms':>5} {'solvent':<7} {'platform':<9} {'batch':>5} {'energies/s':>11} {'steps/s':>9}"
    print(header)
    print("-" * len(header))
    for label, spec in SYSTEMS.items():
        for solvent in ("vacuum", "obc2"):
            molsys = build(spec, BuildOptions(solvent=solvent, n_seeds=3))
            x0 = molsys.seeds_nm[0]
            for platform in ("Reference", "CPU"):
                evaluator = EnergyEvaluator(molsys.system, 300.0, platform=platform)
                step_rate = LANGEVIN_STEPS * _rate(partial(evaluator.langevin, x0, LANGEVIN_STEPS), seconds)
                for batch in (1, 64, 1024):
                    frames = x0 + rng.normal(0, 0.002, size=(batch, *x0.shape))
                    rate = batch * _rate(partial(evaluator.energies_kj, frames), seconds)
                    print(f"{label:<27} {molsys.n_atoms:>5} {solvent:<7} {platform:<9} {batch:>5}"
                          f" {rate:>11.0f} {step_rate:>9.0f}")


def _best_rate(fn, n_calls: int, rounds: int, min_seconds: float) -> float:
    """Best calls per second of ``fn`` over ``rounds`` timed blocks of ``n_calls`` each.

    The best block rather than the mean: other processes on a shared machine only ever slow a
    block down.
    """
    best = 0.0
    for _ in range(rounds):
        count, start = 0, time.perf_counter()
        while time.perf_counter() - start < min_seconds / rounds:
            fn()
            count += n_calls
        best = max(best, count / (time.perf_counter() - start))
    return best


def _interleaved_rates(evaluators: dict, frames: np.ndarray, x0: np.ndarray, seconds: float) -> dict:
    """Best energy calls and Langevin steps per second of each evaluator, name -> (E/s, steps/s).

    Interleaved so that a slow spell of a shared machine falls on every evaluator alike.
    """
    rates = {name: (0.0, 0.0) for name in evaluators}
    for _ in range(3):
        for name, evaluator in evaluators.items():
            energy_rate = _best_rate(partial(evaluator.energies_kj, frames), len(frames), 3, seconds / 3)
            step_rate = _best_rate(
                partial(evaluator.langevin, x0, LANGEVIN_STEPS), LANGEVIN_STEPS, 3, seconds / 3
            )
            rates[name] = (max(rates[name][0], energy_rate), max(rates[name][1], step_rate))
    return rates


def _construction_table(seconds: float, rng: np.random.Generator) -> None:
    molsys = build(SYSTEMS[MMFF_LABEL], BuildOptions(solvent="vacuum", n_seeds=3))
    props = mmff.mmff_properties(Chem.Mol(molsys.mol), "MMFF94", molsys.dielectric)
    systems = {
        "library (coordinate-level terms)": molsys.system,
        "previous (angle/dihedral fns)": geometric_function_system(molsys.system),
        "pairs as CustomNonbondedForce": custom_nonbonded_system(molsys.system, molsys.mol, props),
    }
    platforms = dict.fromkeys(systems, "Reference") | {"pairs as CustomNonbondedForce, CPU": "CPU"}
    systems["pairs as CustomNonbondedForce, CPU"] = systems["pairs as CustomNonbondedForce"]
    x0 = molsys.seeds_nm[0]
    frames = x0 + rng.normal(0, 0.005, size=(64, *x0.shape))
    evaluators, context_s, energies_kj = {}, {}, {}
    for name, system in systems.items():
        start = time.perf_counter()
        evaluators[name] = EnergyEvaluator(system, 300.0, platform=platforms[name], seed=1)
        context_s[name] = time.perf_counter() - start
        energies_kj[name] = evaluators[name].energies_kj(frames)
    rates = _interleaved_rates(evaluators, frames, x0, seconds)
    library = next(iter(systems))
    print(f"\n{MMFF_LABEL}, {molsys.n_atoms} atoms, vacuum, Reference platform unless named,"
          f" {len(frames)} conformers")
    header = (f"{'construction':<38} {'energies/s':>10} {'steps/s':>8} {'speed-up E':>10}"
              f" {'speed-up steps':>14} {'context s':>9} {'max |dE| kJ/mol':>15}")
    print(header)
    print("-" * len(header))
    for name in systems:
        energy_rate, step_rate = rates[name]
        d_energy_kj = np.abs(energies_kj[name] - energies_kj[library]).max()
        print(f"{name:<38} {energy_rate:>10.0f} {step_rate:>8.0f}"
              f" {rates[library][0] / energy_rate:>10.2f} {rates[library][1] / step_rate:>14.2f}"
              f" {context_s[name]:>9.2f} {d_energy_kj:>15.1e}")


def main(argv=None) -> None:
    """Print the throughput table, then the MMFF construction table."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="shorter timings")
    parser.add_argument("--construction-only", action="store_true",
                        help="print only the MMFF construction table")
    args = parser.parse_args(argv)
    seconds = 0.3 if args.quick else 1.5
    rng = np.random.default_rng(0)
    if not args.construction_only:
        _throughput_table(seconds, rng)
    _construction_table(3 * seconds, rng)


if __name__ == "__main__":
    main()
