"""Error types shared across hopwell.

`InputError` marks a problem with what the user supplied (a file, a SMILES, an option). The
command line turns it into one line on stderr and exit code 2; everything else is an internal
error (exit code 1).
"""


def printable(text: str) -> str:
    """``text`` with unprintable characters escaped: line breaks, control characters, bytes
    that were not UTF-8 (surrogates). What it returns prints as one line anywhere.

    Examples
    --------
    >>> printable("ok.sdf")
    'ok.sdf'
    >>> printable("a\\nb\\x1d\\udcff")
    'a\\\\nb\\\\x1d\\\\udcff'
    """
    return "".join(c if c.isprintable() else ascii(c)[1:-1] for c in text)


class InputError(ValueError):
    """The user's input cannot be used; the message says why and, where possible, what to do.

    Its text is one printable line (:func:`printable`) whatever part of the input it quotes.
    """

    def __str__(self) -> str:
        return printable(super().__str__())
