"""Error types shared across hopwell.

`InputError` marks a problem with what the user supplied (a file, a SMILES, an option). The
command line turns it into one line on stderr and exit code 2; everything else is an internal
error (exit code 1).
"""


class InputError(ValueError):
    """The user's input cannot be used; the message says why and, where possible, what to do."""
