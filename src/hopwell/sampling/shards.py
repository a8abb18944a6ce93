"""Sharded production: train once in one process, then sample the frozen flow in parallel shards.

Layout under a run directory ``RUN`` (the training run itself is ``RUN`` as usual)::

    RUN/shards/plan.toml    the number of shards (written before training starts)
    RUN/shards/K/           shard K: a run directory of its own (run.toml, state.npz, chunks/...)

Each shard starts from the training run's checkpoint at the end of training: the frozen flow,
its share of the walkers (consecutive walkers, ``first_walker`` in its run.toml), and its own
random streams, seeded from ``numpy.random.SeedSequence([seed, K])`` (independent streams
by construction, NumPy's documented way to seed parallel generators). A shard is created
atomically (its checkpoint and flow file are written before its run.toml), and it is sampled
with :func:`~hopwell.sampling.run.resume_run`, so it has the crash safety of any run
directory: resuming a shard drops the chunks its checkpoint does not count and redoes that
work, and nothing is lost or counted twice.

Shards run on Dask distributed (https://distributed.dask.org): a ``LocalCluster`` of
single-threaded worker processes, or an existing cluster named by its scheduler address. A
shard whose worker process dies (``kill -9``, out of memory) is sampled again by the scheduler on
another worker, or on the one its nanny restarts, and resumes from the shard's last checkpoint;
a LocalCluster allows ``WORKER_DEATHS_ALLOWED`` such deaths per shard (Dask's
``distributed.scheduler.allowed-failures``; an existing scheduler keeps its own setting). The
same engine runs ``hopwell compare``'s runs (:func:`dask_client`, :func:`run_tasks`).
"""

from __future__ import annotations

import json
import logging
import math
import os
import uuid
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import torch

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.store import (
    CONFIG_FILE,
    STATE_FILE,
    RunStore,
    _npz_bytes,
    to_toml,
)

SHARD_DIR = "shards"
PLAN_FILE = "plan.toml"
WORKER_DEATHS_ALLOWED = 3  # a task whose worker process dies this often fails (Dask's default, made explicit)


def shard_path(run_dir: Path, index: int) -> Path:
    """The run directory of shard ``index``."""
    return Path(run_dir) / SHARD_DIR / str(index)


def split_walkers(n_walkers: int, n_shards: int) -> list[tuple[int, int]]:
    """``(first_walker, n_walkers)`` of each shard: consecutive walkers, sizes differing by one at most."""
    if n_shards < 1 or n_shards > n_walkers:
        raise InputError(f"--shards must be between 1 and the number of walkers ({n_walkers}), got {n_shards}")
    sizes = [n_walkers // n_shards + (k < n_walkers % n_shards) for k in range(n_shards)]
    return [(sum(sizes[:k]), sizes[k]) for k in range(n_shards)]


def shard_seed(seed: int, index: int) -> int:
    """The seed of shard ``index``'s random streams, from ``SeedSequence([seed, index])``."""
    return int(np.random.SeedSequence([seed, index]).generate_state(1, np.uint32)[0])


def shard_budget(budget: dict, n_walkers: int, shard_walkers: int) -> dict:
    """A shard's budget: its walkers' share of the samples (rounded up), the same seconds."""
    out = {}
    if budget.get("samples") is not None:
        out["samples"] = math.ceil(budget["samples"] * shard_walkers / n_walkers)
    if budget.get("seconds") is not None:
        out["seconds"] = budget["seconds"]
    return out


def write_plan(run_dir: Path, n_shards: int) -> None:
    """Mark ``run_dir`` as sharded with ``n_shards`` shards (before its training starts)."""
    (Path(run_dir) / SHARD_DIR).mkdir(parents=True, exist_ok=True)
    atomic_write_bytes(Path(run_dir) / SHARD_DIR / PLAN_FILE, to_toml({"shards": n_shards}).encode())


def n_planned(run_dir: Path) -> int | None:
    """The number of shards ``run_dir`` was planned with, or None for an unsharded run."""
    import tomllib

    path = Path(run_dir) / SHARD_DIR / PLAN_FILE
    if not path.is_file():
        return None
    try:
        shards = tomllib.loads(path.read_text()).get("shards")
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: not valid TOML ({exc}); it should read 'shards = N', N the number of"
                         " shards the run was started with") from None
    if not isinstance(shards, int) or isinstance(shards, bool) or shards < 1:
        raise InputError(f"{path}: 'shards' must be a positive integer, not {shards!r}; it should read"
                         " 'shards = N', N the number of shards the run was started with")
    return shards


