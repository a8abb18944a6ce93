"""Starting and resuming runs: the glue between the builder, the sampler and the run store."""

from __future__ import annotations

import io
import json
from dataclasses import asdict, fields
from pathlib import Path

import numpy as np
import openmm
from openmm import app
from rdkit import Chem

from hopwell.coords.guards import ProposalGuard, refuse_failing_seeds
from hopwell.coords.torsions import molecule_zmatrix, refuse_rigid
from hopwell.errors import InputError
from hopwell.sampling.checkpoint import PREVIOUS_STATE_FILE, STATE_FILE, newest_good
from hopwell.sampling.files import read_molecules, read_system
from hopwell.sampling.recovery import checkpoint_for_resume
from hopwell.sampling.replica import ReplicaSampler
from hopwell.sampling.run_config import FORMAT_VERSION, required
from hopwell.sampling.sampler import Budget, Sampler, SamplerSettings
from hopwell.sampling.store import CONFIG_FILE, RunStore
from hopwell.systems.builder import (
    BuildOptions,
    MolecularSystem,
    build,
    conformer_positions_nm,
)

# Settings that runs made before they existed did without: such a run resumes as it began.
LEGACY_SETTINGS = {"flow_torsions": "all", "darts_per_cycle": 0, "flow_stiff_torsions": True,
                   "flow_context": False, "context_noise": 0.0, "weight_decay": 0.0}


def _molecule_sdf(molsys: MolecularSystem) -> bytes:
    """The molecule with one conformer per seed (Angstrom), as SDF text."""
    mol = Chem.Mol(molsys.mol)
    mol.RemoveAllConformers()
    for xyz in molsys.seeds_nm:
        conf = Chem.Conformer(mol.GetNumAtoms())
        for i, row in enumerate(xyz * 10.0):
            conf.SetAtomPosition(i, row.tolist())
        mol.AddConformer(conf, assignId=True)
    out = io.StringIO()
    writer = Chem.SDWriter(out)
    for conf in mol.GetConformers():
        writer.write(mol, confId=conf.GetId())
    writer.close()
    return out.getvalue().encode()


def _topology_pdb(molsys: MolecularSystem) -> bytes:
    out = io.StringIO()
    app.PDBFile.writeFile(molsys.topology, molsys.seeds_nm[0] * openmm.unit.nanometer, out)
    return out.getvalue().encode()


def make_sampler(mol: Chem.Mol, system: openmm.System, seeds_nm: np.ndarray, settings: SamplerSettings,
                 store: RunStore, n_walkers: int, platform: str | None) -> Sampler:
    """The sampler ``settings.method`` names: replica exchange ("remd") or walkers ("flow", "md").

    For "remd" the walkers are the ladder's rungs, ``settings.replicas`` of them, and
    ``n_walkers`` must equal that number.
    """
    if settings.method == "remd":
        if n_walkers != settings.replicas:
            raise ValueError(f"remd runs one walker per rung: n_walkers must be {settings.replicas}"
                             f" (settings.replicas), got {n_walkers}")
        return ReplicaSampler(mol, system, seeds_nm, settings, store, platform=platform)
    return Sampler(mol, system, seeds_nm, settings, store, n_walkers=n_walkers, platform=platform)


# Walkers by default: one per seed, at most this many (the lowest-energy seeds; the others
# still serve as dart centres). A flexible ligand's scaled ETKDG seeding can leave a few hundred
# distinct seeds, and as many walkers would each get too short a series for the per-walker
# diagnostics (R-hat, transitions) in an overnight run. Chosen, not measured.
MAX_DEFAULT_WALKERS = 64


def _walkers(settings: SamplerSettings, n_walkers: int | None, n_seeds: int) -> int:
    """Walkers of a new run: one per rung for "remd", else ``n_walkers`` or one per seed (at
    most ``MAX_DEFAULT_WALKERS``)."""
    if n_walkers is not None and n_walkers < 1:
        raise InputError(f"--walkers must be at least 1, got {n_walkers}")
    if settings.method != "remd":
        return n_walkers or min(n_seeds, MAX_DEFAULT_WALKERS)
    if n_walkers is not None:
        raise InputError("remd runs one walker per temperature; set --replicas, not --walkers")
    return settings.replicas


