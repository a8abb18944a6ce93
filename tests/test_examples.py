"""Every example runs (shortened), so none can rot."""

import os
import subprocess
import sys

from conftest import REPO


def _run(args, tmp_path, **env):
    return subprocess.run(args, cwd=REPO, capture_output=True, text=True, timeout=900,
                          env={**os.environ, "OMP_NUM_THREADS": "1", **env})


def test_api_walkthrough(tmp_path):
    proc = _run([sys.executable, "examples/api_walkthrough.py", "--quick", "-o", str(tmp_path)], tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "verdict:" in proc.stdout and (tmp_path / "run" / "report.html").is_file()


def test_peptide_script_with_states_and_options(tmp_path):
    bin_dir = os.path.dirname(sys.executable)
    proc = _run(["bash", "examples/peptide.sh", "0.01"], tmp_path, OUT=str(tmp_path / "pep"),
                PATH=f"{bin_dir}:{os.environ['PATH']}")
    assert proc.returncode == 0, proc.stderr[-2000:]
    # The backbone report carries both Karplus couplings; the user states file names its states.
    assert "3J_HN_HA_Hz (hu-bax-1997)" in proc.stdout
    assert "phi > 0 (C7ax or alphaL)" in proc.stdout and "compact (C7eq, alphaR)" in proc.stdout


def test_run_options_file_is_accepted(tmp_path):
    hopwell = os.path.join(os.path.dirname(sys.executable), "hopwell")
    proc = _run([hopwell, "run", "CCCC", "--config", "examples/run_options.toml", "-o", str(tmp_path / "r"),
                 "--samples", "100", "--training-cycles", "5", "--langevin-steps", "20", "--seeds", "2"], tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    config = (tmp_path / "r" / "run.toml").read_text()
    # Values from the file (proposals = 32) and from the command line (samples = 100) both land.
    assert "proposals_per_cycle = 32" in config and "samples = 100" in config