def _shard_state(state: dict, first: int, count: int, seed: int) -> dict:
    """The training run's end-of-training checkpoint, cut to walkers ``first:first+count``."""
    out = dict(state)
    out["positions_nm"] = state["positions_nm"][first:first + count]
    out["energies_kj"] = state["energies_kj"][first:first + count]
    out["next_chunk"], out["production_samples"] = np.int64(0), np.int64(0)
    out["rng"] = np.str_(json.dumps(np.random.default_rng(seed).bit_generator.state))
    out["torch_rng"] = torch.Generator().manual_seed(seed).get_state().numpy()
    return out


def create_shards(run_dir: Path) -> list[Path]:
    """Create the shards a trained run lacks (idempotent); return every shard's directory.

    Raises
    ------
    InputError
        The run is not sharded or its training has not ended.
    """
    run_dir = Path(run_dir)
    n_shards = n_planned(run_dir)
    if n_shards is None:
        raise InputError(f"{run_dir}: not a sharded run (no {SHARD_DIR}/{PLAN_FILE})")
    store = RunStore.open(run_dir)
    state = store.read_state()
    if state is None or int(state["training_end_cycle"]) < 0:
        raise InputError(f"{run_dir}: training has not ended; resume the run first")
    config = store.config()
    flow_name = str(state["flow_file"])
    shared = {name: (run_dir / name).read_bytes() for name in ("molecule.sdf", "system.xml", "topology.pdb")
              if (run_dir / name).is_file()}
    shared[flow_name] = (run_dir / flow_name).read_bytes()
    paths = []
    for k, (first, count) in enumerate(split_walkers(int(config["walkers"]), n_shards)):
        path = shard_path(run_dir, k)
        paths.append(path)
        if (path / CONFIG_FILE).is_file():
            continue
        seed = shard_seed(int(config["sampler"]["seed"]), k)
        shard_config = {**config, "walkers": count, "shard": {"index": k, "first_walker": first, "seed": seed},
                        "sampler": {**config["sampler"], "seed": seed},
                        "budget": shard_budget(config.get("budget", {}), int(config["walkers"]), count)}
        files = {**shared, STATE_FILE: _npz_bytes(_shard_state(state, first, count, seed))}
        RunStore.create(path, shard_config, files)  # run.toml last: a shard is whole or absent
        RunStore(path).log(f"shard {k} created from cycle {int(state['cycle'])}: walkers {first}-{first + count - 1}")
    return paths


def shard_finished(path: Path) -> bool:
    """Whether a shard's checkpoint has spent its budget."""
    from hopwell.sampling.run import saved_budget

    state = RunStore.open(path).read_state()
    return state is not None and saved_budget(path).done(int(state["production_samples"]),
                                                         float(state["elapsed_s"]))


def sample_shard(path: str, samples: int | None = None, seconds: float | None = None) -> dict:
    """Sample one shard to its budget (resuming from its checkpoint); the Dask task.

    ``samples``/``seconds`` override the shard's saved budget when given. Runs single-threaded.
    The result's ``notices`` are the damage lines its resume recovered from (also in the
    shard's progress log), for the caller to show.
    """
    from hopwell.sampling.run import resume_run, saved_budget
    from hopwell.sampling.sampler import Budget

    torch.set_num_threads(1)
    budget = saved_budget(Path(path)) if samples is None and seconds is None else Budget(samples, seconds)
    notices: list[str] = []
    sampler = resume_run(Path(path), budget, notice=notices.append)
    return {"shard": path, "cycle": sampler.cycle, "production_samples": sampler.production_samples,
            "notices": notices}


