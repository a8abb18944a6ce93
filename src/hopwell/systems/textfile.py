"""An input file's bytes as text, checked before any parser sees them.

The structure formats hopwell reads (SDF/MOL, MOL2, PDB) are line-oriented ASCII. A file is
refused when it holds NUL bytes (a binary file, or UTF-16/UTF-32 text) and when it is larger
than any molecule hopwell accepts could need. A UTF-8 byte-order mark is dropped, CRLF or CR
line ends become LF, and every other character that is not ASCII (UTF-8 or not: Latin-1, say)
becomes ``?``. Such characters can stand only in free text (titles, properties, remarks), which
hopwell does not use, or in a field they spoil anyway, where the parser's message names the
line; left in, they broke RDKit's log when a parser's message cut one in two.
"""

from __future__ import annotations

from pathlib import Path

from hopwell.errors import InputError

# 300 atoms (hopwell.systems.inputs.MAX_ATOMS) take about 25 kB per SDF record; this leaves room
# for a thousand such records. Chosen, not measured.
MAX_FILE_BYTES = 25_000_000


def read_text_file(path: Path, source: str) -> str:
    """Read a structure file as text.

    Parameters
    ----------
    path : pathlib.Path
    source : str
        The name used in messages.

    Returns
    -------
    str
        ASCII text, line ends as ``"\\n"``.

    Raises
    ------
    InputError
        When the file cannot be read, is too large, or is binary.
    """
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise InputError(f"{source}: {size / 1e6:.0f} MB is larger than the limit of"
                             f" {MAX_FILE_BYTES / 1e6:.0f} MB for a molecule's structures")
        data = path.read_bytes()
    except OSError as exc:  # unreadable: permissions, a device, a file removed meanwhile
        raise InputError(f"{source}: cannot read the file: {exc.strerror}") from None
    if b"\x00" in data:
        line = data[:data.index(b"\x00")].count(b"\n") + 1
        raise InputError(f"{source}: NUL byte on line {line}: a binary file or UTF-16/UTF-32 text;"
                         " give a plain-text file (ASCII or UTF-8)")
    text = data.decode("utf-8-sig", errors="replace").encode("ascii", errors="replace").decode("ascii")
    return text.replace("\r\n", "\n").replace("\r", "\n")
