"""Batches: many molecules, each one run with the same options, scheduled on Dask.

Layout of a batch directory ``DIR``::

    DIR/batch.json              the plan: molecules, build options, sampler settings, budget
                                (written once, last of the batch's start: it marks a batch)
    DIR/NAME/                   molecule NAME's run directory (an ordinary run: resume, report)
    DIR/_batch/inputs/NAME.sdf  an SDF molecule's records, as they were in the batch's input
    DIR/_batch/outcomes/NAME.json  how NAME ended: done (verdict, states) or failed (one line)
    DIR/_batch/tasks/NAME/run.lock  held (flock) by the process working on NAME now
    DIR/overview.csv, overview.json, overview.html   one row per molecule, rewritten as they end
    DIR/run.lock                held by the one process scheduling the batch

Everything a batch knows is in these files, each written atomically, so ``kill -9`` at any
instant loses nothing: a molecule is finished when its outcome file exists, and ``resume``
schedules the others (a molecule whose run directory has a checkpoint continues from it, with
the crash safety of any run). A molecule refused as bad input stays failed; one that crashed
(an internal error, a worker lost) is tried again on resume. The flocks are released by the
kernel when their holder dies, so no stale lock survives a kill.

Molecules are tasks on Dask distributed (https://distributed.dask.org), on the cluster
:func:`hopwell.sampling.shards._client` makes: a LocalCluster of single-threaded worker
processes, or an existing cluster's scheduler.
"""

from __future__ import annotations

import csv
import html
import io
import json
import re
import time
import traceback
from contextlib import ExitStack
from dataclasses import asdict, dataclass
from pathlib import Path

from hopwell.atomic import atomic_write_bytes
from hopwell.errors import InputError
from hopwell.sampling.store import CONFIG_FILE, RunStore

PLAN_FILE = "batch.json"
WORK_DIR = "_batch"  # starts with "_": no molecule name can take it
OVERVIEW = ("overview.csv", "overview.json", "overview.html")
RESERVED = {PLAN_FILE, "run.lock", *OVERVIEW}
SAFE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
MAIN_STATES = 3  # states per molecule in the overview, most populated first
DONE, FAILED, UNFINISHED = "done", "failed", "unfinished"
POLL_S = 0.5
OVERVIEW_EVERY_S = 5.0  # the overview is rewritten at most this often (and at the end)


@dataclass(frozen=True)
class Molecule:
    """One molecule of a batch: its name and either a SMILES or the text of its SDF records."""

    name: str
    where: str  # where the batch's input gave it, for error messages ("FILE, line 3")
    smiles: str | None = None
    sdf_text: str | None = None


