"""The ``hopwell`` command line.

Exit codes: 0 done; 2 bad input or usage (one line on stderr, never a traceback); 1 internal
error (one line naming the log file that holds the traceback).
"""

from __future__ import annotations

import functools
import json
import sys
import tempfile
import traceback
from pathlib import Path

import click

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError

EXIT_INPUT = 2
EXIT_INTERNAL = 1


def _fail_cleanly(fn):
    """Turn InputError into exit code 2 and anything unexpected into exit code 1 with a log."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except InputError as exc:
            click.echo(f"hopwell: error: {exc}", err=True)
            sys.exit(EXIT_INPUT)
        except (click.exceptions.Exit, click.ClickException, SystemExit, KeyboardInterrupt):
            raise
        except Exception:  # the one place that catches everything: report, keep the traceback
            with tempfile.NamedTemporaryFile(
                "w", prefix="hopwell-error-", suffix=".log", delete=False
            ) as log:
                traceback.print_exc(file=log)
            click.echo(f"hopwell: internal error; the traceback is in {log.name}", err=True)
            sys.exit(EXIT_INTERNAL)

    return wrapper


def _builder_options(fn):
    """Options shared by every command that builds a system."""
    options = [
        click.argument("input_spec", metavar="INPUT"),
        click.option(
            "--forcefield",
            type=click.Choice(["mmff94", "mmff94s", "amber14"]),
            default=None,
            help="Force field [default: amber14 for peptide PDB, else mmff94].",
        ),
        click.option(
            "--solvent", type=click.Choice(["vacuum", "obc2"]), default="vacuum", show_default=True,
            help="Vacuum or OBC2 implicit water.",
        ),
        click.option(
            "--dielectric", type=click.Choice(["constant", "distance"]), default="constant",
            show_default=True, help="MMFF electrostatics: constant or distance-dependent dielectric.",
        ),
        click.option("--template", default=None, metavar="SMILES",
                     help="Bond orders for a small molecule given as PDB."),
        click.option("--seeds", "n_seeds", type=int, default=30, show_default=True,
                     help="ETKDG conformers embedded for SMILES input (before de-duplication)."),
        click.option("--add-hydrogens", is_flag=True,
                     help="Add missing hydrogens (with coordinates) to SDF/MOL2 records."),
        click.option("--pick-isomer", is_flag=True,
                     help="For SMILES with unspecified stereo, take one stereoisomer."),
        click.option("--seed", "random_seed", type=int, default=2024, show_default=True,
                     help="Random seed."),
    ]
    for option in reversed(options):
        fn = option(fn)
    return fn


def _build(input_spec, forcefield, solvent, dielectric, template, n_seeds, add_hydrogens,
           pick_isomer, random_seed):
    from hopwell.systems.builder import BuildOptions, build

    options = BuildOptions(
        forcefield=forcefield, solvent=solvent, dielectric=dielectric, n_seeds=n_seeds,
        template=template, add_hydrogens=add_hydrogens, pick_isomer=pick_isomer,
        random_seed=random_seed,
    )
    return build(input_spec, options)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="hopwell")
def main():
    """hopwell: conformer populations with error bars from a force field.

    \b
    Example:
      hopwell build systems/ace_ala_nme.pdb --solvent obc2
    """


@main.command()
@_builder_options
@click.option("-o", "--output", type=click.Path(dir_okay=False, writable=True), default=None,
              help="Write the OpenMM system as XML to this file.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@_fail_cleanly
def build(output, as_json, **kwargs):
    """Build the force-field system for INPUT and print its summary.

    INPUT is a SMILES string, an SDF/MOL/MOL2 file (every record a known structure of one
    molecule) or a peptide PDB.

    \b
    Example:
      hopwell build "CC(=O)N[C@@H](C)C(=O)NC" --solvent obc2 --seeds 50
    """
    from hopwell.energy import EnergyEvaluator

    molsys = _build(**kwargs)
    summary = molsys.summary()
    evaluator = EnergyEvaluator(molsys.system, 300.0)
    summary["seed_energies_kj_per_mol"] = [round(float(e), 4) for e in evaluator.energies_kj(molsys.seeds_nm)]
    if output:
        atomic_write_bytes(Path(output), molsys.to_xml().encode())
        summary["system_xml"] = str(output)
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    width = max(len(k) for k in summary)
    for key, value in summary.items():
        if isinstance(value, list):
            value = ", ".join(str(v) for v in value) if value else "-"
        click.echo(f"{key.replace('_', ' '):<{width}}  {value}")


@main.command()
@_builder_options
@click.option("--json", "as_json", is_flag=True, help="Print the energies as JSON.")
@_fail_cleanly
def energy(as_json, **kwargs):
    """Print the potential energy of every structure in INPUT, as given (no minimization).

    For SMILES input the structures are the de-duplicated, minimized seeds.

    \b
    Example:
      hopwell energy conformers.sdf --forcefield mmff94s --json
    """
    from hopwell.energy import EnergyEvaluator

    molsys = _build(**kwargs)
    positions = molsys.input_positions_nm if molsys.mol.GetNumConformers() else molsys.seeds_nm
    energies = EnergyEvaluator(molsys.system, 300.0).energies_kj(positions)
    if as_json:
        click.echo(json.dumps({"unit": "kJ/mol", "energies": [float(e) for e in energies]}))
        return
    for k, e in enumerate(energies, start=1):
        click.echo(f"structure {k}: {e:.4f} kJ/mol")


if __name__ == "__main__":  # pragma: no cover
    main()