def start_run(spec: str, out_dir: Path, build_options: BuildOptions, settings: SamplerSettings,
              budget: Budget, n_walkers: int | None = None, platform: str | None = None,
              progress=None, stop_when=None, molsys: MolecularSystem | None = None) -> Sampler:
    """Build the system, create the run directory and sample until the budget is spent.

    ``molsys``, when given, is what ``build(spec, build_options)`` returned: it is used as it
    is, not built again (``spec`` and ``build_options`` are still written to run.toml).
    """
    if molsys is None:
        molsys = build(spec, build_options)
    # Refused here, before the run directory exists (the sampler checks again for other callers).
    refuse_rigid(molecule_zmatrix(molsys.mol), molsys.mol)
    refuse_failing_seeds(ProposalGuard.from_mol(molsys.mol, molsys.seeds_nm[0]), molsys.seeds_nm)
    walkers = _walkers(settings, n_walkers, len(molsys.seeds_nm))
    config = {
        "format": FORMAT_VERSION,
        "input": spec,
        "build": {k: v for k, v in asdict(build_options).items()},
        "sampler": asdict(settings),
        "walkers": walkers,
        "platform": platform or "",
        "kind": molsys.kind,
        "budget": {"samples": budget.samples, "seconds": budget.seconds},
    }
    RunStore.refuse_existing(Path(out_dir))  # before the lock, which would touch run.lock
    with RunStore(Path(out_dir)).exclusive():  # then create checks again: two starts may race
        store = RunStore.create(Path(out_dir), config, {
            "molecule.sdf": _molecule_sdf(molsys),
            "topology.pdb": _topology_pdb(molsys),
            "system.xml": molsys.to_xml().encode(),
        })
        store.log(f"run started: {molsys.summary()['formula']}, {config['walkers']} walkers")
        sampler = make_sampler(molsys.mol, molsys.system, molsys.seeds_nm, settings, store, walkers,
                               platform)
        sampler.run(budget, progress, stop_when)
    return sampler


def load_sampler(run_dir: Path, notice=None) -> Sampler:
    """A sampler restored from a run directory's newest good checkpoint.

    Everything is read and checked before anything is changed: run.toml
    (:mod:`hopwell.sampling.run_config`), molecule.sdf, system.xml. A damaged checkpoint falls
    back to the previous one and damaged chunks are named (:mod:`hopwell.sampling.recovery`;
    ``notice`` is called with one line for each). A start killed after the directory was created
    but before checkpoint zero leaves no state.npz and no chunks; the sampler then starts from
    the beginning. Restoring removes the chunks no checkpoint counts, so a caller that is not
    :func:`resume_run` must make sure no other process samples into ``run_dir``
    (:meth:`RunStore.exclusive`).
    """
    store = RunStore.open(Path(run_dir))
    config = store.config()
    where = store.path / CONFIG_FILE
    names = {f.name for f in fields(SamplerSettings)}
    saved = {**LEGACY_SETTINGS, **required(config, "sampler", where)}
    settings = SamplerSettings(**{k: v for k, v in saved.items() if k in names})
    walkers = required(config, "walkers", where)
    records = read_molecules(store.path / "molecule.sdf")
    mol = records[0]
    seeds_nm = np.stack([conformer_positions_nm(m)[0] for m in records])
    system = read_system(store.path / "system.xml")
    if not (store.path / STATE_FILE).exists() and store.chunk_indices():
        keep = (f", or copy {PREVIOUS_STATE_FILE} to state.npz to continue from the checkpoint before it"
                if (store.path / PREVIOUS_STATE_FILE).exists() else "")
        raise InputError(f"{run_dir}: sample chunks but no checkpoint (state.npz); the run directory is"
                         f" damaged: restore state.npz from a backup{keep}")
    checkpoint = checkpoint_for_resume(store, notice)
    sampler = make_sampler(mol, system, seeds_nm, settings, store, walkers, config.get("platform") or None)
    if checkpoint is None:
        store.discard_chunks_from(0)  # only temp files of the interrupted start can be there
        (store.path / PREVIOUS_STATE_FILE).unlink(missing_ok=True)  # nothing to fall back to yet
        store.log("resume: no checkpoint yet (the start was interrupted); starting from cycle 0")
        return sampler
    sampler.restore(checkpoint.state, checkpoint.flow)
    return sampler


def saved_budget(run_dir: Path) -> Budget:
    """The budget a run was started with."""
    store = RunStore.open(Path(run_dir))
    saved = required(store.config(), "budget", store.path / CONFIG_FILE)
    return Budget(samples=saved.get("samples"), seconds=saved.get("seconds"))


