"""Input fuzzer: damaged SMILES, SDF, MOL2 and PDB through ``build``, ``energy`` and ``run``.

Run ``python -m hopwell.bench.fuzz --cases 500 --seed 1`` (needs the ``test`` extra for
hypothesis). The cases come from :func:`hopwell.bench.damage.fuzz_inputs`, drawn with a fixed
hypothesis seed, each paired with a command:

* ``build --json --seeds 4 -- INPUT``;
* ``energy --json --seeds 4 -- INPUT``;
* ``run -o run --samples 1 --training-cycles 1 --langevin-steps 10 --proposals 4 --seeds 4 -- INPUT``
  (a short run: the input goes through the same checks and the sampler starts on it).

``--`` keeps an input that starts with ``-`` an input rather than an option. Every case runs
the real command line in a process of its own, in a fresh directory, under a timeout, and ends
in one of :data:`OUTCOMES`:

* ``ok``: exit 0 and a sound result (the JSON parses, every energy is finite; a run directory
  with at least one production sample);
* ``clean error``: exit 2 and exactly one line on stderr, ``hopwell: error: ...``, with no
  control characters in it;
* ``traceback``: exit 1, "internal error", or a Python traceback anywhere in the output;
* ``messy error``: exit 2 with anything but that one line on stderr;
* ``bad result``: exit 0 but the result is not sound;
* ``crash``: killed by a signal or another exit status;
* ``hang``: still running at the timeout (then killed);
* ``memory``: peak resident memory above ``--max-rss-mb``, whatever the process printed (a
  parser that reserves memory for a count it read can end in a clean error on one machine and
  be killed for memory on another).

Only the first two pass. A process per case rather than click's in-process runner: measured
here (2 cores) a ``build`` or ``energy`` process costs 0.6-1.2 s in all, interpreter and imports
included, and a short ``run`` 5 s, so 500 cases take minutes, not hours; and only a real
process shows what a user sees: its exit status, all it writes to stderr (RDKit's C++ side
writes there itself), a crash that kills the interpreter, and a hang that only killing the
process ends. Failing cases are written to ``--out`` (one folder each: the input and
``case.json`` with the command line, exit status and output) to be run again by hand. Peak
memory comes from ``os.wait4``, so the fuzzer runs on Linux and other Unix systems.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import shlex
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

from hypothesis import HealthCheck, Phase, given, seed, settings
from hypothesis import strategies as st

from hopwell.bench import print_table
from hopwell.bench.damage import FORMATS, FuzzInput, fuzz_inputs

COMMANDS = ("build", "energy", "run")
OUTCOMES = ("ok", "clean error", "traceback", "messy error", "bad result", "crash", "hang", "memory")
# Peak resident memory (MB) past which a case fails: measured here, cases peak at 0.1-0.45 GB.
MAX_RSS_MB = 2000.0
PASSING = ("ok", "clean error")
COMMON_OPTIONS = ("--seeds", "4")
COMMAND_OPTIONS = {
    "build": ("--json",),
    "energy": ("--json",),
    "run": ("-o", "run", "--samples", "1", "--training-cycles", "1", "--langevin-steps", "10",
            "--proposals", "4"),
}
ERROR_PREFIX = "hopwell: error: "


@dataclass(frozen=True)
class Case:
    """A damaged input and the command it goes through."""

    input: FuzzInput
    command: str

    def argv(self) -> list[bytes]:
        """The command line, run in the case's directory (the input file is ``input.<fmt>``)."""
        spec = self.input.data if self.input.fmt == "smiles" else f"input.{self.input.fmt}".encode()
        words = ["-m", "hopwell.cli", self.command, *COMMAND_OPTIONS[self.command], *COMMON_OPTIONS, "--"]
        return [os.fsencode(sys.executable), *(w.encode() for w in words), spec]


@dataclass(frozen=True)
class Outcome:
    """What one case did.

    Attributes
    ----------
    outcome : str
        One of :data:`OUTCOMES`.
    returncode : int or None
        None after a timeout.
    stdout, stderr : str
    seconds : float
        Wall-clock time of the process.
    why : str
        For outcomes other than ``ok`` and ``clean error``: what was wrong.
    traceback : str
        The traceback hopwell logged for an internal error ('' if none).
    peak_mb : float
        The process's peak resident memory (MB).
    """

    outcome: str
    returncode: int | None
    stdout: str
    stderr: str
    seconds: float
    why: str = ""
    traceback: str = ""
    peak_mb: float = 0.0


def cases(commands: tuple[str, ...] = COMMANDS, formats: tuple[str, ...] = FORMATS) -> st.SearchStrategy[Case]:
    """Damaged inputs (:func:`hopwell.bench.damage.fuzz_inputs`) paired with commands."""
    unknown = sorted(set(commands) - set(COMMANDS))
    if unknown or not commands:
        raise ValueError(f"commands must be among {', '.join(COMMANDS)}; got {commands!r}")
    return st.builds(Case, fuzz_inputs(formats), st.sampled_from(commands))


