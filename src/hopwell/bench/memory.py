"""Resident memory of a long run, sampled while it runs.

Run ``python -m hopwell.bench.memory SMILES --minutes 40``: starts ``hopwell run`` on the input
in a temporary directory and prints the resident set (VmRSS) and its peak (VmHWM) from
``/proc/<pid>/status`` at regular intervals, with the production samples recorded so far. Flat
memory over a run that records ever more samples shows the sampler keeps a bounded buffer.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def _status_kb(pid: int) -> dict:
    fields = {}
    with open(f"/proc/{pid}/status") as handle:
        for line in handle:
            key, _, value = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                fields[key] = int(value.split()[0])
    return fields


def _samples(run_dir: Path) -> int:
    try:
        with np.load(run_dir / "state.npz") as state:
            return int(state["production_samples"])
    except (OSError, KeyError, ValueError):
        return 0


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("input")
    parser.add_argument("--minutes", type=float, default=40.0)
    parser.add_argument("--every", type=float, default=60.0, help="seconds between readings")
    parser.add_argument("--json-out", type=Path, default=None)
    args = parser.parse_args(argv)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        run_dir = Path(tmp) / "run"
        proc = subprocess.Popen([sys.executable, "-m", "hopwell.cli", "run", args.input, "-o", str(run_dir),
                                 "--hours", str(args.minutes / 60.0)], stderr=subprocess.DEVNULL)
        start = time.monotonic()
        print(f"{'minutes':>8} {'RSS (MB)':>9} {'peak (MB)':>10} {'samples':>8}")
        while proc.poll() is None:
            time.sleep(args.every)
            try:
                status = _status_kb(proc.pid)
            except OSError:
                break
            row = {"minutes": (time.monotonic() - start) / 60.0, "rss_mb": status["VmRSS"] / 1024,
                   "peak_mb": status["VmHWM"] / 1024, "samples": _samples(run_dir)}
            rows.append(row)
            print(f"{row['minutes']:>8.1f} {row['rss_mb']:>9.0f} {row['peak_mb']:>10.0f} {row['samples']:>8}",
                  flush=True)
        proc.wait()
    if args.json_out:
        args.json_out.write_text(json.dumps(rows, indent=2) + "\n")


if __name__ == "__main__":
    main()
