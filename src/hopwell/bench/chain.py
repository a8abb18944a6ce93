"""The four-atom test chain: a system whose torsion populations are known exactly.

C0-C1-C2-C3 with harmonic bonds and angles and one torsion potential V(phi) with three wells of
unequal depth, and no other terms. Its torsion marginal is exactly proportional to
exp(-V(phi)/kT), so well populations are ratios of one-dimensional integrals, computed here
with scipy.integrate.quad from V alone (nothing of hopwell's sampling or analysis is used).
The tests (``tests/chain_systems.py``) and :mod:`hopwell.bench.calibration` share it.
"""

from __future__ import annotations

import mdtraj
import numpy as np
import openmm
from rdkit import Chem
from scipy import constants, integrate, optimize

TEMPERATURE_K = 300.0
# kT in kJ/mol from the CODATA molar gas constant (scipy.constants), not from hopwell.
KT_KJ = constants.R * TEMPERATURE_K / 1000.0

MASS_DA = 12.0
BOND_NM = 0.153
BOND_K = 2.0e5  # kJ/mol/nm^2: a C-C stretch, period ~34 fs at these masses (1 fs resolves it)
ANGLE_RAD = np.radians(110.0)
ANGLE_K = 500.0  # kJ/mol/rad^2: thermal spread sqrt(kT/k) ~ 4 degrees at 300 K
# V(phi) = A (1 + cos 3 phi) + B cos phi + C sin phi: the threefold term makes three wells near
# -60, 60 and 180 degrees separated by barriers of about 2A; B deepens the 180 well and C makes
# -60 shallower than 60. With A = 6 kT the barriers are 11.6-12.5 kT.
TORSION_A_KJ = 6.0 * KT_KJ
TORSION_B_KJ = 0.48 * KT_KJ
TORSION_C_KJ = -0.24 * KT_KJ
WELL_CENTRES_DEG = (-60.0, 60.0, 180.0)


def torsion_energy_kj(phi):
    """The chain's torsion potential V(phi) in kJ/mol (phi in radians)."""
    phi = np.asarray(phi, dtype=float)
    return (TORSION_A_KJ * (1.0 + np.cos(3.0 * phi)) + TORSION_B_KJ * np.cos(phi)
            + TORSION_C_KJ * np.sin(phi))


def chain_system(n_atoms: int = 4) -> openmm.System:
    """OpenMM System of the chain: custom bond, angle and torsion forces, nothing else.

    ``n_atoms`` > 4 continues the chain with the same bond, angle and torsion terms (one
    torsion per four consecutive atoms).
    """
    system = openmm.System()
    for _ in range(n_atoms):
        system.addParticle(MASS_DA)
    bonds = openmm.CustomBondForce(f"0.5*{BOND_K}*(r-{BOND_NM})^2")
    for i in range(n_atoms - 1):
        bonds.addBond(i, i + 1, [])
    angles = openmm.CustomAngleForce(f"0.5*{ANGLE_K}*(theta-{ANGLE_RAD})^2")
    for i in range(n_atoms - 2):
        angles.addAngle(i, i + 1, i + 2, [])
    torsion = openmm.CustomTorsionForce(
        f"{TORSION_A_KJ}*(1+cos(3*theta)) + {TORSION_B_KJ}*cos(theta) + {TORSION_C_KJ}*sin(theta)")
    for i in range(n_atoms - 3):
        torsion.addTorsion(i, i + 1, i + 2, i + 3, [])
    for force in (bonds, angles, torsion):
        system.addForce(force)
    return system


def chain_mol(n_atoms: int = 4) -> Chem.Mol:
    """``n_atoms`` carbons in a chain, single bonds, no hydrogens at all (explicit or implicit)."""
    rw = Chem.RWMol()
    for _ in range(n_atoms):
        atom = Chem.Atom(6)
        atom.SetNoImplicit(True)
        atom.SetNumExplicitHs(0)
        rw.AddAtom(atom)
    for i in range(n_atoms - 1):
        rw.AddBond(i, i + 1, Chem.BondType.SINGLE)
    mol = rw.GetMol()
    mol.UpdatePropertyCache(strict=False)
    return mol


def chain_positions_nm(phi_deg: float) -> np.ndarray:
    """Chain at its bond length and angle with dihedral 0-1-2-3 equal to ``phi_deg``, (4, 3) nm."""
    phi = np.radians(phi_deg)
    s, c = np.sin(np.pi - ANGLE_RAD), np.cos(np.pi - ANGLE_RAD)
    x1 = np.zeros(3)
    x2 = np.array([BOND_NM, 0.0, 0.0])
    x0 = x1 + BOND_NM * np.array([-c, s, 0.0])
    x3 = x2 + BOND_NM * np.array([c, s * np.cos(phi), s * np.sin(phi)])
    return np.stack([x0, x1, x2, x3])


def dihedrals_rad(positions_nm: np.ndarray, quad=(0, 1, 2, 3)) -> np.ndarray:
    """Dihedral of atoms ``quad`` for each frame, by mdtraj.compute_dihedrals, in [-pi, pi]."""
    traj = mdtraj.Trajectory(np.asarray(positions_nm, dtype=np.float32), None)
    return mdtraj.compute_dihedrals(traj, np.array([quad]))[:, 0].astype(float)


def well_edges_rad() -> np.ndarray:
    """The three maxima of V (bounded search by scipy.optimize near 0 and +-120 degrees), sorted."""
    edges = []
    for centre in np.radians([-120.0, 0.0, 120.0]):
        res = optimize.minimize_scalar(lambda p: -torsion_energy_kj(p),
                                       bounds=(centre - 0.5, centre + 0.5), method="bounded",
                                       options={"xatol": 1e-10})
        edges.append(res.x)
    return np.array(edges)


def exact_populations() -> np.ndarray:
    """Exact well populations (-60, 60, 180) from scipy.integrate.quad of exp(-V/kT).

    Why this is exact for the chain's full Boltzmann distribution: in internal coordinates
    (three bond lengths r, two angles theta, the torsion phi, and six rigid-body coordinates)
    the Cartesian volume element is r1^2 r2^2 r3^2 sin(theta1) sin(theta2) times the rigid-body
    measure, which does not involve phi, and the energy is a sum
    U = U_bonds(r) + U_angles(theta) + V(phi). The density therefore factorizes as
    f(r, theta) * exp(-V(phi)/kT), and the phi marginal is exp(-V(phi)/kT) normalised over the
    circle; the same holds conditionally on any fixed bonds and angles.
    """
    edges = well_edges_rad()
    v_min = torsion_energy_kj(np.radians(180.0))

    def weight(p):
        return np.exp(-(torsion_energy_kj(p) - v_min) / KT_KJ)

    bounds = [(edges[0], edges[1]), (edges[1], edges[2]), (edges[2], edges[0] + 2.0 * np.pi)]
    z = np.array([integrate.quad(weight, a, b, epsabs=0.0, epsrel=1e-12, limit=200)[0] for a, b in bounds])
    return z / z.sum()
