"""Cheap geometric guards that reject hopwell proposals before their energy is computed.

:class:`ClashGuard` flags structures in which two atoms more than a few bonds apart sit inside
each other (or whose coordinates are not finite); :class:`StereoGuard` flags structures in which
a stereocentre or a stereo double bond differs from the reference structure. Such proposals are
not conformers of the molecule being sampled, and grossly overlapping atoms can overflow a
force field's repulsion. :class:`ProposalGuard` applies both and reports the two causes
separately, so rejections can be counted by cause.

All guards take batch-first positions in nm, shape ``(batch, n_atoms, 3)``, as a numpy array or
a torch tensor, and return a boolean mask of shape ``(batch,)`` of the same kind (True: reject).
Evaluation is vectorised over the batch and over the checked pairs / centres; the clash check
holds a float64 array of shape ``(batch, n_pairs, 3)``, so very large batches should be split.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import torch
from rdkit import Chem

from hopwell.errors import InputError

# Bondi, J. Phys. Chem. 68, 441 (1964): van der Waals radii in Angstrom, by atomic number.
BONDI_RADII_ANGSTROM = {
    1: 1.20, 6: 1.70, 7: 1.55, 8: 1.52, 9: 1.47, 15: 1.80, 16: 1.80, 17: 1.75, 35: 1.85, 53: 1.98,
}
# Default clash scales. A rejected thermally accessible structure biases the populations, while a
# missed clash only costs one energy evaluation that then rejects it, so the thresholds sit well
# below thermal contacts. In MMFF94 structures (ETKDG, minimised, and Metropolis samples at
# 300 K; see tests/test_guards.py) pairs three or more bonds apart stay above ~0.68 of the Bondi
# sum, except hydrogen bonds: a gas-phase salt bridge brings H...O to ~1.23 A (~0.45 of the sum).
# Hence 0.55 in general (C...C 1.87 A, H...H 1.32 A) and 0.30 for a polar hydrogen (bonded to N
# or O) against N or O (H...O 0.82 A, shorter than an O-H bond).
DEFAULT_SCALE = 0.55
DEFAULT_HBOND_SCALE = 0.30
# References whose stereo cannot be read reliably: |normalised signed volume| below this
# (a flat centre), or |cos(dihedral)| below this for a double bond (twisted beyond 60 degrees).
_MIN_ABS_VOLUME = 0.05
_MIN_ABS_COS = 0.5


def _check_hydrogens(mol: Chem.Mol) -> None:
    """Raise ValueError unless every hydrogen of ``mol`` is an explicit atom."""
    if any(atom.GetTotalNumHs() > 0 for atom in mol.GetAtoms()):
        raise ValueError("the molecule has implicit hydrogens; add them with Chem.AddHs")


def _as_batch(positions_nm, n_atoms: int) -> tuple[torch.Tensor, bool]:
    """Positions as a detached float64 tensor of shape (batch, n_atoms, 3), and whether numpy."""
    is_numpy = not isinstance(positions_nm, torch.Tensor)
    x = torch.as_tensor(np.asarray(positions_nm)) if is_numpy else positions_nm.detach()
    if x.ndim != 3 or tuple(x.shape[1:]) != (n_atoms, 3):
        shape = tuple(x.shape)
        raise ValueError(f"positions_nm must have shape (batch, {n_atoms}, 3), got {shape}")
    return x.to(torch.float64), is_numpy


def _as_output(mask: torch.Tensor, is_numpy: bool):
    """The mask as numpy if the input was numpy, else as the tensor itself."""
    return mask.cpu().numpy() if is_numpy else mask


def _centre_edges(x: torch.Tensor, quads: torch.Tensor) -> torch.Tensor:
    """Vectors n_k - c, shape (batch, n_quads, 3, 3), for rows (c, n1, n2, n3) of ``quads``."""
    return x[:, quads[:, 1:]] - x[:, quads[:, :1]]


def _triple(v: torch.Tensor) -> torch.Tensor:
    """Triple products v1 . (v2 x v3) of shape (...,) for v of shape (..., 3, 3)."""
    return torch.sum(v[..., 0, :] * torch.linalg.cross(v[..., 1, :], v[..., 2, :]), dim=-1)


def _dihedral_normals(x: torch.Tensor, quads: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Plane normals (i-j-k and j-k-l), each (batch, n_quads, 3), of dihedrals (i, j, k, l).

    Their dot product has the sign of the dihedral's cosine: positive for cis, negative for trans.
    """
    b = torch.diff(x[:, quads], dim=2)  # bond vectors j-i, k-j, l-k: (batch, n_quads, 3, 3)
    b1, b2, b3 = b.unbind(dim=2)
    return torch.linalg.cross(b1, b2), torch.linalg.cross(b2, b3)


