"""hopwell: conformer populations with honest error bars from a force field."""

__version__ = "0.1.0"
