"""hopwell from Python: build, sample, and read a run, with the same code paths as the CLI.

``build`` and ``sample`` take keyword settings with the names of
:class:`~hopwell.systems.builder.BuildOptions` and
:class:`~hopwell.sampling.sampler.SamplerSettings` (the names written to run.toml); a name
neither knows raises :class:`~hopwell.errors.InputError`. Heavy imports (torch, OpenMM,
RDKit) happen inside the functions, so ``import hopwell`` stays light.
"""

from __future__ import annotations

import contextlib
import weakref
from dataclasses import fields
from pathlib import Path

from hopwell.errors import InputError

# Settings of a run that are not SamplerSettings fields (``hopwell run --walkers/--platform``).
RUN_EXTRAS = ("walkers", "platform")

# What each system returned by ``build`` was built from: id -> (spec, BuildOptions), dropped
# when the system is garbage-collected. run.toml records both, so a run can be reweighted.
_ORIGINS: dict[int, tuple[str, object]] = {}


def _field_names(cls) -> set[str]:
    return {f.name for f in fields(cls)}


def _refuse_unknown(given, known, what: str) -> None:
    unknown = sorted(set(given) - set(known))
    if unknown:
        raise InputError(f"unknown {what} {', '.join(map(repr, unknown))}; known: {', '.join(sorted(known))}")


def build(spec: str, **options):
    """Build the force-field system of a molecule.

    Parameters
    ----------
    spec : str
        SMILES, or a path to an SDF/MOL/MOL2 file or a peptide PDB.
    **options
        Fields of :class:`~hopwell.systems.builder.BuildOptions` (``forcefield``, ``solvent``,
        ``dielectric``, ``n_seeds``, ``template``, ``add_hydrogens``, ``pick_isomer``,
        ``random_seed``, ``backbone_seeds``).

    Returns
    -------
    hopwell.systems.builder.MolecularSystem
        Pass it to :func:`sample`; it is not built again.

    Raises
    ------
    InputError
        For an unknown option name or an input or option hopwell cannot use.
    """
    from hopwell.systems.builder import BuildOptions
    from hopwell.systems.builder import build as build_system

    _refuse_unknown(options, _field_names(BuildOptions), "build option(s)")
    build_options = BuildOptions(**options)
    molsys = build_system(str(spec), build_options)
    key = id(molsys)
    _ORIGINS[key] = (str(spec), build_options)
    weakref.finalize(molsys, _ORIGINS.pop, key, None)
    return molsys