@dataclass(frozen=True, eq=False)
class ClashGuard:
    """Flags structures with overlapping atoms or non-finite coordinates.

    Attributes
    ----------
    pairs : np.ndarray of int, shape (n_pairs, 2)
        Checked atom pairs ``i < j``: at least ``min_bond_separation`` bonds apart (atoms in
        different fragments included).
    threshold_nm : np.ndarray of float, shape (n_pairs,)
        A pair closer than this is a clash.
    n_atoms : int
    """

    pairs: np.ndarray
    threshold_nm: np.ndarray
    n_atoms: int

    @classmethod
    def from_mol(
        cls,
        mol: Chem.Mol,
        scale: float = DEFAULT_SCALE,
        hbond_scale: float = DEFAULT_HBOND_SCALE,
        min_bond_separation: int = 3,
    ) -> ClashGuard:
        """Build the pair list and thresholds ``scale * (r_i + r_j)`` (Bondi radii) from ``mol``.

        Parameters
        ----------
        mol : rdkit.Chem.Mol
            Molecule with explicit hydrogens; elements H, C, N, O, F, P, S, Cl, Br, I.
        scale : float
            Fraction of the Bondi radius sum below which a pair clashes.
        hbond_scale : float
            The fraction used instead for a hydrogen bonded to N or O against an N or O atom.
        min_bond_separation : int
            Fewest bonds between checked atoms (graph distance); 3 includes 1-4 pairs.
        """
        _check_hydrogens(mol)
        if not (scale > 0 and hbond_scale > 0):
            raise ValueError(f"scales must be positive, got {scale} and {hbond_scale}")
        if min_bond_separation < 2:
            raise ValueError(f"min_bond_separation must be at least 2, got {min_bond_separation}")
        atoms = list(mol.GetAtoms())
        unknown = {a.GetSymbol() for a in atoms if a.GetAtomicNum() not in BONDI_RADII_ANGSTROM}
        if unknown:
            raise ValueError(f"no Bondi radius for element(s) {sorted(unknown)}")
        radii_nm = 0.1 * np.array([BONDI_RADII_ANGSTROM[a.GetAtomicNum()] for a in atoms])
        n_or_o = np.array([a.GetAtomicNum() in (7, 8) for a in atoms])
        bonded_to_n_or_o = [any(n_or_o[n.GetIdx()] for n in a.GetNeighbors()) for a in atoms]
        polar_h = np.array([a.GetAtomicNum() == 1 for a in atoms]) & bonded_to_n_or_o
        i, j = np.nonzero(np.triu(Chem.GetDistanceMatrix(mol) >= min_bond_separation, k=1))
        hbond = (polar_h[i] & n_or_o[j]) | (n_or_o[i] & polar_h[j])
        threshold_nm = np.where(hbond, hbond_scale, scale) * (radii_nm[i] + radii_nm[j])
        return cls(pairs=np.stack([i, j], axis=1), threshold_nm=threshold_nm, n_atoms=len(atoms))

    def __call__(self, positions_nm):
        """Clash mask of a batch.

        Parameters
        ----------
        positions_nm : np.ndarray or torch.Tensor, shape (batch, n_atoms, 3)

        Returns
        -------
        np.ndarray or torch.Tensor of bool, shape (batch,)
            True where a checked pair is closer than its threshold or a coordinate is not finite.
        """
        x, is_numpy = _as_batch(positions_nm, self.n_atoms)
        pairs = torch.as_tensor(self.pairs, device=x.device)
        threshold_nm = torch.as_tensor(self.threshold_nm, device=x.device)
        d2_nm2 = torch.sum((x[:, pairs[:, 0]] - x[:, pairs[:, 1]]) ** 2, dim=-1)
        finite = torch.isfinite(x).all(dim=2).all(dim=1)
        clash = torch.any(d2_nm2 < threshold_nm**2, dim=1) | ~finite
        return _as_output(clash, is_numpy)

    def explain(self, positions_nm) -> list[str | None]:
        """Why each structure of a batch clashes, in words (None where it does not).

        Parameters
        ----------
        positions_nm : np.ndarray or torch.Tensor, shape (batch, n_atoms, 3)

        Returns
        -------
        list of str or None, length batch
            The closest pair against its threshold (atoms numbered from 1), or the non-finite
            coordinates.
        """
        x, _ = _as_batch(positions_nm, self.n_atoms)
        x = x.cpu().numpy()
        out: list[str | None] = []
        for xyz in x:
            if not np.isfinite(xyz).all():
                out.append("non-finite coordinates")
                continue
            d_nm = np.linalg.norm(xyz[self.pairs[:, 0]] - xyz[self.pairs[:, 1]], axis=-1)
            k = int(np.argmin(d_nm / self.threshold_nm)) if len(d_nm) else 0
            if not len(d_nm) or d_nm[k] >= self.threshold_nm[k]:
                out.append(None)
                continue
            i, j = (int(a) + 1 for a in self.pairs[k])
            out.append(f"atoms {i} and {j} are {10 * d_nm[k]:.2f} A apart (clash below"
                       f" {10 * self.threshold_nm[k]:.2f} A)")
        return out


