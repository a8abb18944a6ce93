"""The ``hopwell`` command line.

Exit codes: 0 done; 2 bad input or usage, a damaged run directory that cannot be recovered, or
a full disk (one line on stderr, never a traceback); 1 internal error (one line naming the log
file that holds the traceback). Damage that was recovered from is reported as
``hopwell: warning: ...`` lines, and the command goes on.
"""

from __future__ import annotations

import functools
import json
import os
import sys
import tempfile
import traceback
from pathlib import Path

import click

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.store import NO_SPACE

EXIT_INPUT = 2
EXIT_INTERNAL = 1


def _warn(message: str) -> None:
    """One warning line on stderr: damage found and recovered from."""
    click.echo(f"hopwell: warning: {message}", err=True)


def _fail_cleanly(fn):
    """Turn InputError into exit code 2 and anything unexpected into exit code 1 with a log."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except InputError as exc:
            click.echo(f"hopwell: error: {exc}", err=True)
            sys.exit(EXIT_INPUT)
        except KeyboardInterrupt:  # before the sampler's own handler is installed
            click.echo("hopwell: interrupted", err=True)
            sys.exit(130)
        except (click.exceptions.Exit, click.ClickException, SystemExit):
            raise
        except OSError as exc:  # a full disk outside a run's own writes (a report's files, say)
            if exc.errno not in NO_SPACE:
                _internal_error()
            where = f" while writing {exc.filename}" if exc.filename else ""
            click.echo(f"hopwell: error: no space left on device{where}; free some space and run the"
                       " command again", err=True)
            sys.exit(EXIT_INPUT)
        except Exception:  # the one place that catches everything: report, keep the traceback
            _internal_error()

    return wrapper


def _internal_error() -> None:
    """Keep the traceback of the exception being handled in a log file; exit 1 naming it."""
    with tempfile.NamedTemporaryFile("w", prefix="hopwell-error-", suffix=".log", delete=False) as log:
        traceback.print_exc(file=log)
    click.echo(f"hopwell: internal error; the traceback is in {log.name}", err=True)
    sys.exit(EXIT_INTERNAL)


def _builder_options(fn):
    """The INPUT argument and the options shared by every command that builds a system."""
    return click.argument("input_spec", metavar="INPUT")(_build_flags(fn))


def _build_flags(fn):
    """The build options alone (``batch`` applies them to each molecule of its file)."""
    options = [
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
        click.option("--seeds", "n_seeds", type=int, default=None,
                     help="ETKDG conformers embedded for SMILES input (before de-duplication)"
                          " [default: 30 + 30 per rotatable bond, at most 300]."),
        click.option("--add-hydrogens", is_flag=True,
                     help="Add missing hydrogens (with coordinates) to SDF/MOL2 records."),
        click.option("--pick-isomer", is_flag=True,
                     help="For SMILES with unspecified stereo, take one stereoisomer."),
        click.option("--seed", "random_seed", type=int, default=2024, show_default=True,
                     help="Random seed."),
        click.option("--backbone-seeds/--no-backbone-seeds", default=True, show_default=True,
                     help="Peptides: add a minimized seed in each backbone region a residue reaches."),
    ]
    for option in reversed(options):
        fn = option(fn)
    return fn


def _build(input_spec, forcefield, solvent, dielectric, template, n_seeds, add_hydrogens,
           pick_isomer, random_seed, backbone_seeds):
    from hopwell.systems.builder import BuildOptions, build

    options = BuildOptions(
        forcefield=forcefield, solvent=solvent, dielectric=dielectric, n_seeds=n_seeds,
        template=template, add_hydrogens=add_hydrogens, pick_isomer=pick_isomer,
        random_seed=random_seed, backbone_seeds=backbone_seeds,
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
    from hopwell.systems.energy import EnergyEvaluator

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
    from hopwell.systems.energy import EnergyEvaluator

    molsys = _build(**kwargs)
    positions = molsys.input_positions_nm if molsys.mol.GetNumConformers() else molsys.seeds_nm
    energies = EnergyEvaluator(molsys.system, 300.0).energies_kj(positions)
    if as_json:
        click.echo(json.dumps({"unit": "kJ/mol", "energies": [float(e) for e in energies]}))
        return
    for k, e in enumerate(energies, start=1):
        click.echo(f"structure {k}: {e:.4f} kJ/mol")


def _sampler_options(fn):
    """Options of the sampler, shared by ``run`` and ``demo``."""
    options = [
        click.option("--hours", type=float, default=None, help="Wall-clock budget (hours)."),
        click.option("--samples", type=int, default=None, help="Production samples to record."),
        click.option("--temperature", "temperature_K", type=float, default=300.0, show_default=True,
                     help="Temperature (K)."),
        click.option("--walkers", type=int, default=None, help="Walkers [default: one per seed, at most 64]."),
        click.option("--training-cycles", type=int, default=None,
                     help="Cycles of flow training before production [default: 200, or 30%% of --hours]."),
        click.option("--langevin-steps", type=int, default=250, show_default=True,
                     help="Langevin steps (1 fs) per cycle and walker."),
        click.option("--proposals", type=int, default=32, show_default=True,
                     help="Flow proposals per cycle and walker."),
        click.option("--platform", type=click.Choice(["Reference", "CPU"]), default=None,
                     help="OpenMM platform [default: chosen by size]."),
        click.option("--until-width", type=float, default=None,
                     help="Stop early once the verdict is converged and every 95%% interval is"
                          " narrower than this many percentage points (checked every 200 cycles)."),
        click.option("--method", type=click.Choice(["flow", "md", "remd"]), default="flow", show_default=True,
                     help="flow: Langevin plus flow moves; md: plain Langevin MD; remd: temperature"
                          " replica exchange (the last two are baselines)."),
        click.option("--replicas", type=int, default=6, show_default=True,
                     help="remd: number of temperatures (geometric ladder)."),
        click.option("--top-temperature", "top_temperature_K", type=float, default=600.0,
                     show_default=True, help="remd: the ladder's highest temperature (K)."),
        click.option("--local-move", type=click.Choice(["langevin", "ghmc"]), default="langevin",
                     show_default=True, help="Local move: unadjusted Langevin or exact GHMC."),
    ]
    for option in reversed(options):
        fn = option(fn)
    return fn


def _narrow_enough(width_points):
    """A ``stop_when`` callback for ``--until-width`` (None when not asked for)."""
    if width_points is None:
        return None
    if width_points <= 0:
        raise InputError("--until-width must be positive (percentage points)")
    from hopwell.analysis.summary import analyse

    def check(sampler):
        if not sampler.production or sampler.next_chunk % 20:
            return False
        try:
            summary = analyse(sampler.store.path, n_boot=200)
        except InputError:  # no production samples yet
            return False
        widest = max(100 * (s["ci95"][1] - s["ci95"][0]) for s in summary["states"])
        return summary["verdict"] == "converged" and widest < width_points

    return check


def _progress_printer(budget):
    """Progress: click's progress bar on a terminal, a plain line every 50 cycles otherwise.

    The bar runs over the budget (seconds or production samples, whichever ends first) and
    shows the phase, acceptance by move type and the remaining time.
    """
    tty = sys.stderr.isatty()
    bar = None

    def fraction(sampler):
        parts = []
        if budget.seconds:
            parts.append(sampler.elapsed_s / budget.seconds)
        if budget.samples:
            parts.append(sampler.production_samples / budget.samples)
        return min(1.0, max(parts)) if parts else 0.0

    def describe(sampler):
        phase = "production" if sampler.production else "training"
        if "exchange" in sampler.stats:
            return (f"cycle {sampler.cycle}: exchanges {sampler.stats['exchange'].recent_acceptance():.2f}"
                    f" accepted; {sampler.production_samples} samples")
        darts = f", darts {sampler.stats['dart'].acceptance():.2f}" if sampler.stats["dart"].proposed else ""
        if sampler.stats["ring"].proposed:
            darts += f", ring flips {sampler.stats['ring'].acceptance():.2f}"
        basins = sampler.basins.populations()
        shares = "" if basins is None else "; " + basin_shares(basins)
        return (f"{phase} cycle {sampler.cycle}: one-torsion {sampler.stats['single'].acceptance():.2f},"
                f" flow {sampler.stats[phase].recent_acceptance():.2f}{darts} accepted;"
                f" {sampler.production_samples} samples{shares}")

    def show(sampler):
        nonlocal bar
        if not tty:
            if sampler.cycle % 50 == 0:
                click.echo(f"{describe(sampler)}; elapsed {sampler.elapsed_s / 60:.1f} min", err=True)
            return
        if bar is None:
            bar = click.progressbar(length=1000, file=sys.stderr, show_eta=True, width=24)
            bar.__enter__()
        bar.label = describe(sampler)
        bar.update(int(1000 * fraction(sampler)) - bar.pos)
        if fraction(sampler) >= 1.0:
            bar.__exit__(None, None, None)

    return show


def _run_sharded(spec, run_dir, options, settings, budget, walkers, platform, workers, scheduler,
                 shards, until_width):
    """``hopwell run`` with production in shards on Dask (see :mod:`hopwell.sampling.shards`)."""
    from hopwell.sampling.shards import start_sharded_run

    if until_width is not None:
        raise InputError("--until-width is not available with sharded production (--workers/--scheduler)")
    if workers is not None and workers < 0:
        raise InputError(f"--workers must be 0 (one per core) or more, got {workers}")
    workers = workers or None  # 0: one per core
    if shards is None:
        shards = (walkers or 1) if scheduler else (workers or os.cpu_count() or 1)
    done = start_sharded_run(spec, run_dir, options, settings, budget, shards, n_walkers=walkers,
                             platform=platform, workers=workers, scheduler=scheduler,
                             progress=_progress_printer(budget))
    click.echo(f"\nrun finished: {len(done)} shard(s) sampled in {run_dir}/shards", err=True)


def basin_shares(basins, shown: int = 6) -> str:
    """The progress line's seed-basin occupancy: each basin's share, or the largest few of many.

    Parameters
    ----------
    basins : array_like, shape (n_basins + 1,)
        Shares of production samples in each seed basin, then outside all of them.
    shown : int
        Above this many basins, only the ``shown - 1`` largest are listed, with a count of the
        empty ones.
    """
    inside, outside = list(basins[:-1]), basins[-1]
    if len(inside) <= shown:
        listed = "seed basins " + "/".join(f"{100 * p:.0f}" for p in inside) + "%"
    else:
        largest = sorted(inside, reverse=True)[: shown - 1]
        listed = (f"largest {len(largest)} of {len(inside)} seed basins "
                  + "/".join(f"{100 * p:.0f}" for p in largest) + f"%, {sum(p == 0 for p in inside)} empty")
    return f"{listed} (outside {100 * outside:.0f}%)"


def _run_settings(hours, samples, temperature_K, training_cycles, langevin_steps, proposals, method,
                  replicas, top_temperature_K, local_move, random_seed):
    """The budget and sampler settings of ``run`` and ``batch`` from their options, checked."""
    from hopwell.sampling.run import check_settings, make_budget, training_schedule
    from hopwell.sampling.sampler import SamplerSettings

    budget = make_budget(hours, samples)
    training_cycles, hours_share = training_schedule(method, training_cycles, budget)
    settings = SamplerSettings(
        temperature_K=temperature_K, langevin_steps=langevin_steps, proposals_per_cycle=proposals,
        seed=random_seed, method=method, local_move=local_move,
        training_cycles=training_cycles, training_seconds=hours_share,
        replicas=replicas, top_temperature_K=top_temperature_K,
    )
    check_settings(settings)
    return budget, settings


def _load_config(ctx, param, value):
    """Take option defaults from a TOML file whose keys are the long option names."""
    if value is None:
        return None
    import tomllib

    try:
        with open(value, "rb") as handle:
            data = tomllib.load(handle)
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise click.BadParameter(f"cannot read {value}: {exc}", param=param) from None
    names = {opt[2:].replace("-", "_"): p.name for p in ctx.command.params
             for opt in p.opts if opt.startswith("--") and p.name != "config"}
    defaults = {}
    for key, item in data.items():
        name = names.get(key.replace("-", "_"))
        if name is None:
            raise click.BadParameter(f"{value}: unknown option {key!r}", param=param)
        defaults[name] = item
    ctx.default_map = {**(ctx.default_map or {}), **defaults}
    return value


@main.command()
@click.option("--config", type=click.Path(dir_okay=False), default=None, is_eager=True,
              expose_value=False, callback=_load_config,
              help="TOML file of option values (keys as the long option names); the command line wins.")
@_builder_options
@click.option("-o", "--output", "run_dir", required=True, type=click.Path(file_okay=False),
              help="Run directory to create.")
@_sampler_options
@click.option("--workers", type=int, default=None,
              help="Sample production in shards on this many single-threaded Dask worker processes"
                   " (0: one per core); training stays in this process.")
@click.option("--scheduler", default=None,
              help="Sample production shards on the existing Dask cluster at this address.")
@click.option("--shards", type=int, default=None,
              help="Production shards (walkers divided among them) [default: the workers, or one per walker].")
@_fail_cleanly
def run(run_dir, hours, samples, temperature_K, walkers, training_cycles, langevin_steps,
        proposals, platform, method, replicas, top_temperature_K, local_move, until_width,
        workers, scheduler, shards, **kwargs):
    """Sample the conformers of INPUT into a new run directory.

    \b
    Example:
      hopwell run systems/ace_ala_nme.pdb -o dipeptide --hours 8 --solvent obc2
      hopwell run ligand.sdf --config examples/run_options.toml
    """
    import torch

    from hopwell.sampling.run import start_run
    from hopwell.systems.builder import BuildOptions

    budget, settings = _run_settings(hours, samples, temperature_K, training_cycles, langevin_steps,
                                     proposals, method, replicas, top_temperature_K, local_move,
                                     kwargs["random_seed"])
    options = BuildOptions(**{k: v for k, v in kwargs.items() if k != "input_spec"})
    torch.set_num_threads(1)  # OpenMM and torch alternate; one thread each avoids oversubscription
    if workers is not None or scheduler or shards is not None:
        _run_sharded(kwargs["input_spec"], Path(run_dir), options, settings, budget, walkers, platform,
                     workers, scheduler, shards, until_width)
        return
    sampler = start_run(kwargs["input_spec"], Path(run_dir), options, settings, budget,
                        n_walkers=walkers, platform=platform, progress=_progress_printer(budget),
                        stop_when=_narrow_enough(until_width))
    click.echo(f"\nrun finished at cycle {sampler.cycle}: {sampler.production_samples} production"
               f" samples in {run_dir}", err=True)


@main.command()
@click.argument("run_dir", type=click.Path(file_okay=False))
@click.option("--hours", type=float, default=None, help="New wall-clock budget (hours, total).")
@click.option("--samples", type=int, default=None, help="New total of production samples.")
@click.option("--workers", type=int, default=None,
              help="Sharded runs and batches: Dask worker processes for the unfinished shards or"
                   " molecules (0: one per core).")
@click.option("--scheduler", default=None, help="Sharded runs and batches: an existing Dask cluster's address.")
@_fail_cleanly
def resume(run_dir, hours, samples, workers, scheduler):
    """Continue RUN_DIR from its last checkpoint, losing and duplicating nothing.

    \b
    Example:
      hopwell resume dipeptide --hours 12
    """
    import torch

    from hopwell.sampling.batch import is_batch
    from hopwell.sampling.run import make_budget, resume_run, saved_budget

    if is_batch(Path(run_dir)):  # a batch: its unfinished molecules, each with its own budget
        if hours is not None or samples is not None:
            raise InputError(f"{run_dir} is a batch and resumes with its budget; to sample one molecule"
                             f" longer: hopwell resume {run_dir}/NAME --hours H")
        _run_batch(Path(run_dir), workers, scheduler)
        return
    budget = saved_budget(Path(run_dir)) if hours is None and samples is None else make_budget(hours, samples)
    torch.set_num_threads(1)
    from hopwell.sampling.shards import n_planned, train_then_shard

    if n_planned(Path(run_dir)) is not None:  # sharded: train if unfinished, then the unfinished shards
        new = None if hours is None and samples is None else budget
        done = train_then_shard(Path(run_dir), workers or None, scheduler, new, _progress_printer(budget),
                                notice=_warn)
        click.echo(f"\n{len(done)} shard(s) sampled to their budget in {run_dir}", err=True)
        return
    sampler = resume_run(Path(run_dir), budget, progress=_progress_printer(budget), notice=_warn)
    click.echo(f"\nrun finished at cycle {sampler.cycle}: {sampler.production_samples} production"
               f" samples in {run_dir}", err=True)


def _check_workers(workers):
    if workers is not None and workers < 0:
        raise InputError(f"--workers must be 0 (one per core) or more, got {workers}")


def _run_batch(batch_dir: Path, workers, scheduler):
    """Schedule a batch's unfinished molecules, print progress lines, then each failure and a total."""
    from hopwell.sampling.batch import run_batch

    _check_workers(workers)

    def show(counts):
        where = f"; dashboard {counts['dashboard']}" if counts["dashboard"] else ""
        click.echo(f"batch: {counts['done']}/{counts['total']} done, {counts['running']} running,"
                   f" {counts['failed']} failed, {counts['waiting']} waiting{where}", err=True)

    rows = run_batch(batch_dir, workers or None, scheduler, progress=show)
    failed = [row for row in rows if row["status"] == "failed"]
    for row in failed:
        click.echo(f"  {row['name']} failed: {row['error']}", err=True)
    left = sum(row["status"] == "unfinished" for row in rows)
    click.echo(f"batch finished: {sum(row['status'] == 'done' for row in rows)} done, {len(failed)} failed"
               + (f", {left} still in use by another process (resume later)" if left else "")
               + f"; overview: {batch_dir / 'overview.html'}", err=True)