def draw_cases(n_cases: int, random_seed: int, commands: tuple[str, ...] = COMMANDS,
               formats: tuple[str, ...] = FORMATS) -> list[Case]:
    """``n_cases`` distinct cases, the same for the same seed (and hypothesis version).

    Parameters
    ----------
    n_cases : int
    random_seed : int
    commands, formats : tuple of str
        See :func:`cases`.

    Returns
    -------
    list of Case
    """
    drawn: dict[tuple, Case] = {}
    for attempt in range(10):  # hypothesis repeats a few simple cases; draw again for those
        @seed(random_seed * 1000 + attempt)
        @settings(max_examples=n_cases, database=None, deadline=None,
                  phases=[Phase.generate], suppress_health_check=list(HealthCheck))
        @given(cases(commands, formats))
        def collect(case):
            if len(drawn) < n_cases:
                drawn.setdefault((case.input.fmt, case.input.data, case.command), case)

        collect()
        if len(drawn) == n_cases:
            return list(drawn.values())
    raise RuntimeError(f"only {len(drawn)} distinct cases could be drawn")


def run_case(case: Case, timeout_s: float, max_rss_mb: float = MAX_RSS_MB) -> Outcome:
    """Run one case in a fresh directory and classify what happened.

    Parameters
    ----------
    case : Case
    timeout_s : float
        Wall-clock limit; a process still running then is killed and counted as a hang.
    max_rss_mb : float
        A process whose peak resident memory passed this (MB) counts as ``memory``, whatever
        it printed.

    Returns
    -------
    Outcome
    """
    with tempfile.TemporaryDirectory(prefix="hopwell-fuzz-") as folder:
        work = Path(folder)
        if case.input.fmt != "smiles":
            (work / f"input.{case.input.fmt}").write_bytes(case.input.data)
        start = time.perf_counter()
        returncode, peak_mb = _run_process(case.argv(), work, timeout_s)
        seconds = time.perf_counter() - start
        stdout, stderr = _text((work / "stdout").read_bytes()), _text((work / "stderr").read_bytes())
        if returncode is None:
            outcome, why = "hang", f"still running after {timeout_s:g} s"
        elif peak_mb > max_rss_mb:
            outcome, why = "memory", f"peak resident memory {peak_mb:.0f} MB"
        else:
            outcome, why = classify(case.command, returncode, stdout, stderr, work)
    return Outcome(outcome, returncode, stdout, stderr, seconds, why, _logged_traceback(stderr), peak_mb)


def _run_process(argv: list[bytes], work: Path, timeout_s: float) -> tuple[int | None, float]:
    """Run ``argv`` in ``work`` (output to ``work/stdout`` and ``work/stderr``).

    Returns the exit status (None if killed at the timeout) and the peak resident memory in MB,
    read from ``os.wait4`` (Linux reports ``ru_maxrss`` in kB), which ``subprocess`` does not keep.
    """
    with open(work / "stdout", "wb") as out, open(work / "stderr", "wb") as err:
        proc = subprocess.Popen(argv, cwd=work, stdout=out, stderr=err)
    deadline = time.monotonic() + timeout_s
    pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
    while not pid and time.monotonic() < deadline:
        time.sleep(0.05)
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
    if not pid:
        proc.kill()
        _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)  # reaped here: tell Popen
    return (proc.returncode if pid else None), usage.ru_maxrss / 1024


def _logged_traceback(stderr: str) -> str:
    """The traceback file an internal error names on stderr, read and removed ('' if none)."""
    found = re.search(r"the traceback is in (\S+\.log)", stderr)
    if not found or not Path(found.group(1)).is_file():
        return ""
    log = Path(found.group(1))
    text = log.read_text(errors="replace")
    log.unlink()
    return text


def _text(data: bytes | None) -> str:
    return (data or b"").decode(errors="replace")


def classify(command: str, returncode: int, stdout: str, stderr: str, work: Path) -> tuple[str, str]:
    """The outcome of a finished process (see the module docstring) and, if failing, why.

    Parameters
    ----------
    command : {"build", "energy", "run"}
    returncode : int
    stdout, stderr : str
    work : pathlib.Path
        The directory the command ran in (``run`` writes ``run/`` there).

    Returns
    -------
    outcome : str
    why : str
    """
    if returncode not in (0, 1, 2):
        return "crash", f"exit status {returncode}"
    if "Traceback" in stdout + stderr or "internal error" in stderr or returncode == 1:
        lines = stderr.strip().splitlines()
        return "traceback", lines[-1] if lines else f"exit status {returncode}"
    if returncode == 2:
        lines = stderr.split("\n")
        if len(lines) != 2 or lines[1] or not lines[0].startswith(ERROR_PREFIX):
            return "messy error", f"stderr is {len(lines) - 1} line(s), not one hopwell: error: line"
        if not lines[0].isprintable():
            return "messy error", "stderr holds control characters"
        return "clean error", ""
    problem = _result_problem(command, stdout, stderr, work)
    return ("bad result", problem) if problem else ("ok", "")