def resume_run(run_dir: Path, budget: Budget | None = None, progress=None, stop_when=None,
               notice=None) -> Sampler:
    """Continue a run from its newest good checkpoint, with its own budget unless one is given.

    Refused (:class:`~hopwell.errors.InputError`) while another process samples into ``run_dir``.
    ``notice`` is called with one line for each damage found and recovered from
    (:func:`load_sampler`).
    """
    with RunStore.open(Path(run_dir)).exclusive():
        sampler = load_sampler(run_dir, notice)
        if budget is None:
            budget = saved_budget(run_dir)
        sampler.store.log(f"resumed at cycle {sampler.cycle}")
        sampler.run(budget, progress, stop_when)
    return sampler


def make_budget(hours: float | None, samples: int | None) -> Budget:
    """The budget of a new run or a resume; one of ``hours`` and ``samples`` is needed."""
    if hours is None and samples is None:
        raise InputError("give a budget: --hours H or --samples N")
    if (hours is not None and hours <= 0) or (samples is not None and samples < 1):
        raise InputError("--hours and --samples must be positive")
    return Budget(samples=samples, seconds=None if hours is None else hours * 3600.0)


def training_schedule(method: str, training_cycles: int | None, budget: Budget) -> tuple[int, float | None]:
    """Training cycles and training seconds of a new run.

    None for "md" and "remd" (no flow to train: every cycle is production); otherwise the cycles
    asked for, or, when none are, 30% of a time budget (a samples budget: 200 cycles).
    """
    if method in ("md", "remd"):
        return 0, None
    if training_cycles is not None:
        return training_cycles, None
    if budget.seconds is None:
        return 200, None
    return (10**9 if not budget.samples else 200), 0.3 * budget.seconds


def check_settings(settings: SamplerSettings) -> None:
    """Refuse (:class:`~hopwell.errors.InputError`) settings no run can use."""
    if settings.temperature_K <= 0 or settings.langevin_steps < 1 or settings.proposals_per_cycle < 1:
        raise InputError("--temperature, --langevin-steps and --proposals must be positive")
    if settings.method == "remd" and (settings.replicas < 2 or settings.top_temperature_K <= settings.temperature_K):
        raise InputError("remd needs --replicas of at least 2 and --top-temperature above --temperature")


def run_status(run_dir: Path) -> dict:
    """What ``hopwell status`` shows: phase, cycle, samples and acceptance, from the checkpoint.

    Reads only; safe while another process samples into ``run_dir``. The checkpoint is the one
    a resume would continue from: the previous one when state.npz is damaged (``warnings`` says
    why).
    """
    store = RunStore.open(Path(run_dir))
    config = store.config()
    checkpoint = newest_good(store.path)
    if checkpoint is None:
        raise InputError(f"{run_dir}: no checkpoint yet (the run is starting)")
    state = checkpoint.state
    stats = json.loads(str(state["stats"]))

    def rate(name):
        s = stats[name]
        return s["accepted"] / s["proposed"] if s["proposed"] else None

    return {
        "sampling_pid": store.writer_pid(),  # the process sampling into run_dir now, if any
        "phase": "production" if int(state["training_end_cycle"]) >= 0 else "training",
        "cycle": int(state["cycle"]),
        "elapsed_min": float(state["elapsed_s"]) / 60.0,
        "production_samples": int(state["production_samples"]),
        "chunks": int(state["next_chunk"]),
        "flow_acceptance_training": rate("training"),
        "flow_acceptance_production": rate("production"),
        "one_torsion_acceptance": rate("single"),
        "dart_acceptance": rate("dart") if "dart" in stats else None,
        "ring_flip_acceptance": rate("ring") if "ring" in stats else None,
        "langevin_rolled_back": stats["langevin"].get("rolled_back") if "langevin" in stats else None,
        "states_failing_guard": stats["langevin"].get("outside_guard") if "langevin" in stats else None,
        "exchange_acceptance": (sum(stats["exchange"]["accepted"]) / sum(stats["exchange"]["attempted"])
                                if "exchange" in stats and sum(stats["exchange"]["attempted"]) else None),
        "budget": config.get("budget", {}),
        "checkpoint": checkpoint.file,  # state.previous.npz when state.npz is damaged
        "warnings": [f"{line}; showing the previous checkpoint, the one a resume continues from"
                     for line in checkpoint.passed_over],
    }