def _client(workers: int | None, scheduler: str | None, quiet: bool = False):
    """A Dask client: on ``scheduler`` if given, else on a new LocalCluster of single-threaded processes.

    ``quiet`` keeps the LocalCluster's own log lines (a task's failure, a worker's restart) off
    the terminal, for callers that report every task's outcome themselves (:func:`run_tasks`).
    """
    import dask
    from dask.distributed import Client, LocalCluster

    if scheduler:
        return Client(scheduler), None
    for name in ("OMP_NUM_THREADS", "OPENMM_CPU_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, "1")  # inherited by the worker processes
    with dask.config.set({"distributed.scheduler.allowed-failures": WORKER_DEATHS_ALLOWED}):
        cluster = LocalCluster(n_workers=workers or os.cpu_count() or 1, threads_per_worker=1, processes=True,
                               dashboard_address=":0", silence_logs=logging.CRITICAL if quiet else logging.WARN)
    return Client(cluster), cluster


@contextmanager
def dask_client(workers: int | None = None, scheduler: str | None = None):
    """A quiet :func:`_client` for the ``with`` block, closed (with its LocalCluster, if any) at the end.

    Parameters
    ----------
    workers : int, optional
        Single-threaded worker processes of a new LocalCluster (default: one per core).
    scheduler : str, optional
        Address of an existing Dask scheduler to use instead of a LocalCluster.
    """
    client, cluster = _client(workers, scheduler, quiet=True)
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def task_key(name: str) -> str:
    """A unique Dask key that starts with ``name`` (so a cluster's task list names the work)."""
    return f"{name}-{uuid.uuid4().hex[:12]}"


def run_tasks(client, function, jobs: list[tuple], names: list[str], on_done=None) -> list:
    """Run ``function(*job)`` for each job as one Dask task; return the results in job order.

    Parameters
    ----------
    client : distributed.Client
    function : callable
        Module-level, so that it pickles.
    jobs : list of tuple
        Each task's arguments.
    names : list of str
        Each task's name (its key starts with it; errors name it).
    on_done : callable, optional
        Called as ``on_done(index, result)`` as each task finishes, in the order they finish.

    Raises
    ------
    InputError
        A task raised an InputError, or its worker process died more often than the scheduler
        allows (``distributed.scheduler.allowed-failures``); the tasks not finished are cancelled.
    RuntimeError
        A task raised any other exception (chained; the rest are cancelled).
    """
    from dask.distributed import KilledWorker, as_completed

    futures = [client.submit(function, *job, key=task_key(name), pure=False) for job, name in zip(jobs, names)]
    index = {future.key: k for k, future in enumerate(futures)}
    results = [None] * len(futures)
    for future in as_completed(futures):
        k = index[future.key]
        if future.status != "finished":
            error = future.exception()
            client.cancel(futures)
            if isinstance(error, KilledWorker):
                raise InputError(f"{names[k]}: its worker process died repeatedly (out of memory?); what it"
                                 " wrote up to its last checkpoint is kept") from None
            if isinstance(error, InputError):
                raise InputError(f"{names[k]}: {error}") from None
            raise RuntimeError(f"{names[k]} failed: {type(error).__name__}: {error}") from error
        results[k] = future.result()
        if on_done is not None:
            on_done(k, results[k])
    return results


def run_shards(run_dir: Path, workers: int | None = None, scheduler: str | None = None,
               budget=None, notice=None) -> list[dict]:
    """Sample every unfinished shard of ``run_dir`` on Dask; finished shards are left alone.

    Parameters
    ----------
    run_dir : Path
    workers : int, optional
        Worker processes of the LocalCluster (default: one per core); ignored with ``scheduler``.
    scheduler : str, optional
        Address of an existing Dask scheduler.
    budget : Budget, optional
        A new budget for the whole run (samples shared among shards by walkers).
    notice : callable, optional
        Called with each damage line a shard's resume recovered from, prefixed by the shard's
        name, as each shard finishes.

    Returns
    -------
    list of dict
        ``sample_shard``'s result for each shard that was sampled.
    """
    paths = create_shards(run_dir)
    jobs = []
    for path in paths:
        override = {}
        if budget is not None:
            config = RunStore.open(path).config()
            total = RunStore.open(run_dir).config()["walkers"]
            override = shard_budget({"samples": budget.samples, "seconds": budget.seconds}, total,
                                    int(config["walkers"]))
        finished = shard_finished(path) if budget is None else _done(path, override)
        if not finished:
            jobs.append((str(path), override.get("samples"), override.get("seconds")))
    if not jobs:
        return []
    names = [f"shard-{Path(job[0]).name}" for job in jobs]

    def tell(k: int, result: dict) -> None:
        for line in result.get("notices", []) if notice is not None else []:
            notice(f"{names[k]}: {line}")

    with dask_client(workers, scheduler) as client:
        return run_tasks(client, sample_shard, jobs, names, on_done=tell)


def _done(path: Path, budget: dict) -> bool:
    from hopwell.sampling.sampler import Budget

    state = RunStore.open(path).read_state()
    return state is not None and Budget(budget.get("samples"), budget.get("seconds")).done(
        int(state["production_samples"]), float(state["elapsed_s"]))


def train_then_shard(run_dir: Path, workers: int | None = None, scheduler: str | None = None,
                     budget=None, progress=None, notice=None) -> list[dict]:
    """Finish the training of a sharded run if needed, then sample its shards (start and resume).

    ``notice`` hears of damage recovered from in the training run (:func:`~hopwell.sampling.run.resume_run`)
    and in each shard (also written to the shard's own progress log).
    """
    from hopwell.sampling.run import resume_run
    from hopwell.sampling.sampler import Budget

    state = RunStore.open(run_dir).read_state()
    if state is None or int(state["training_end_cycle"]) < 0:
        resume_run(Path(run_dir), Budget(training_only=True), progress, notice=notice)
    return run_shards(run_dir, workers, scheduler, budget, notice)


def shard_status(run_dir: Path) -> list[dict]:
    """``run_status`` of each shard created so far, with its index, walkers and whether it is done."""
    from hopwell.sampling.run import run_status

    out = []
    n = n_planned(run_dir) or 0
    for k in range(n):
        path = shard_path(run_dir, k)
        if not (path / CONFIG_FILE).is_file():
            out.append({"shard": k, "created": False})
            continue
        config = RunStore.open(path).config()
        out.append({"shard": k, "created": True, "first_walker": config["shard"]["first_walker"],
                    "walkers": config["walkers"], "finished": shard_finished(path), **run_status(path)})
    return out


def shard_stores(run_dir: Path) -> list[tuple[RunStore, int]]:
    """Each created shard's store and the global index of its first walker, in shard order."""
    out = []
    for k in range(n_planned(run_dir) or 0):
        path = shard_path(run_dir, k)
        if (path / CONFIG_FILE).is_file():
            out.append((RunStore.open(path), int(RunStore.open(path).config()["shard"]["first_walker"])))
    return out


def start_sharded_run(spec: str, out_dir: Path, build_options, settings, budget, n_shards: int,
                      n_walkers: int | None = None, platform: str | None = None, workers: int | None = None,
                      scheduler: str | None = None, progress=None) -> list[dict]:
    """Build, train in this process into ``out_dir``, then sample ``n_shards`` shards on Dask.

    The arguments are :func:`~hopwell.sampling.run.start_run`'s, plus the shards and the
    cluster (see :func:`run_shards`).
    """
    from hopwell.sampling.run import _walkers, start_run
    from hopwell.sampling.sampler import Budget
    from hopwell.systems.builder import build

    if settings.method == "remd":
        raise InputError("remd runs one walker per temperature and cannot be split into shards")
    RunStore.refuse_existing(Path(out_dir))
    molsys = build(spec, build_options)
    split_walkers(_walkers(settings, n_walkers, len(molsys.seeds_nm)), n_shards)  # refuse before training
    write_plan(out_dir, n_shards)
    start_run(spec, Path(out_dir), build_options, settings,
              Budget(samples=budget.samples, seconds=budget.seconds, training_only=True),
              n_walkers=n_walkers, platform=platform, progress=progress, molsys=molsys)
    return run_shards(out_dir, workers, scheduler)


def iter_pooled_chunks(store: RunStore):
    """The run's own chunks, then each shard's, walkers numbered over all shards (as the report's).

    Damaged chunks are skipped, as the report's reading skips them (and names them).
    """
    yield from store.iter_chunks(damaged=[])
    for shard, first in shard_stores(store.path):
        for chunk in shard.iter_chunks(damaged=[]):
            yield {**chunk, "state_walker": chunk["state_walker"] + first}