@main.command()
@click.option("--config", type=click.Path(dir_okay=False), default=None, is_eager=True,
              expose_value=False, callback=_load_config,
              help="TOML file of option values (keys as the long option names); the command line wins.")
@click.argument("molecules_file", metavar="MOLECULES", type=click.Path(dir_okay=False))
@_build_flags
@click.option("-o", "--output", "batch_dir", required=True, type=click.Path(file_okay=False),
              help="Batch directory to create: one run directory per molecule, and the overview.")
@_sampler_options
@click.option("--workers", type=int, default=None,
              help="Single-threaded Dask worker processes, one molecule at a time each [default: one per core].")
@click.option("--scheduler", default=None, help="Run the molecules on the existing Dask cluster at this address.")
@_fail_cleanly
def batch(molecules_file, batch_dir, hours, samples, temperature_K, walkers, training_cycles,
          langevin_steps, proposals, platform, method, replicas, top_temperature_K, local_move,
          until_width, workers, scheduler, **kwargs):
    """Run every molecule of MOLECULES, each as `hopwell run` would, into DIR/NAME.

    MOLECULES is a SMILES file (one "SMILES name" a line), a CSV with name and SMILES
    columns, or an SDF (record titles are the names; consecutive records with one title are
    one molecule's known structures). Names must be safe as directory names. The budget is
    each molecule's. DIR/overview.html (and .csv, .json) lists each molecule's verdict, main
    states and populations, or its error; `hopwell resume DIR` runs the unfinished ones.

    \b
    Example:
      hopwell batch systems/ligands/ligands.smi -o ligands --hours 1 --solvent obc2
    """
    from hopwell.sampling.batch import create_batch
    from hopwell.sampling.run import _walkers
    from hopwell.systems.builder import BuildOptions

    if until_width is not None:
        raise InputError("--until-width is not available in a batch; give --hours or --samples")
    budget, settings = _run_settings(hours, samples, temperature_K, training_cycles, langevin_steps,
                                     proposals, method, replicas, top_temperature_K, local_move,
                                     kwargs["random_seed"])
    _walkers(settings, walkers, 1)  # a bad --walkers is refused before any molecule starts
    _check_workers(workers)
    plan = create_batch(Path(molecules_file), Path(batch_dir), BuildOptions(**kwargs), settings, budget,
                        n_walkers=walkers, platform=platform)
    click.echo(f"hopwell batch: {len(plan['molecules'])} molecules into {batch_dir}", err=True)
    _run_batch(Path(batch_dir), workers, scheduler)