def _rigid_nitrogens(mol: Chem.Mol) -> list[list[int]]:
    """Rows (N, n1, n2, n3) of ring nitrogens held fixed by ``rigid_nitrogens=True``.

    The rule: an N that RDKit types sp3 (so not amide, aniline or other conjugated N), with three
    neighbours (explicit H counted), in a ring, whose neighbours lie in three different RDKit
    symmetry classes (``Chem.CanonicalRankAtoms(breakTies=False)``), so inverting it makes a
    different stereoisomer.
    """
    ranks = list(Chem.CanonicalRankAtoms(mol, breakTies=False))
    rows = []
    for atom in mol.GetAtoms():
        nbrs = [n.GetIdx() for n in atom.GetNeighbors()]
        if (
            atom.GetAtomicNum() == 7
            and atom.GetHybridization() == Chem.HybridizationType.SP3
            and len(nbrs) == 3
            and atom.IsInRing()
            and len({ranks[n] for n in nbrs}) == 3
        ):
            rows.append([atom.GetIdx(), *nbrs])
    return rows


@dataclass(frozen=True, eq=False)
class StereoGuard:
    """Flags structures whose stereocentres or stereo double bonds differ from a reference.

    Attributes
    ----------
    centres : np.ndarray of int, shape (n_centres, 4)
        Rows ``(centre, n1, n2, n3)``: a tetrahedral centre and three of its neighbours.
    centre_signs : np.ndarray of float, shape (n_centres,)
        Sign (+1 or -1) of the reference triple product of ``(n1 - c, n2 - c, n3 - c)``.
    double_bonds : np.ndarray of int, shape (n_bonds, 4)
        Rows ``(a_nbr, a, b, b_nbr)``: a stereo double bond ``a=b`` and one neighbour per end.
    double_bond_signs : np.ndarray of float, shape (n_bonds,)
        +1 where the reference dihedral ``a_nbr-a-b-b_nbr`` is cis, -1 where trans.
    n_atoms : int
    """

    centres: np.ndarray
    centre_signs: np.ndarray
    double_bonds: np.ndarray
    double_bond_signs: np.ndarray
    n_atoms: int

    @classmethod
    def from_mol(
        cls, mol: Chem.Mol, reference_positions_nm=None, rigid_nitrogens: bool = False
    ) -> StereoGuard:
        """Record the stereo elements of ``mol`` as they are in the reference structure.

        Recorded: every tetrahedral centre and every double bond that RDKit's
        ``Chem.FindPotentialStereo`` lists (specified or not; this includes N in three-membered
        rings and at bridgeheads, and ring cis/trans centres; amide C-N bonds are single bonds,
        so amide cis/trans stays free), and with ``rigid_nitrogens`` the ring nitrogens of
        :func:`_rigid_nitrogens`, for samplers in which nitrogen inversion is not part of the
        ensemble. Other stereo kinds (atropisomers, allenes, octahedral centres) are not checked.
        Unspecified elements are held as they are in the reference, like specified ones.

        Parameters
        ----------
        mol : rdkit.Chem.Mol
            Molecule with explicit hydrogens.
        reference_positions_nm : array-like, shape (n_atoms, 3), optional
            Reference structure; default ``mol``'s conformer (Angstrom) converted to nm.
        rigid_nitrogens : bool
            Also hold the nitrogens described above fixed.
        """
        _check_hydrogens(mol)
        n_atoms = mol.GetNumAtoms()
        if reference_positions_nm is None:
            if mol.GetNumConformers() == 0 or not mol.GetConformer().Is3D():
                raise ValueError("the molecule has no 3D conformer; pass reference_positions_nm")
            reference_positions_nm = 0.1 * mol.GetConformer().GetPositions()
        reference = np.asarray(reference_positions_nm, dtype=np.float64)
        if reference.shape != (n_atoms, 3) or not np.isfinite(reference).all():
            raise ValueError(f"reference_positions_nm must be finite, shape ({n_atoms}, 3)")
        centres, bonds = [], []
        for info in Chem.FindPotentialStereo(Chem.Mol(mol)):
            # Real atoms only: the list marks an implicit H or a lone pair by an out-of-range index.
            atoms = [int(a) for a in info.controllingAtoms if a < n_atoms]
            if info.type == Chem.StereoType.Atom_Tetrahedral and len(atoms) >= 3:
                centres.append([int(info.centeredOn), *atoms[:3]])
            elif info.type == Chem.StereoType.Bond_Double:
                bond = mol.GetBondWithIdx(int(info.centeredOn))
                a, b = bond.GetBeginAtomIdx(), bond.GetEndAtomIdx()
                a_nbrs = [n for n in atoms if n != b and mol.GetBondBetweenAtoms(n, a)]
                b_nbrs = [n for n in atoms if n != a and mol.GetBondBetweenAtoms(n, b)]
                if a_nbrs and b_nbrs:
                    bonds.append([a_nbrs[0], a, b, b_nbrs[0]])
        if rigid_nitrogens:
            known = {row[0] for row in centres}
            centres += [row for row in _rigid_nitrogens(mol) if row[0] not in known]
        centres_t = torch.as_tensor(centres, dtype=torch.long).reshape(-1, 4)
        bonds_t = torch.as_tensor(bonds, dtype=torch.long).reshape(-1, 4)
        x = torch.as_tensor(reference)[None]
        edges = _centre_edges(x, centres_t)[0]
        volume = _triple(edges)
        flat = torch.abs(volume) < _MIN_ABS_VOLUME * torch.linalg.norm(edges, dim=-1).prod(dim=-1)
        normal_1, normal_2 = (n[0] for n in _dihedral_normals(x, bonds_t))
        cos = torch.sum(normal_1 * normal_2, dim=-1)
        norms = torch.linalg.norm(normal_1, dim=-1) * torch.linalg.norm(normal_2, dim=-1)
        twisted = torch.abs(cos) < _MIN_ABS_COS * norms
        if flat.any() or twisted.any():
            raise ValueError(
                "reference stereo is ambiguous at centres "
                f"{centres_t[flat, 0].tolist()} / double bonds {bonds_t[twisted, 1:3].tolist()}"
            )
        return cls(
            centres=centres_t.numpy(),
            centre_signs=torch.sign(volume).numpy(),
            double_bonds=bonds_t.numpy(),
            double_bond_signs=torch.sign(cos).numpy(),
            n_atoms=n_atoms,
        )

    def __call__(self, positions_nm):
        """Stereo-change mask of a batch.

        Parameters
        ----------
        positions_nm : np.ndarray or torch.Tensor, shape (batch, n_atoms, 3)

        Returns
        -------
        np.ndarray or torch.Tensor of bool, shape (batch,)
            True where a recorded centre's signed volume or a recorded double bond's cis/trans
            sign is not that of the reference (a zero or non-finite value counts as changed).
        """
        x, is_numpy = _as_batch(positions_nm, self.n_atoms)
        centres = torch.as_tensor(self.centres, device=x.device)
        bonds = torch.as_tensor(self.double_bonds, device=x.device)
        volume = _triple(_centre_edges(x, centres))
        normal_1, normal_2 = _dihedral_normals(x, bonds)
        cos = torch.sum(normal_1 * normal_2, dim=-1)
        kept_centres = volume * torch.as_tensor(self.centre_signs, device=x.device) > 0
        kept_bonds = cos * torch.as_tensor(self.double_bond_signs, device=x.device) > 0
        changed = ~(kept_centres.all(dim=1) & kept_bonds.all(dim=1))
        return _as_output(changed, is_numpy)

    def explain(self, positions_nm) -> list[str | None]:
        """Which stereo elements of each structure differ from the reference (None: none).

        Parameters
        ----------
        positions_nm : np.ndarray or torch.Tensor, shape (batch, n_atoms, 3)

        Returns
        -------
        list of str or None, length batch
            The changed centres and double bonds, atoms numbered from 1.
        """
        x, _ = _as_batch(positions_nm, self.n_atoms)
        centres = torch.as_tensor(self.centres, device=x.device)
        bonds = torch.as_tensor(self.double_bonds, device=x.device)
        volume = _triple(_centre_edges(x, centres))
        normal_1, normal_2 = _dihedral_normals(x, bonds)
        cos = torch.sum(normal_1 * normal_2, dim=-1)
        centre_ok = (volume * torch.as_tensor(self.centre_signs, device=x.device) > 0).cpu().numpy()
        bond_ok = (cos * torch.as_tensor(self.double_bond_signs, device=x.device) > 0).cpu().numpy()
        out: list[str | None] = []
        for c_ok, b_ok in zip(centre_ok, bond_ok):
            parts = [f"stereocentre at atom {int(self.centres[k, 0]) + 1}" for k in np.flatnonzero(~c_ok)]
            parts += [f"double bond {int(self.double_bonds[k, 1]) + 1}={int(self.double_bonds[k, 2]) + 1}"
                      for k in np.flatnonzero(~b_ok)]
            out.append(", ".join(parts) + " unlike the reference structure's" if parts else None)
        return out