@contextlib.contextmanager
def _one_torch_thread():
    """torch on one thread while sampling (OpenMM and torch take turns), then as it was."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(before)


def sample(spec_or_system, run_dir, *, minutes: float | None = None, samples: int | None = None,
           progress=None, **settings) -> Run:
    """Sample a molecule's conformers into a new run directory, as ``hopwell run`` does.

    Parameters
    ----------
    spec_or_system : str or MolecularSystem
        An input as :func:`build` takes it (built here, with the build options among
        ``settings``), or a system :func:`build` returned (used as it is).
    run_dir : str or os.PathLike
        The run directory to create; it must not hold a run.
    minutes, samples : float, int, optional
        The budget: sampling minutes, production samples, or both (whichever ends first).
    progress : callable, optional
        Called with the sampler after every cycle.
    **settings
        Fields of :class:`~hopwell.sampling.sampler.SamplerSettings` (``temperature_K``,
        ``method``, ``langevin_steps``, ``proposals_per_cycle``, ``training_cycles``, ...),
        ``walkers`` and ``platform``; with a spec also the build options of :func:`build`.
        Training defaults as on the command line: 30% of a time budget, else 200 cycles.

    Returns
    -------
    Run
    """
    from hopwell.sampling.run import (
        check_settings,
        make_budget,
        start_run,
        training_schedule,
    )
    from hopwell.sampling.sampler import SamplerSettings
    from hopwell.systems.builder import BuildOptions

    sampler_names, build_names = _field_names(SamplerSettings), _field_names(BuildOptions)
    if isinstance(spec_or_system, (str, Path)):
        _refuse_unknown(settings, sampler_names | build_names | set(RUN_EXTRAS), "setting(s)")
        build_options = {k: settings.pop(k) for k in list(settings) if k in build_names}
        molsys = build(str(spec_or_system), **build_options)
    else:
        _refuse_unknown(settings, sampler_names | set(RUN_EXTRAS), "setting(s)")
        molsys = spec_or_system
    if id(molsys) not in _ORIGINS:
        raise InputError("sample() takes an input spec or a system that hopwell.build returned")
    spec, build_options = _ORIGINS[id(molsys)]
    budget = make_budget(None if minutes is None else minutes / 60.0, samples)
    walkers, platform = settings.pop("walkers", None), settings.pop("platform", None)
    cycles, seconds = training_schedule(settings.get("method", "flow"), settings.pop("training_cycles", None),
                                        budget)
    settings = {"seed": build_options.random_seed, "training_seconds": seconds, **settings,
                "training_cycles": cycles}
    run_settings = SamplerSettings(**settings)
    check_settings(run_settings)
    with _one_torch_thread():
        start_run(spec, Path(run_dir), build_options, run_settings, budget, n_walkers=walkers,
                  platform=platform, progress=progress, molsys=molsys)
    return Run(run_dir)


def open_run(run_dir) -> Run:
    """A run directory made by :func:`sample` or ``hopwell run``.

    Raises
    ------
    InputError
        When ``run_dir`` holds no run.
    """
    from hopwell.sampling.store import RunStore

    RunStore.open(Path(run_dir))  # refuses a directory that is not a run
    return Run(run_dir)


class Run:
    """A run directory: its status, more sampling, its analysis and report.

    Parameters
    ----------
    run_dir : str or os.PathLike
    """

    def __init__(self, run_dir):
        self.path = Path(run_dir)

    def __repr__(self) -> str:
        return f"Run({str(self.path)!r})"

    def status(self) -> dict:
        """What ``hopwell status`` shows (phase, cycle, production samples, acceptance), as a dict."""
        from hopwell.sampling.run import run_status

        return run_status(self.path)

    def resume(self, *, minutes: float | None = None, samples: int | None = None, progress=None) -> Run:
        """Continue from the newest checkpoint, as ``hopwell resume`` does.

        Parameters
        ----------
        minutes, samples : float, int, optional
            The new total budget (the run's own when neither is given).
        progress : callable, optional
            Called with the sampler after every cycle.
        """
        from hopwell.sampling.run import make_budget, resume_run

        budget = None if minutes is None and samples is None else make_budget(
            None if minutes is None else minutes / 60.0, samples)
        with _one_torch_thread():
            resume_run(self.path, budget, progress=progress)
        return self

    def summary(self, states_file=None, reweight: dict | None = None, pose_file=None) -> dict:
        """The analysis of ``hopwell report``: :func:`hopwell.analysis.summary.analyse`'s dict.

        Parameters
        ----------
        states_file : str or os.PathLike, optional
            A states TOML; by default torsion wells or backbone regions.
        reweight : dict, optional
            ``temperature_K``, ``solvent`` and/or ``forcefield`` to reweight to.
        pose_file : str or os.PathLike, optional
            One structure (SDF/MOL/MOL2, e.g. a bound pose): its population and cost go under
            ``"pose"`` (:mod:`hopwell.analysis.pose`).
        """
        from hopwell.analysis.summary import analyse

        return analyse(self.path, reweight=reweight, states_file=states_file, pose_file=pose_file)

    def report(self, states_file=None, reweight: dict | None = None, pose_file=None) -> Path:
        """Write report.html, summary.json, populations.csv and the ensemble; return the page's path."""
        from hopwell.report import write_report

        return write_report(self.path, self.summary(states_file, reweight, pose_file))

    def populations(self, states_file=None) -> list[dict]:
        """One row per state, with the columns of populations.csv.

        Returns
        -------
        list of dict
            ``state``, ``population``, ``ci95_low``, ``ci95_high`` (fractions),
            ``dG_kJ_per_mol``, ``dG_ci95_low``, ``dG_ci95_high``, and
            ``all_states_ci95_low``, ``all_states_ci95_high``: intervals that hold every
            state's population at once with 95% probability
            (:func:`hopwell.analysis.stats.joint_interval`).
        """
        return [
            {"state": s["name"], "population": s["population"], "ci95_low": s["ci95"][0],
             "ci95_high": s["ci95"][1], "dG_kJ_per_mol": s["dG_kJ_per_mol"],
             "dG_ci95_low": s["dG_ci95"][0], "dG_ci95_high": s["dG_ci95"][1],
             "all_states_ci95_low": s["ci95_all_states"][0], "all_states_ci95_high": s["ci95_all_states"][1]}
            for s in self.summary(states_file)["states"]
        ]