# -- reading a batch's input -------------------------------------------------------------------
def _read_smiles_file(path: Path) -> list[Molecule]:
    out = []
    for number, line in enumerate(path.read_text().splitlines(), start=1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        parts = text.split(None, 1)
        if len(parts) < 2:
            raise InputError(f"{path}, line {number}: no name after the SMILES; write 'SMILES name'")
        out.append(Molecule(parts[1].strip(), f"{path}, line {number}", smiles=parts[0]))
    return out


def _read_csv(path: Path) -> list[Molecule]:
    with open(path, newline="") as handle:
        reader = csv.DictReader(handle)
        columns = {(c or "").strip().lower(): c for c in reader.fieldnames or []}
        if "name" not in columns or "smiles" not in columns:
            raise InputError(f"{path}: needs a 'name' and a 'SMILES' column; its header is"
                             f" {', '.join(reader.fieldnames or []) or '(empty)'}")
        return [Molecule((row[columns["name"]] or "").strip(), f"{path}, line {reader.line_num}",
                         smiles=(row[columns["smiles"]] or "").strip())
                for row in reader]


def _read_sdf(path: Path) -> list[Molecule]:
    """Consecutive records with one title are one molecule (its known structures), as ``run`` reads them."""
    records, lines, first = [], [], 1
    for number, line in enumerate(path.read_text().splitlines(), start=1):
        lines.append(line)
        if line.strip() == "$$$$":
            records.append((first, lines))
            lines, first = [], number + 1
    if any(line.strip() for line in lines):
        raise InputError(f"{path}, line {first}: a record without its closing '$$$$' line")
    out: list[Molecule] = []
    for start, block in records:
        title = block[0].strip()
        text = "\n".join(block) + "\n"
        if not title:
            raise InputError(f"{path}, line {start}: the record has no name on its title line")
        if out and out[-1].name == title:
            out[-1] = Molecule(title, out[-1].where, sdf_text=out[-1].sdf_text + text)
        else:
            out.append(Molecule(title, f"{path}, line {start}", sdf_text=text))
    return out


def read_molecules(path: Path) -> list[Molecule]:
    """The molecules of a batch's input file, names checked.

    Parameters
    ----------
    path : Path
        ``.smi``/``.smiles``/``.txt``: one ``SMILES name`` a line (``#`` comments, blank lines
        skipped); ``.csv``: ``name`` and ``SMILES`` columns; ``.sdf``/``.sd``: the record titles
        are the names, and consecutive records with one title are one molecule.

    Raises
    ------
    InputError
        An unreadable file, a missing name, an unsafe or repeated name, or no molecules.
    """
    path = Path(path)
    readers = {".smi": _read_smiles_file, ".smiles": _read_smiles_file, ".txt": _read_smiles_file,
               ".csv": _read_csv, ".sdf": _read_sdf, ".sd": _read_sdf}
    reader = readers.get(path.suffix.lower())
    if reader is None:
        raise InputError(f"{path}: a batch takes .smi (SMILES name), .csv (name, SMILES) or .sdf")
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    molecules = reader(path)
    if not molecules:
        raise InputError(f"{path}: no molecules")
    check_names(molecules)
    return molecules


def check_names(molecules: list[Molecule]) -> None:
    """Refuse names that are not safe as directory names, and repeated ones (case ignored)."""
    seen: dict[str, Molecule] = {}
    for molecule in molecules:
        name = molecule.name
        if not SAFE_NAME.fullmatch(name) or name.endswith(".") or name.lower() in RESERVED:
            raise InputError(f"{molecule.where}: name {name!r} cannot be a directory name; use up to 64"
                             " letters, digits, '.', '_' and '-', starting with a letter or digit"
                             f" (and none of {', '.join(sorted(RESERVED))})")
        if name.lower() in seen:
            raise InputError(f"{molecule.where}: name {name!r} is used twice (also"
                             f" {seen[name.lower()].where}; names differing only in case count as one)")
        if molecule.smiles is not None and not molecule.smiles:
            raise InputError(f"{molecule.where}: molecule {name!r} has no SMILES")
        seen[name.lower()] = molecule


# -- the plan --------------------------------------------------------------------------------
def is_batch(path: Path) -> bool:
    """Whether ``path`` is a batch directory."""
    return (Path(path) / PLAN_FILE).is_file()


def read_plan(batch_dir: Path) -> dict:
    """The batch's plan (``batch.json``)."""
    if not is_batch(batch_dir):
        raise InputError(f"{batch_dir} is not a hopwell batch directory (no {PLAN_FILE})")
    return json.loads((Path(batch_dir) / PLAN_FILE).read_text())


def create_batch(molecules_file: Path, batch_dir: Path, build_options, settings, budget,
                 n_walkers: int | None = None, platform: str | None = None) -> dict:
    """Read and check the molecules, then write the batch's inputs and its plan (the plan last).

    Parameters
    ----------
    molecules_file : Path
        See :func:`read_molecules`.
    batch_dir : Path
        Must not hold a batch or a run.
    build_options : BuildOptions
    settings : SamplerSettings
    budget : Budget
        Each molecule's budget, as ``hopwell run`` takes it.
    n_walkers : int, optional
    platform : str, optional

    Returns
    -------
    dict
        The plan.
    """
    batch_dir = Path(batch_dir)
    molecules = read_molecules(molecules_file)
    if is_batch(batch_dir):
        raise InputError(f"{batch_dir} already holds a batch; use 'hopwell resume {batch_dir}' or another -o")
    RunStore.refuse_existing(batch_dir)
    inputs = batch_dir / WORK_DIR / "inputs"
    inputs.mkdir(parents=True, exist_ok=True)
    (batch_dir / WORK_DIR / "outcomes").mkdir(exist_ok=True)
    entries = []
    for molecule in molecules:
        if molecule.sdf_text is not None:
            atomic_write_bytes(inputs / f"{molecule.name}.sdf", molecule.sdf_text.encode())
            entries.append({"name": molecule.name, "sdf": f"inputs/{molecule.name}.sdf"})
        else:
            entries.append({"name": molecule.name, "smiles": molecule.smiles})
    plan = {"format": 1, "molecules_file": str(molecules_file), "build": asdict(build_options),
            "sampler": asdict(settings), "budget": {"samples": budget.samples, "seconds": budget.seconds},
            "walkers": n_walkers, "platform": platform, "molecules": entries}
    atomic_write_bytes(batch_dir / PLAN_FILE, json.dumps(plan, indent=1).encode())
    return plan


# -- one molecule: the Dask task ---------------------------------------------------------------
def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    line = text[0] if text else ""
    return line if isinstance(exc, InputError) else f"{type(exc).__name__}: {line}".rstrip(": ")


def _outcome_path(batch_dir: Path, name: str) -> Path:
    return Path(batch_dir) / WORK_DIR / "outcomes" / f"{name}.json"


def write_outcome(batch_dir: Path, outcome: dict) -> None:
    """Record how a molecule ended (atomically): after this, it is finished."""
    atomic_write_bytes(_outcome_path(batch_dir, outcome["name"]), json.dumps(outcome, indent=1).encode())


def read_outcome(batch_dir: Path, name: str) -> dict | None:
    """A molecule's outcome, or None while it is unfinished."""
    path = _outcome_path(batch_dir, name)
    return json.loads(path.read_text()) if path.is_file() else None


def _sample_and_report(batch_dir: Path, plan: dict, entry: dict) -> dict:
    """Run (or continue) one molecule and write its report; the outcome, failures included."""
    from hopwell.analysis.summary import analyse
    from hopwell.report import write_report
    from hopwell.sampling.run import resume_run, start_run
    from hopwell.sampling.sampler import Budget, SamplerSettings
    from hopwell.systems.builder import BuildOptions

    name = entry["name"]
    run_dir = batch_dir / name
    try:
        if (run_dir / CONFIG_FILE).is_file():
            resume_run(run_dir)  # with its own budget; returns at once when that is spent
        else:
            spec = str(batch_dir / WORK_DIR / entry["sdf"]) if "sdf" in entry else entry["smiles"]
            start_run(spec, run_dir, BuildOptions(**plan["build"]), SamplerSettings(**plan["sampler"]),
                      Budget(**plan["budget"]), n_walkers=plan["walkers"], platform=plan["platform"])
        summary = analyse(run_dir)
        write_report(run_dir, summary)
    except InputError as exc:
        return {"name": name, "status": FAILED, "kind": "input", "error": _one_line(exc)}
    except Exception as exc:  # noqa: BLE001 - a crash of one molecule must not stop the others
        return {"name": name, "status": FAILED, "kind": "crash", "error": _one_line(exc),
                "traceback": traceback.format_exc()}
    ranked = sorted(summary["states"], key=lambda s: -s["population"])[:MAIN_STATES]
    return {"name": name, "status": DONE, "verdict": summary["verdict"], "reasons": summary["reasons"],
            "samples": summary["samples"], "report": f"{name}/report.html",
            "states": [{"name": s["name"], "population": s["population"], "ci95": s["ci95"]} for s in ranked]}


def molecule_task(batch_dir: str, name: str) -> dict:
    """Sample one molecule of a batch to its budget and report it (the Dask task).

    Holds the molecule's task lock while it works; returns ``{"name", "status": "busy"}`` at
    once when another process holds it (a worker of an earlier, killed scheduler still at it).
    Otherwise writes the outcome file and returns the outcome.
    """
    import torch

    torch.set_num_threads(1)
    batch_dir = Path(batch_dir)
    plan = read_plan(batch_dir)
    entry = next(e for e in plan["molecules"] if e["name"] == name)
    with ExitStack() as stack:
        try:
            stack.enter_context(RunStore(batch_dir / WORK_DIR / "tasks" / name).exclusive())
        except InputError:
            return {"name": name, "status": "busy"}
        outcome = _sample_and_report(batch_dir, plan, entry)
        write_outcome(batch_dir, outcome)
    return outcome


def _running(batch_dir: Path, names) -> list[str]:
    return [n for n in names if RunStore(batch_dir / WORK_DIR / "tasks" / n).writer_pid() is not None]


# -- the overview ------------------------------------------------------------------------------
def overview_rows(batch_dir: Path) -> list[dict]:
    """One row per molecule of the plan, in its order: status, verdict, main states, error, report."""
    rows = []
    for entry in read_plan(batch_dir)["molecules"]:
        outcome = read_outcome(batch_dir, entry["name"]) or {"name": entry["name"], "status": UNFINISHED}
        rows.append({k: v for k, v in outcome.items() if k != "traceback"})
    return rows


def _states_text(row: dict) -> str:
    return "; ".join(f"{s['name']} {100 * s['population']:.1f}% ({100 * s['ci95'][0]:.1f}-"
                     f"{100 * s['ci95'][1]:.1f})" for s in row.get("states", []))


def _csv_text(rows: list[dict]) -> str:
    out = io.StringIO()
    writer = csv.writer(out)
    header = ["name", "status", "verdict", "samples"]
    for k in range(1, MAIN_STATES + 1):
        header += [f"state_{k}", f"population_{k}", f"ci95_low_{k}", f"ci95_high_{k}"]
    writer.writerow(header + ["error", "report"])
    for row in rows:
        cells = [row["name"], row["status"], row.get("verdict", ""), row.get("samples", "")]
        states = row.get("states", [])
        for k in range(MAIN_STATES):
            cells += ([states[k]["name"], f"{states[k]['population']:.5f}", f"{states[k]['ci95'][0]:.5f}",
                       f"{states[k]['ci95'][1]:.5f}"] if k < len(states) else ["", "", "", ""])
        writer.writerow(cells + [row.get("error", ""), row.get("report", "")])
    return out.getvalue()


def _html_text(batch_dir: Path, rows: list[dict]) -> str:
    def cell(text):
        return f"<td>{html.escape(str(text))}</td>"

    body = []
    for row in rows:
        name = html.escape(row["name"])
        link = f'<td><a href="{html.escape(row["report"])}">{name}</a></td>' if "report" in row else f"<td>{name}</td>"
        detail = row.get("error") or _states_text(row)
        body.append(f"<tr class=\"{row['status']}\">{link}{cell(row['status'])}{cell(row.get('verdict', ''))}"
                    f"{cell(row.get('samples', ''))}{cell(detail)}</tr>")
    counts = {s: sum(r["status"] == s for r in rows) for s in (DONE, FAILED, UNFINISHED)}
    return (
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"><title>hopwell batch "
        f"{html.escape(Path(batch_dir).name)}</title><style>body{{font-family:sans-serif;margin:2em}}"
        "table{border-collapse:collapse}td,th{border:1px solid #bbb;padding:4px 8px;text-align:left}"
        "tr.failed td{background:#fde8e8}tr.unfinished td{color:#777}</style></head><body>\n"
        f"<h1>Batch {html.escape(Path(batch_dir).name)}</h1>\n<p>{len(rows)} molecules: {counts[DONE]} done,"
        f" {counts[FAILED]} failed, {counts[UNFINISHED]} unfinished. Populations are percentages with 95%"
        " intervals; trust them only where the verdict is converged.</p>\n<table><tr><th>molecule</th>"
        "<th>status</th><th>verdict</th><th>samples</th><th>main states, or the error</th></tr>\n"
        + "\n".join(body) + "\n</table></body></html>\n"
    )


def write_overview(batch_dir: Path, rows: list[dict] | None = None) -> list[dict]:
    """Write overview.csv, overview.json and overview.html (from the outcome files unless ``rows``)."""
    batch_dir = Path(batch_dir)
    rows = overview_rows(batch_dir) if rows is None else rows
    csv_name, json_name, html_name = OVERVIEW
    atomic_write_bytes(batch_dir / csv_name, _csv_text(rows).encode())
    atomic_write_bytes(batch_dir / json_name, json.dumps({"molecules": rows}, indent=1).encode())
    atomic_write_bytes(batch_dir / html_name, _html_text(batch_dir, rows).encode())
    return rows


# -- scheduling --------------------------------------------------------------------------------
def unfinished(rows: list[dict]) -> list[str]:
    """Names of the molecules to schedule: no outcome yet, or one that crashed."""
    return [r["name"] for r in rows if r["status"] == UNFINISHED or r.get("kind") == "crash"]


def run_batch(batch_dir: Path, workers: int | None = None, scheduler: str | None = None,
              progress=None) -> list[dict]:
    """Schedule the batch's unfinished molecules on Dask until each has an outcome (start and resume).

    Parameters
    ----------
    batch_dir : Path
    workers : int, optional
        Worker processes of the LocalCluster (default: one per core); ignored with ``scheduler``.
    scheduler : str, optional
        Address of an existing Dask scheduler.
    progress : callable, optional
        Called as ``progress(counts)`` whenever the counts change: a dict with ``total``,
        ``done``, ``failed``, ``running``, ``waiting`` and ``dashboard`` (an address or None).

    Returns
    -------
    list of dict
        The overview's rows. A molecule another process still works on stays unfinished.

    Raises
    ------
    InputError
        Not a batch, or another process schedules it now.
    """
    from hopwell.sampling.shards import _client

    batch_dir = Path(batch_dir).resolve()
    read_plan(batch_dir)
    with RunStore(batch_dir).exclusive():  # one scheduling process per batch
        rows = write_overview(batch_dir)
        todo = unfinished(rows)
        if not todo:
            return rows
        client, cluster = _client(workers, scheduler)
        try:
            return _follow(batch_dir, client, rows, todo, progress)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()


def _dashboard(client) -> str | None:
    try:
        return client.dashboard_link
    except KeyError:  # a scheduler without a dashboard
        return None


def _follow(batch_dir: Path, client, rows: list[dict], todo: list[str], progress) -> list[dict]:
    """Submit one task per molecule, record each as it ends, report the counts when they change."""
    index = {row["name"]: k for k, row in enumerate(rows)}
    futures = {client.submit(molecule_task, str(batch_dir), name, pure=False): name for name in todo}
    dashboard = _dashboard(client)
    last, written, dirty = None, time.monotonic(), False
    while True:
        for future in [f for f in futures if f.done()]:
            name = futures.pop(future)
            try:
                outcome = future.result()  # the task wrote it (or found the molecule busy)
            except Exception as exc:  # noqa: BLE001 - the task was lost (a worker died too often, ...)
                outcome = {"name": name, "status": FAILED, "kind": "crash", "error": _one_line(exc),
                           "traceback": traceback.format_exc()}
                write_outcome(batch_dir, outcome)
            if outcome["status"] in (DONE, FAILED):
                rows[index[name]] = {k: v for k, v in outcome.items() if k != "traceback"}
                dirty = True
        if dirty and (not futures or time.monotonic() - written > OVERVIEW_EVERY_S):
            write_overview(batch_dir, rows)
            written, dirty = time.monotonic(), False
        pending = set(futures.values())
        running = len(_running(batch_dir, pending))
        counts = {"total": len(rows), "done": sum(r["status"] == DONE for r in rows),
                  "failed": sum(r["status"] == FAILED and r["name"] not in pending for r in rows),
                  "running": running, "waiting": len(futures) - running, "dashboard": dashboard}
        if progress is not None and counts != last:
            progress(counts)
        last = counts
        if not futures:
            return rows
        time.sleep(POLL_S)