class GuardMask(NamedTuple):
    """Per-sample rejection causes, each of shape (batch,), numpy or torch like the input.

    Attributes
    ----------
    clash : bool mask
        Overlapping atoms or non-finite coordinates.
    stereo : bool mask
        A stereocentre or stereo double bond changed (non-finite samples count here too).
    """

    clash: np.ndarray | torch.Tensor
    stereo: np.ndarray | torch.Tensor

    @property
    def rejected(self):
        """Samples rejected for either cause, shape (batch,)."""
        return self.clash | self.stereo


@dataclass(frozen=True, eq=False)
class ProposalGuard:
    """A :class:`ClashGuard` and a :class:`StereoGuard` of one molecule, applied together."""

    clash: ClashGuard
    stereo: StereoGuard

    @classmethod
    def from_mol(
        cls,
        mol: Chem.Mol,
        reference_positions_nm=None,
        scale: float = DEFAULT_SCALE,
        hbond_scale: float = DEFAULT_HBOND_SCALE,
        rigid_nitrogens: bool = False,
    ) -> ProposalGuard:
        """Build both guards; see :meth:`ClashGuard.from_mol` and :meth:`StereoGuard.from_mol`."""
        return cls(
            clash=ClashGuard.from_mol(mol, scale=scale, hbond_scale=hbond_scale),
            stereo=StereoGuard.from_mol(
                mol, reference_positions_nm, rigid_nitrogens=rigid_nitrogens
            ),
        )

    def __call__(self, positions_nm) -> GuardMask:
        """Both masks of a batch of positions, shape (batch, n_atoms, 3) in nm."""
        return GuardMask(clash=self.clash(positions_nm), stereo=self.stereo(positions_nm))

    def explain(self, positions_nm) -> list[str | None]:
        """Why each structure of a batch fails either guard, in words (None where it passes)."""
        reasons = zip(self.clash.explain(positions_nm), self.stereo.explain(positions_nm))
        return ["; ".join(r for r in pair if r) or None for pair in reasons]


def refuse_failing_seeds(guard: ProposalGuard, seeds_nm) -> None:
    """Raise :class:`~hopwell.errors.InputError` naming the first seed that fails ``guard``.

    Every Monte Carlo proposal from a state that fails the guard is rejected, and the moves are
    reversible only among states that pass it, so a walker started there would sample by its
    local move alone.

    Parameters
    ----------
    guard : ProposalGuard
    seeds_nm : np.ndarray, shape (n_seeds, n_atoms, 3)
    """
    failed = np.flatnonzero(np.asarray(guard(seeds_nm).rejected))
    if len(failed):
        k = int(failed[0])
        why = guard.explain(np.asarray(seeds_nm)[k:k + 1])[0]
        raise InputError(f"seed structure {k + 1} of {len(seeds_nm)} fails the clash/stereo check ({why});"
                         " fix or remove that structure")
