"""Checks on a PDB file's atom records that OpenMM's reader only warns about.

OpenMM's ``PDBFile`` reads a residue as the atom records in a row with one residue number and
insertion code (a ``TER``, ``MODEL`` or ``ENDMDL`` record ends it). It warns, and reads on, when
an atom name appears twice in a residue with the same alternate location, and when two residues
in a row share a number but not a name. hopwell refuses both: the first is a duplicated atom,
the second two residues with one number.
"""

from __future__ import annotations

from hopwell.errors import InputError

_BREAKS = ("TER", "MODEL", "ENDMDL", "END")


def check_pdb_atoms(text: str, source: str) -> None:
    """Refuse duplicated atoms and residues in a row that share a number.

    Parameters
    ----------
    text : str
        The PDB file's text.
    source : str
        The name used in messages.

    Raises
    ------
    InputError
        Naming the line at fault.
    """
    residue = None  # (chain, number, insertion code) of the residue being read
    name = ""
    atoms: dict[tuple[str, str], int] = {}  # (atom name, alternate location) -> line number
    for number, line in enumerate(text.split("\n"), start=1):
        if line.startswith(_BREAKS):
            residue = None
            continue
        if not line.startswith(("ATOM", "HETATM")):
            continue
        line = line.ljust(27)
        key, alt_loc, res_name = (line[21], line[22:26], line[26]), line[16], line[17:20]
        if key != residue:
            residue, name, atoms = key, res_name, {}
        elif res_name != name and alt_loc == " ":
            raise InputError(
                f"{source}: line {number}: residues {name.strip()} and {res_name.strip()} in a row"
                f" share the number {key[1].strip()}; give each residue its own number"
            )
        atom = (line[12:16], alt_loc)
        if atom in atoms:
            raise InputError(
                f"{source}: line {number} repeats atom {atom[0].strip()} of residue"
                f" {res_name.strip()} {key[1].strip()} (line {atoms[atom]}); give each atom once"
            )
        atoms[atom] = number
