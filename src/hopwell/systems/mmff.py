"""MMFF94 and MMFF94s expressed as OpenMM forces, every parameter taken from RDKit.

The functional forms are those of Halgren, J. Comput. Chem. 17:490-519 (1996) (MMFF94) and
J. Comput. Chem. 20:720-729 (1999) (MMFF94s), with the constants exactly as RDKit's
implementation writes them (Code/ForceField/MMFF/*.h and Builder.cpp), so that energies agree
with ``MMFFGetMoleculeForceField(...).CalcEnergy()`` to round-off. RDKit works in Angstrom and
kcal/mol; OpenMM in nm and kJ/mol. Each expression below converts once, at its own edge:
distances from nm to Angstrom (``10*r``) and energies from kcal/mol to kJ/mol (``KJ_PER_KCAL``).

Every term family lives in its own OpenMM force group (``MMFF_FORCE_GROUPS``) so that energies
can be checked term by term.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import openmm
from rdkit import Chem
from rdkit.Chem import rdForceFieldHelpers

from hopwell.errors import InputError

KJ_PER_KCAL = 4.184
# RDKit Params.h: MDYNE_A_TO_KCAL_MOL = 143.9325, DEG2RAD = pi/180.
MDYNE_A_TO_KCAL = 143.9325
DEG_PER_RAD = 180.0 / math.pi
# Electrostatic constant as MMFF (and RDKit) write it, kcal*Angstrom/mol/e^2. OpenMM's own
# 138.935... kJ*nm/mol differs by 2.4e-5 relative, so it is written out here (trap noted in the
# project's references).
MMFF_COULOMB_KCAL_A = 332.0716
# MMFF atom types whose MMFFPROP "lin" flag is set (linear centres: sp carbon, sp nitrogen,
# the central N of azides and isonitrile N). Halgren 1996, MMFFPROP.PAR; from memory, confirmed
# by the angle-term comparison with RDKit on nitriles, alkynes and azides in the tests.
LINEAR_MMFF_TYPES = frozenset({4, 42, 53, 61})

MMFF_FORCE_GROUPS = {
    "bond": 0,
    "angle": 1,
    "stretch_bend": 2,
    "out_of_plane": 3,
    "torsion": 4,
    "vdw": 5,
    "electrostatic": 6,
}

# RDKit's codes for MMFFMolProperties.SetMMFFDielectricModel (1 constant, 2 distance-dependent).
_RDKIT_DIELECTRIC_MODEL = {"constant": 1, "distance": 2}

_KCAL = f"{KJ_PER_KCAL!r}"
_BELOW_ONE = math.nextafter(1.0, 0.0)
_BOND_EXPR = (
    f"{_KCAL}*{MDYNE_A_TO_KCAL}*0.5*kb*dr^2*(1 + cs*dr + (7/12)*cs^2*dr^2);"
    "cs = -2.0; dr = 10*r - r0"
)
_ANGLE_EXPR = (
    f"{_KCAL}*(lin*{MDYNE_A_TO_KCAL}*ka*(1 + cos(theta))"
    f" + (1 - lin)*0.5*c2*ka*dt^2*(1 + cb*dt));"
    f"c2 = {MDYNE_A_TO_KCAL}/{DEG_PER_RAD!r}^2; cb = -0.006981317;"
    f"dt = theta*{DEG_PER_RAD!r} - theta0"
)


def _bond_vectors(*pairs: tuple[str, int, int]) -> str:
    """Lepton definitions of bond vectors in nm: ``name = p_to - p_from`` per axis."""
    return "".join(
        f"{name}{axis} = {axis}{to} - {axis}{origin};"
        for name, to, origin in pairs
        for axis in "xyz"
    )


def _norm(u: str) -> str:
    """Lepton expression for the length of a vector defined by :func:`_bond_vectors`."""
    return f"sqrt({u}x^2 + {u}y^2 + {u}z^2)"


# Stretch-bend and out-of-plane terms are written on particle coordinates rather than with
# OpenMM's angle()/dihedral() functions: the Reference platform differentiates the geometric
# functions of a CustomCompoundBondForce slowly. The trade, measured by
# ``python -m hopwell.bench.energy`` (which still builds the angle()/dihedral() form): energy
# calls several times faster, context creation about 0.1 s slower (Lepton differentiates the
# coordinate expressions at context creation). Bond vectors stay in nm: only the
# stretch-bend's lengths need Angstrom, the out-of-plane sine is a ratio.
#
# Stretch-bend (RDKit StretchBend.cpp): particles [i, j, k], j central,
# E = c5 * dtheta_deg * (kijk * dr_ij + kkji * dr_kj), c5 = MDYNE_A_TO_KCAL / DEG2RAD. The
# cosine is clipped as RDKit's clipToOne does, to the largest double below 1 rather than to 1,
# so that an exactly straight angle gives a finite energy and finite forces.
_STRETCH_BEND_EXPR = (
    f"{_KCAL}*c5*dt*(kijk*(rij - rij0) + kkji*(rkj - rkj0));"
    f"c5 = {MDYNE_A_TO_KCAL}/{DEG_PER_RAD!r};"
    f"dt = {DEG_PER_RAD!r}*acos(max(-{_BELOW_ONE!r}, min({_BELOW_ONE!r}, cos_t))) - theta0;"
    "cos_t = (ax*bx + ay*by + az*bz)/(rnm_ij*rnm_kj);"
    f"rij = 10*rnm_ij; rkj = 10*rnm_kj; rnm_ij = {_norm('a')}; rnm_kj = {_norm('b')};"
    + _bond_vectors(("a", 1, 2), ("b", 3, 2))
)
# Wilson angle chi of atom l out of the plane (i, j, k), j central (RDKit OopBend.cpp):
# sin(chi) = n . u_jl with n the unit normal of u_ji x u_jk. Particles are [i, j, k, l];
# with the bond vectors a = j->i, b = j->k, c = j->l, sin(chi) = a.(b x c) / (|a x b||c|),
# within [-1, 1] up to round-off by Cauchy-Schwarz. RDKit's clip to [-1, 1] matters only at
# chi = 90 degrees, where asin has no derivative either; it is left out here because it
# slowed context creation by about a quarter.
_OOP_EXPR = (
    f"{_KCAL}*0.5*c2*koop*chi^2;"
    f"c2 = {MDYNE_A_TO_KCAL}/{DEG_PER_RAD!r}^2;"
    f"chi = {DEG_PER_RAD!r}*asin(triple/sqrt(nab2*rc2));"
    "triple = ax*(by*cz - bz*cy) + ay*(bz*cx - bx*cz) + az*(bx*cy - by*cx);"
    "nab2 = (ay*bz - az*by)^2 + (az*bx - ax*bz)^2 + (ax*by - ay*bx)^2;"
    "rc2 = cx^2 + cy^2 + cz^2;"
    + _bond_vectors(("a", 1, 2), ("b", 3, 2), ("c", 4, 2))
)
_VDW_EXPR = (
    f"{_KCAL}*eps*(1.07*rs/(d + 0.07*rs))^7*(1.12*rs^7/(d^7 + 0.12*rs^7) - 2); d = 10*r"
)
_ELE_EXPR = {
    "constant": f"{_KCAL}*{MMFF_COULOMB_KCAL_A}*qq/(10*r + 0.05)",
    "distance": f"{_KCAL}*{MMFF_COULOMB_KCAL_A}*qq/(10*r + 0.05)^2",
}


@dataclass(frozen=True)
class MMFFTerms:
    """Counts of the MMFF terms placed in an OpenMM system (useful in summaries and tests)."""

    bonds: int
    angles: int
    stretch_bends: int
    out_of_planes: int
    torsions: int
    vdw_pairs: int
    electrostatic_pairs: int


def mmff_properties(mol: Chem.Mol, variant: str, dielectric: str = "constant"):
    """Type a molecule with MMFF and return RDKit's properties object.

    Parameters
    ----------
    mol : rdkit.Chem.Mol
        Molecule with explicit hydrogens. RDKit sets MMFF aromaticity on it in place.
    variant : {"MMFF94", "MMFF94s"}
    dielectric : {"constant", "distance"}
        Constant (D = 1) or distance-dependent (D = r) dielectric.

    Raises
    ------
    InputError
        When MMFF cannot type an atom (metals, radicals, unusual valences).
    """
    props = rdForceFieldHelpers.MMFFGetMoleculeProperties(mol, mmffVariant=variant)
    if props is None or not rdForceFieldHelpers.MMFFHasAllMoleculeParams(mol):
        raise InputError(
            f"{variant} cannot type this molecule (unsupported element, charge state or radical);"
            " check the structure or protonation"
        )
    if dielectric not in _RDKIT_DIELECTRIC_MODEL:
        raise InputError(f"unknown dielectric model {dielectric!r}; use constant or distance")
    props.SetMMFFDielectricModel(_RDKIT_DIELECTRIC_MODEL[dielectric])
    return props


def _bonded_paths(mol: Chem.Mol):
    """Angles (i, j, k) and proper torsions (i, j, k, l) of the bond graph, each once."""
    angles, torsions = [], []
    for j in mol.GetAtoms():
        nbrs = [a.GetIdx() for a in j.GetNeighbors()]
        for a in range(len(nbrs)):
            for b in range(a + 1, len(nbrs)):
                angles.append((nbrs[a], j.GetIdx(), nbrs[b]))
    # RDKit's default torsion bond pattern: neither end terminal nor part of a triple bond.
    for bond in mol.GetBonds():
        j, k = bond.GetBeginAtom(), bond.GetEndAtom()
        if j.GetDegree() < 2 or k.GetDegree() < 2:
            continue
        if any(b.GetBondType() == Chem.BondType.TRIPLE for b in j.GetBonds()) or any(
            b.GetBondType() == Chem.BondType.TRIPLE for b in k.GetBonds()
        ):
            continue
        for i in j.GetNeighbors():
            if i.GetIdx() == k.GetIdx():
                continue
            for l in k.GetNeighbors():
                if l.GetIdx() in (j.GetIdx(), i.GetIdx()):
                    continue
                torsions.append((i.GetIdx(), j.GetIdx(), k.GetIdx(), l.GetIdx()))
    return angles, torsions


def add_mmff_forces(system: openmm.System, mol: Chem.Mol, props) -> MMFFTerms:
    """Add every MMFF term of ``mol`` to an OpenMM ``system`` (one force group per family).

    Parameters
    ----------
    system : openmm.System
        System with one particle per atom of ``mol``, in the same order.
    mol : rdkit.Chem.Mol
        The typed molecule (the one passed to :func:`mmff_properties`).
    props : rdkit.ForceField.rdForceField.MMFFMolProperties
        RDKit's MMFF properties for ``mol``.

    Returns
    -------
    MMFFTerms
        How many terms of each family were added.
    """
    n_atoms = mol.GetNumAtoms()
    if system.getNumParticles() != n_atoms:
        raise ValueError("system and molecule have different atom counts")

    bond_force = openmm.CustomBondForce(_BOND_EXPR)
    bond_force.addPerBondParameter("kb")
    bond_force.addPerBondParameter("r0")
    r0_angstrom = {}
    for bond in mol.GetBonds():
        i, j = bond.GetBeginAtomIdx(), bond.GetEndAtomIdx()
        _, kb, r0 = props.GetMMFFBondStretchParams(mol, i, j)
        r0_angstrom[frozenset((i, j))] = r0
        bond_force.addBond(i, j, [kb, r0])

    angles, torsions = _bonded_paths(mol)
    angle_force = openmm.CustomAngleForce(_ANGLE_EXPR)
    for name in ("ka", "theta0", "lin"):
        angle_force.addPerAngleParameter(name)
    sb_force = openmm.CustomCompoundBondForce(3, _STRETCH_BEND_EXPR)
    for name in ("kijk", "kkji", "rij0", "rkj0", "theta0"):
        sb_force.addPerBondParameter(name)
    for i, j, k in angles:
        _, ka, theta0 = props.GetMMFFAngleBendParams(mol, i, j, k)
        linear = props.GetMMFFAtomType(j) in LINEAR_MMFF_TYPES
        angle_force.addAngle(i, j, k, [ka, theta0, float(linear)])
        if linear:
            continue  # RDKit adds no stretch-bend at linear centres
        sb = props.GetMMFFStretchBendParams(mol, i, j, k)
        if sb is None:
            continue
        _, kijk, kkji = sb
        sb_force.addBond(
            [i, j, k],
            [kijk, kkji, r0_angstrom[frozenset((i, j))], r0_angstrom[frozenset((k, j))], theta0],
        )

    oop_force = openmm.CustomCompoundBondForce(4, _OOP_EXPR)
    oop_force.addPerBondParameter("koop")
    for atom in mol.GetAtoms():
        if atom.GetDegree() != 3:
            continue
        j = atom.GetIdx()
        i, k, l = (a.GetIdx() for a in atom.GetNeighbors())
        koop = props.GetMMFFOopBendParams(mol, i, j, k, l)
        if not koop:
            continue
        # Each neighbour in turn is the out-of-plane atom (RDKit Builder.cpp, addOop).
        for a, b, c in ((i, k, l), (i, l, k), (k, l, i)):
            oop_force.addBond([a, j, b, c], [koop])

    torsion_force = openmm.PeriodicTorsionForce()
    n_torsions = 0
    for i, j, k, l in torsions:
        params = props.GetMMFFTorsionParams(mol, i, j, k, l)
        if params is None:
            continue
        _, v1, v2, v3 = params
        # 0.5*[V1(1+cos p) + V2(1-cos 2p) + V3(1+cos 3p)] as k(1+cos(n p - phase)) terms.
        for n, v, phase in ((1, v1, 0.0), (2, v2, math.pi), (3, v3, 0.0)):
            if v != 0.0:
                torsion_force.addTorsion(i, j, k, l, n, phase, 0.5 * v * KJ_PER_KCAL)
        n_torsions += 1

    vdw_force = openmm.CustomBondForce(_VDW_EXPR)
    vdw_force.addPerBondParameter("rs")
    vdw_force.addPerBondParameter("eps")
    dielectric_model = "distance" if _is_distance_dielectric(props) else "constant"
    ele_force = openmm.CustomBondForce(_ELE_EXPR[dielectric_model])
    ele_force.addPerBondParameter("qq")
    charges = np.array([props.GetMMFFPartialCharge(i) for i in range(n_atoms)])
    dielectric = props.GetMMFFDielectricConstant()
    topo = Chem.GetDistanceMatrix(mol)
    n_ele = 0
    for i in range(n_atoms):
        for j in range(i + 1, n_atoms):
            if topo[i, j] < 3:
                continue  # 1-2 and 1-3 pairs carry no non-bonded terms in MMFF
            _, _, rs, eps = props.GetMMFFVdWParams(i, j)
            vdw_force.addBond(i, j, [rs, eps])
            qq = charges[i] * charges[j] / dielectric
            if qq != 0.0:
                scale = 0.75 if topo[i, j] == 3 else 1.0  # MMFF 1-4 electrostatic scaling
                ele_force.addBond(i, j, [qq * scale])
                n_ele += 1

    forces = {
        "bond": bond_force,
        "angle": angle_force,
        "stretch_bend": sb_force,
        "out_of_plane": oop_force,
        "torsion": torsion_force,
        "vdw": vdw_force,
        "electrostatic": ele_force,
    }
    for name, force in forces.items():
        force.setForceGroup(MMFF_FORCE_GROUPS[name])
        force.setName(f"MMFF {name}")
        system.addForce(force)
    return MMFFTerms(
        bonds=bond_force.getNumBonds(),
        angles=angle_force.getNumAngles(),
        stretch_bends=sb_force.getNumBonds(),
        out_of_planes=oop_force.getNumBonds(),
        torsions=n_torsions,
        vdw_pairs=vdw_force.getNumBonds(),
        electrostatic_pairs=n_ele,
    )


def mmff_charges(props, n_atoms: int) -> np.ndarray:
    """MMFF partial charges (e), shape ``(n_atoms,)``."""
    return np.array([props.GetMMFFPartialCharge(i) for i in range(n_atoms)])


def _is_distance_dielectric(props) -> bool:
    return props.GetMMFFDielectricModel() == _RDKIT_DIELECTRIC_MODEL["distance"]