def _result_problem(command: str, stdout: str, stderr: str, work: Path) -> str:
    """What is wrong with the output of a command that exited 0 ('' when nothing is)."""
    if command == "run":
        if not (work / "run" / "run.toml").is_file():
            return "no run.toml in the run directory"
        finished = [w for w in stderr.split("\n") if w.startswith("run finished")]
        if not finished or " 0 production samples" in finished[-1]:
            return "the run recorded no production sample"
        return ""
    try:
        out = json.loads(stdout)
    except ValueError:
        return "stdout is not JSON"
    energies = out.get("energies") if command == "energy" else out.get("seed_energies_kj_per_mol")
    if not energies or not all(isinstance(e, float | int) and math.isfinite(e) for e in energies):
        return f"energies missing or not finite: {str(energies)[:80]}"
    if command == "build" and (out.get("atoms", 0) < 3 or out.get("seeds") != len(energies)):
        return "atoms or seeds do not add up"
    return ""


def save_failure(index: int, case: Case, outcome: Outcome, out_dir: Path) -> Path:
    """Write a failing case's input and ``case.json`` to ``out_dir/<index>-<format>-<command>/``."""
    folder = out_dir / f"{index:04d}-{case.input.fmt}-{case.command}"
    folder.mkdir(parents=True, exist_ok=True)
    name = "smiles.bin" if case.input.fmt == "smiles" else f"input.{case.input.fmt}"
    (folder / name).write_bytes(case.input.data)
    argv = [os.fsdecode(w) for w in case.argv()[1:]]
    record = {
        "format": case.input.fmt, "command": case.command, "damages": list(case.input.damages),
        "outcome": outcome.outcome, "why": outcome.why, "returncode": outcome.returncode,
        "seconds": round(outcome.seconds, 2), "peak_mb": round(outcome.peak_mb),
        "command_line": "python " + " ".join(shlex.quote(w) for w in argv),
        "stderr": outcome.stderr[-4000:], "stdout": outcome.stdout[-2000:],
        "traceback": outcome.traceback,
    }
    (folder / "case.json").write_text(json.dumps(record, indent=2))
    return folder


def tally(pairs: list[tuple[Case, Outcome]], key) -> dict:
    """Counts of each outcome, by ``key(case)`` and in all, for :func:`hopwell.bench.print_table`."""
    rows: dict[str, dict] = {}
    for case, outcome in pairs:
        for name in (key(case), "all"):
            row = rows.setdefault(name, {o: 0 for o in OUTCOMES})
            row[outcome.outcome] += 1
    all_row = rows.pop("all")
    return {**dict(sorted(rows.items())), "all": all_row}


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cases", type=int, default=500, help="Cases to run.")
    parser.add_argument("--seed", type=int, default=0, help="Hypothesis seed for drawing the cases.")
    parser.add_argument("--commands", default=",".join(COMMANDS), help="Comma-separated commands.")
    parser.add_argument("--formats", default=",".join(FORMATS), help="Comma-separated input formats.")
    parser.add_argument("--timeout", type=float, default=90.0, help="Seconds before a case is a hang.")
    parser.add_argument("--max-rss-mb", type=float, default=MAX_RSS_MB,
                        help="Peak resident memory (MB) past which a case fails.")
    parser.add_argument("--jobs", type=int, default=1, help="Cases run at the same time.")
    parser.add_argument("--out", type=Path, default=Path("fuzz-failures"),
                        help="Folder for the failing cases.")
    args = parser.parse_args(argv)
    commands, formats = tuple(args.commands.split(",")), tuple(args.formats.split(","))
    start = time.perf_counter()
    todo = draw_cases(args.cases, args.seed, commands, formats)
    print(f"{len(todo)} cases drawn in {time.perf_counter() - start:.1f} s", file=sys.stderr)
    done: list[tuple[Case, Outcome]] = []
    with ThreadPoolExecutor(max_workers=args.jobs) as pool:
        for index, (case, outcome) in enumerate(zip(todo, pool.map(lambda c: run_case(c, args.timeout, args.max_rss_mb), todo))):
            done.append((case, outcome))
            if outcome.outcome not in PASSING:
                folder = save_failure(index, case, outcome, args.out)
                print(f"case {index}: {outcome.outcome} ({outcome.why}) -> {folder}", file=sys.stderr)
            if (index + 1) % 25 == 0:
                print(f"{index + 1}/{len(todo)} cases, {time.perf_counter() - start:.0f} s", file=sys.stderr)
    wall = time.perf_counter() - start
    print_table(tally(done, lambda c: c.input.fmt), "format", 8, 11)
    print()
    print_table(tally(done, lambda c: c.command), "command", 8, 11)
    seconds, peaks = sorted(o.seconds for _, o in done), sorted(o.peak_mb for _, o in done)
    print(f"\n{len(done)} cases (seed {args.seed}, {args.jobs} job(s)) in {wall:.0f} s wall;"
          f" per case median {seconds[len(seconds) // 2]:.1f} s, longest {seconds[-1]:.1f} s;"
          f" peak memory median {peaks[len(peaks) // 2]:.0f} MB, largest {peaks[-1]:.0f} MB")
    failing = sum(o.outcome not in PASSING for _, o in done)
    if failing:
        print(f"{failing} failing case(s) written to {args.out}")


if __name__ == "__main__":
    main()
