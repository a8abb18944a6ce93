"""hopwell: conformer populations with honest error bars from a force field.

From Python (see :mod:`hopwell.api`)::

    import hopwell
    molsys = hopwell.build("CC(=O)NC", solvent="obc2")
    run = hopwell.sample(molsys, "amide-run", minutes=5)
    run.populations()
"""

from hopwell.api import Run, build, open_run, sample
from hopwell.errors import InputError

__version__ = "0.1.0"
__all__ = ["InputError", "Run", "build", "open_run", "sample"]