@main.command()
@click.argument("run_dir", type=click.Path(file_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print summary.json to stdout.")
@click.option("--reweight-temperature", type=float, default=None,
              help="Also give populations reweighted to this temperature (K, within 20%).")
@click.option("--reweight-solvent", type=click.Choice(["vacuum", "obc2"]), default=None,
              help="Also give populations reweighted to this solvent model.")
@click.option("--reweight-forcefield", type=click.Choice(["mmff94", "mmff94s", "amber14"]),
              default=None, help="Also give populations reweighted to this force field.")
@click.option("--states", "states_file", type=click.Path(dir_okay=False), default=None,
              help="States TOML file [default: automatic torsion wells or backbone regions].")
@click.option("--pose", "pose_file", type=click.Path(dir_okay=False), default=None,
              help="One structure you care about (SDF/MOL/MOL2, e.g. a bound pose): its population"
                   " (samples in its torsion wells) and cost -kT ln p.")
@_fail_cleanly
def report(run_dir, as_json, reweight_temperature, reweight_solvent, reweight_forcefield, states_file, pose_file):
    """Analyse RUN_DIR: populations, intervals, verdict; writes report.html and friends.

    \b
    Example:
      hopwell report dipeptide --json
      hopwell report amide --reweight-solvent obc2
      hopwell report amide --states systems/demo_amide_states.toml
      hopwell report ligand --pose bound.sdf
    """
    from hopwell.analysis.summary import analyse, public
    from hopwell.report import format_table, write_report

    reweight = {k: v for k, v in (("temperature_K", reweight_temperature), ("solvent", reweight_solvent),
                                  ("forcefield", reweight_forcefield)) if v is not None}
    summary = analyse(Path(run_dir), reweight=reweight or None, states_file=states_file, pose_file=pose_file)
    for line in summary["damage"]:
        _warn(line)
    page = write_report(Path(run_dir), summary)
    if as_json:
        click.echo(json.dumps(public(summary), indent=2))
        return
    click.echo(format_table(summary))
    click.echo(f"report: {page}")


@main.command()
@click.argument("run_dir", type=click.Path(file_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print the status as JSON.")
@_fail_cleanly
def status(run_dir, as_json):
    """Show the state of a running or finished run (reads its checkpoint; changes nothing).

    \b
    Example:
      hopwell status dipeptide
    """
    from hopwell.sampling.run import run_status
    from hopwell.sampling.shards import n_planned, shard_status

    info = run_status(Path(run_dir))
    for line in info["warnings"]:
        _warn(line)
    if n_planned(Path(run_dir)) is not None:
        info["shards"] = shard_status(Path(run_dir))
    if as_json:
        click.echo(json.dumps(info, indent=2))
        return
    for key, value in info.items():
        if key in ("shards", "warnings"):
            continue
        if isinstance(value, float):
            value = f"{value:.3f}"
        click.echo(f"{key.replace('_', ' '):<28} {'-' if value is None else value}")
    for row in info.get("shards", []):
        if not row["created"]:
            click.echo(f"shard {row['shard']:<22} not created (training unfinished)")
            continue
        state = "finished" if row["finished"] else ("sampling" if row["sampling_pid"] else "unfinished")
        click.echo(f"shard {row['shard']:<22} {state}: walkers {row['first_walker']}-"
                   f"{row['first_walker'] + row['walkers'] - 1}, cycle {row['cycle']},"
                   f" {row['production_samples']} production samples")


@main.command()
@_builder_options
@click.option("-o", "--output", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Directory to create (runs/ and the comparison files).")
@click.option("--budget", "budget_min", type=float, required=True, help="Sampling minutes per run.")
@click.option("--repeats", type=int, default=2, show_default=True, help="Runs per method (seeds differ).")
@click.option("--methods", default="flow,md,remd", show_default=True, help="Comma-separated methods.")
@click.option("--reference", "reference_file", type=click.Path(dir_okay=False), default=None,
              help="TOML of reference populations (see hopwell.sampling.compare).")
@click.option("--states", "states_file", type=click.Path(dir_okay=False), default=None,
              help="States TOML file [default: backbone regions or automatic torsion wells].")
@click.option("--tolerance", type=float, default=1.0, show_default=True,
              help="Error (percentage points) whose time-to-reach is reported.")
@click.option("--jobs", type=int, default=2, show_default=True,
              help="Runs at a time, each in its own process.")
@click.option("--temperature", "temperature_K", type=float, default=300.0, show_default=True,
              help="Temperature (K).")
@_fail_cleanly
def compare(out_dir, budget_min, repeats, methods, reference_file, states_file, tolerance, jobs,
            temperature_K, **kwargs):
    """Run each method REPEATS times on INPUT with equal budgets and compare them.

    \b
    Example:
      hopwell compare systems/ace_ala_nme.pdb -o bench --budget 20 \\
          --reference systems/ace_ala_nme_reference.toml
    """
    from hopwell.sampling import compare as cmp
    from hopwell.sampling.sampler import SamplerSettings
    from hopwell.systems.builder import BuildOptions, build

    chosen = list(dict.fromkeys(m.strip() for m in methods.split(",") if m.strip()))
    unknown = [m for m in chosen if m not in cmp.METHODS]
    if unknown or not chosen:
        raise InputError(f"unknown method(s) {', '.join(unknown) or '(none)'}; use {','.join(cmp.METHODS)}")
    if budget_min <= 0 or repeats < 1 or jobs < 1 or tolerance <= 0 or temperature_K <= 0:
        raise InputError("--budget, --repeats, --jobs, --tolerance and --temperature must be positive")
    references = cmp.read_reference(reference_file) if reference_file else None
    out = Path(out_dir)
    if out.exists():
        raise InputError(f"{out}: already exists; choose a new directory")
    options = BuildOptions(**{k: v for k, v in kwargs.items() if k != "input_spec"})
    build(kwargs["input_spec"], options)  # bad input fails here, before any run starts
    settings = SamplerSettings(temperature_K=temperature_K, seed=kwargs["random_seed"])
    plan = cmp.plan_runs(kwargs["input_spec"], out, chosen, repeats, budget_min * 60.0, options, settings)
    click.echo(f"hopwell compare: {len(plan)} runs of {budget_min:g} min, {jobs} at a time", err=True)
    cmp.run_jobs(plan, jobs, progress=lambda job: click.echo(f"  done: {job['dir']}", err=True))
    comparison = cmp.compare_runs(plan, budget_min * 60.0, references, tolerance / 100.0, states_file)
    paths = cmp.write_outputs(out, comparison)
    click.echo(cmp.format_table(comparison))
    click.echo(f"comparison: {paths[0]}")


@main.command()
@click.option("-o", "--output", "run_dir", default="hopwell-demo", show_default=True,
              type=click.Path(file_okay=False), help="Run directory to create.")
@click.option("--minutes", type=float, default=4.0, show_default=True, help="Sampling budget.")
@_fail_cleanly
def demo(run_dir, minutes):
    """Run the whole job on the shipped demo molecule (systems/demo_amide.sdf).

    The report uses the states of systems/demo_amide_states.toml (the two amide rotamers).

    \b
    Example:
      hopwell demo -o demo-run
    """
    import torch

    from hopwell.analysis.summary import analyse
    from hopwell.report import format_table, write_report
    from hopwell.sampling.run import start_run
    from hopwell.sampling.sampler import Budget, SamplerSettings
    from hopwell.systems.builder import BuildOptions

    spec = str(_systems_dir() / "demo_amide.sdf")
    torch.set_num_threads(1)
    settings = SamplerSettings(langevin_steps=200, proposals_per_cycle=32, training_cycles=10**9,
                               training_seconds=0.3 * minutes * 60.0)
    click.echo(f"hopwell demo: {spec}, {minutes:g} minutes of sampling", err=True)
    budget = Budget(seconds=minutes * 60.0)
    start_run(spec, Path(run_dir), BuildOptions(), settings, budget, progress=_progress_printer(budget))
    summary = analyse(Path(run_dir), states_file=_systems_dir() / "demo_amide_states.toml")
    page = write_report(Path(run_dir), summary)
    click.echo("")
    click.echo(format_table(summary))
    click.echo(f"report: {page}")


def _systems_dir() -> Path:
    """The shipped systems: beside the package in a source checkout."""
    return Path(__file__).resolve().parents[2] / "systems"


if __name__ == "__main__":  # pragma: no cover
    main()
