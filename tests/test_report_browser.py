"""report.html in a real browser: headless Chromium, driven over its DevTools protocol (a pipe).

Checks what a reader sees: the table and every plot, the molecule drawing, the 3D view of the
representative structures (drawn, and turned by a mouse drag), the still image with scripts off,
no console errors, nothing wider than a 1280-pixel window or a 390-pixel phone, and no request
that leaves the machine; for a peptide (PDB state files) that the hydrogens are drawn. The
full-page screenshots are kept under pytest's tmp path and, when HOPWELL_ARTEFACTS names a
directory, copied there for a reviewer.
"""

import base64
import fcntl
import io
import json
import os
import re
import select
import shutil
import subprocess
import sys
import time

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from hopwell.cli import main
from hopwell.report.viewer import viewer_script

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
# CI installs Debian's chromium (.ci/run); a developer machine without it skips this test.
pytestmark = pytest.mark.skipif(CHROMIUM is None and not os.environ.get("CI"),
                                reason="chromium is not installed")
# WebGL without a GPU: SwiftShader, named explicitly (Chromium warns about falling back to it).
FLAGS = ["--headless", "--no-sandbox", "--use-angle=swiftshader", "--enable-unsafe-swiftshader",
         "--disable-quic", "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--hide-scrollbars"]
PHONE_PX = 390  # CSS width of a current mid-size phone (390 x 844), from memory


class Browser:
    """Chromium with ``--remote-debugging-pipe``: JSON commands on fd 3, answers on fd 4, NUL-ended."""

    def __init__(self, profile):
        to_browser, from_browser = os.pipe(), os.pipe()
        # Copies above fd 9, so that placing them on 3 and 4 cannot overwrite one with the other; a
        # small Python launcher places them and becomes chromium (exec).
        read_end, write_end = (fcntl.fcntl(fd, fcntl.F_DUPFD, 10) for fd in (to_browser[0], from_browser[1]))
        launcher = "import os, sys; os.dup2(int(sys.argv[1]), 3); os.dup2(int(sys.argv[2]), 4); os.execv(sys.argv[3], sys.argv[3:])"
        self.proc = subprocess.Popen([sys.executable, "-c", launcher, str(read_end), str(write_end),
                                      CHROMIUM, *FLAGS, f"--user-data-dir={profile}",
                                      "--remote-debugging-pipe", "about:blank"],
                                     pass_fds=(read_end, write_end),
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        for fd in (read_end, write_end, to_browser[0], from_browser[1]):
            os.close(fd)
        self.out, self.inp = to_browser[1], from_browser[0]
        self.buffer, self.last_id, self.events = b"", 0, []
        target = self.send("Target.createTarget", url="about:blank")["targetId"]
        self.session = self.send("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.page(f"{domain}.enable")

    def _message(self, deadline):
        while b"\0" not in self.buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self.inp], [], [], left)[0]:
                raise TimeoutError("chromium did not answer in time")
            chunk = os.read(self.inp, 1 << 20)
            if not chunk:
                raise EOFError("chromium closed its pipe")
            self.buffer += chunk
        raw, self.buffer = self.buffer.split(b"\0", 1)
        return json.loads(raw)

    def send(self, method, session=None, timeout=60, **params):
        self.last_id += 1
        message = {"id": self.last_id, "method": method, "params": params}
        if session:
            message["sessionId"] = session
        os.write(self.out, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            answer = self._message(deadline)
            if answer.get("id") == self.last_id:
                assert "error" not in answer, f"{method}: {answer['error']}"
                return answer.get("result", {})
            self.events.append(answer)

    def page(self, method, **params):
        return self.send(method, session=self.session, **params)

    def open(self, uri, width_px, height_px=900, scripts=True, mobile=False):
        """Load ``uri`` at a window size and wait for its load event and two painted frames.

        With ``scripts=False`` the page's scripts do not run; evaluation here is allowed again
        once the page has loaded (its inline scripts were passed over while it was parsed).
        ``mobile=True`` emulates a phone's browser: the page's viewport meta tag sets its width.
        """
        self.page("Emulation.setScriptExecutionDisabled", value=not scripts)
        self.page("Emulation.setDeviceMetricsOverride", width=width_px, height=height_px,
                  deviceScaleFactor=1, mobile=mobile)
        seen = len(self.events)
        self.page("Page.navigate", url=uri)
        deadline = time.monotonic() + 60
        while not any(e.get("method") == "Page.loadEventFired" for e in self.events[seen:]):
            self.events.append(self._message(deadline))
        self.page("Emulation.setScriptExecutionDisabled", value=False)
        self.frames()

    def js(self, expression):
        result = self.page("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        assert "exceptionDetails" not in result, result["exceptionDetails"]
        return result["result"].get("value")

    def shot(self, selector=None):
        """A screenshot (RGB array) of the element matching ``selector``, or of the whole page."""
        if selector is None:
            box = self.js("({x: 0, y: 0, width: document.documentElement.scrollWidth,"
                          " height: document.documentElement.scrollHeight})")
        else:
            box = self.js(f"(() => {{ const r = document.querySelector('{selector}').getBoundingClientRect();"
                          " return {x: r.x + scrollX, y: r.y + scrollY, width: r.width, height: r.height}; })()")
        data = self.page("Page.captureScreenshot", format="png", captureBeyondViewport=True,
                         clip={**box, "scale": 1})["data"]
        return np.asarray(Image.open(io.BytesIO(base64.b64decode(data))).convert("RGB")), data

    def frames(self):
        """Wait for two painted frames (after a click or a drag)."""
        self.js("new Promise(r => requestAnimationFrame(() => requestAnimationFrame(r)))")

    def close(self):
        try:
            self.send("Browser.close", timeout=10)
        finally:
            self.proc.wait(timeout=30)
            os.close(self.out)
            os.close(self.inp)


def _problems(events):
    """Console errors and warnings, uncaught exceptions and browser log errors, as text."""
    found = []
    for e in events:
        p = e.get("params", {})
        if e.get("method") == "Runtime.consoleAPICalled" and p["type"] in ("error", "warning", "assert"):
            found.append(" ".join(str(a.get("value", a.get("description"))) for a in p["args"]))
        elif e.get("method") == "Runtime.exceptionThrown":
            found.append(p["exceptionDetails"].get("exception", {}).get("description", str(p)))
        elif e.get("method") == "Log.entryAdded" and p["entry"]["level"] in ("error", "warning"):
            found.append(p["entry"]["text"])
    return found


def _foreground(rgb):
    """Pixels that are neither white background nor near-white (anti-aliasing), as a mask."""
    return (rgb < 235).any(axis=2)


def _keep(png_base64, path):
    """Write a screenshot to ``path``, and a copy into $HOPWELL_ARTEFACTS when it is set."""
    path.write_bytes(base64.b64decode(png_base64))
    if os.environ.get("HOPWELL_ARTEFACTS"):
        kept = os.path.join(os.environ["HOPWELL_ARTEFACTS"], path.name)
        os.makedirs(os.environ["HOPWELL_ARTEFACTS"], exist_ok=True)
        shutil.copyfile(path, kept)
        return kept
    return str(path)


def _read(path):
    """A PDB or SDF state file as RDKit reads it, hydrogens kept."""
    from rdkit import Chem

    return (Chem.MolFromPDBFile if path.suffix == ".pdb" else Chem.MolFromMolFile)(str(path), removeHs=False)


def _atoms(path):
    """Atoms in a state file."""
    return _read(path).GetNumAtoms()


def _hydrogens(path):
    """Hydrogen atoms in a state file."""
    return sum(a.GetAtomicNum() == 1 for a in _read(path).GetAtoms())


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    assert CHROMIUM is not None, "CI must provide chromium"
    run_dir = tmp_path_factory.mktemp("browser") / "run"
    result = CliRunner().invoke(main, ["run", "CCCC", "-o", str(run_dir), "--samples", "300",
                                       "--training-cycles", "10", "--langevin-steps", "50",
                                       "--proposals", "4", "--seeds", "3"])
    assert result.exit_code == 0, result.output
    assert CliRunner().invoke(main, ["report", str(run_dir)]).exit_code == 0
    return run_dir / "report.html"


def test_page_carries_its_plots_and_viewer(report):
    html = report.read_text()
    # Every embedded plot is a decodable PNG with real content (Pillow as the reference decoder).
    images = re.findall(r'id="([a-z-]+)" alt="[^"]*" src="data:image/png;base64,([^"]+)"', html)
    assert {name for name, _ in images} == {"population-plot", "torsion-plot", "running-plot", "acceptance-plot"}
    for _, data in images:
        pixels = np.asarray(Image.open(io.BytesIO(base64.b64decode(data))).convert("L"))
        assert pixels.shape[0] > 100 and pixels.std() > 10
    # The viewer library is inlined unchanged, so the page works offline. Its source holds URLs
    # in comments and in loaders the page never calls, so "no http:// in the page" cannot hold;
    # no attribute points off the machine, and the browser test below watches every request.
    assert f"<script>{viewer_script()}</script>" in html
    assert not re.search(r'\b(src|href)\s*=\s*"(https?:)?//', html)
    # One structure per populated state, written by the report (state-K.sdf), shown in the page.
    data = json.loads(re.search(r'id="structure-data">(.*?)</script>', html, re.DOTALL)[1])
    files = sorted(report.parent.glob("state-*.sdf"))
    assert len(data) == len(files) >= 2
    assert all(entry["format"] == "sdf" and entry["text"].count("\n") > 14 for entry in data)


def test_report_renders_in_headless_chromium(report, tmp_path):
    browser = Browser(tmp_path / "profile")
    try:
        browser.open(report.as_uri(), 1280)
        assert browser.js("document.getElementById('verdict').compareDocumentPosition("
                          "document.getElementById('populations')) & Node.DOCUMENT_POSITION_FOLLOWING")
        assert browser.js("document.querySelectorAll('#populations tr').length") >= 3  # header + states
        assert browser.js("document.documentElement.scrollWidth") <= 1280
        # The drawing: the SVG image decoded and painted with dark lines on white.
        assert browser.js("document.getElementById('molecule-drawing').naturalWidth") > 0
        drawing, _ = browser.shot("#molecule-drawing")
        assert _foreground(drawing).mean() > 0.01
        # The 3D view: 3Dmol's canvas, the still image hidden, state colours painted.
        assert browser.js("document.querySelector('#structure-viewer canvas').width") > 100
        assert browser.js("document.getElementById('structure-still').hidden")
        # What 3Dmol parsed: every atom of the state file, hydrogens included.
        state_file = sorted(report.parent.glob("state-*.sdf"))[0]
        assert browser.js("document.getElementById('structure-count').textContent") == (
            f"{_atoms(state_file)} atoms per structure, {_hydrogens(state_file)} of them hydrogens")
        before, _ = browser.shot("#structure-viewer")
        assert _foreground(before).mean() > 0.02
        # The most populated state's carbons are #4c78a8 (viewer.STATE_COLOURS[0]); lit, not exact.
        blue = (before[..., 2].astype(int) - before[..., 0] > 40).mean()
        assert blue > 0.002
        _, page_png = browser.shot()
        wide = _keep(page_png, tmp_path / "report-1280.png")
        # A mouse drag turns the molecule: the picture changes.
        x, y = browser.js("(() => { const c = document.querySelector('#structure-viewer canvas');"
                          " c.scrollIntoView(); const r = c.getBoundingClientRect();"
                          " return [r.x + r.width / 2, r.y + r.height / 2]; })()")
        browser.page("Input.dispatchMouseEvent", type="mousePressed", x=x, y=y, button="left", clickCount=1)
        for step in range(1, 11):
            browser.page("Input.dispatchMouseEvent", type="mouseMoved", x=x + 12 * step, y=y + 4 * step,
                         button="left", buttons=1)
        browser.page("Input.dispatchMouseEvent", type="mouseReleased", x=x + 120, y=y + 40, button="left",
                     clickCount=1)
        browser.frames()
        after, _ = browser.shot("#structure-viewer")
        assert (np.abs(after.astype(int) - before).max(axis=2) > 30).mean() > 0.005
        # "reset view" turns it back to the opening picture.
        browser.js("document.getElementById('structure-reset').click()")
        browser.frames()
        reset, _ = browser.shot("#structure-viewer")
        assert (np.abs(reset.astype(int) - before).max(axis=2) > 30).mean() < 0.001
        # Unticking the most populated state takes its colour out of the picture.
        browser.js("document.querySelector('#structure-states input[data-rank=\"0\"]').click()")
        browser.frames()
        unticked, _ = browser.shot("#structure-viewer")
        assert (unticked[..., 2].astype(int) - unticked[..., 0] > 40).mean() < blue / 4
        # A phone: nothing wider than the window (tables scroll inside their own box), and the
        # drawing and the 3D view still painted.
        browser.open(report.as_uri(), PHONE_PX, 844, mobile=True)
        assert browser.js("innerWidth") == PHONE_PX
        assert browser.js("document.documentElement.scrollWidth") <= PHONE_PX
        # Every element's right edge, except inside a table's scrolling box (the box itself counts).
        assert browser.js("Math.max(...[...document.body.querySelectorAll('*')]"
                          ".filter(e => !e.parentElement.closest('.scroll'))"
                          ".map(e => e.getBoundingClientRect().right))") <= PHONE_PX
        assert browser.js("getComputedStyle(document.querySelector('.scroll')).overflowX") == "auto"
        drawing, _ = browser.shot("#molecule-drawing")
        assert _foreground(drawing).mean() > 0.01
        # The canvas's size on the page, in CSS pixels (its backing store may be larger).
        canvas = browser.js("(() => { const r = document.querySelector('#structure-viewer canvas')"
                            ".getBoundingClientRect(); return [r.width, r.height]; })()")
        assert 200 < canvas[0] <= PHONE_PX and canvas[1] > 150
        small, _ = browser.shot("#structure-viewer")
        assert _foreground(small).mean() > 0.02
        _, phone_png = browser.shot()
        phone = _keep(phone_png, tmp_path / f"report-{PHONE_PX}.png")
        print(f"screenshots: {wide} {phone}")
        # Scripts off: the still image of the structures is what the reader sees.
        browser.open(report.as_uri(), 1280, scripts=False)
        assert browser.js("document.getElementById('structure-still').offsetHeight") > 100
        assert browser.js("document.getElementById('structure-image').naturalWidth") > 0
        assert browser.js("document.querySelector('#structure-viewer canvas')") is None
        still, _ = browser.shot("#structure-image")
        assert _foreground(still).mean() > 0.01
        requests = [e["params"]["request"]["url"] for e in browser.events
                    if e.get("method") == "Network.requestWillBeSent"]
    finally:
        browser.close()
    assert requests and all(url.split(":", 1)[0] in ("file", "data", "blob") for url in requests), requests
    assert _problems(browser.events) == []


@pytest.fixture(scope="module")
def peptide_report(tmp_path_factory):
    """A very short ACE-ALA-NME run (amber14, PDB state files) and its report."""
    run_dir = tmp_path_factory.mktemp("browser-peptide") / "run"
    result = CliRunner().invoke(main, ["run", "systems/ace_ala_nme.pdb", "-o", str(run_dir), "--samples", "100",
                                       "--training-cycles", "5", "--langevin-steps", "20", "--proposals", "4"])
    assert result.exit_code == 0, result.output
    assert CliRunner().invoke(main, ["report", str(run_dir)]).exit_code == 0
    return run_dir / "report.html"


def _pixels(browser, hydrogens):
    """The viewer's picture with the hydrogen choice set to ``hydrogens``."""
    browser.js(f"(() => {{ const s = document.getElementById('structure-hydrogens'); s.value = '{hydrogens}';"
               " s.dispatchEvent(new Event('change', {bubbles: true})); })()")
    browser.frames()
    return _foreground(browser.shot("#structure-viewer")[0])


def test_peptide_hydrogens_are_drawn(peptide_report, tmp_path):
    files = sorted(peptide_report.parent.glob("state-*.pdb"))
    assert files, "a peptide run writes its state structures as PDB"
    total = _hydrogens(files[0])
    # ACE-ALA-NME: CH3 of ACE (3), N-H, C-H and CH3 of ALA (5), N-H and CH3 of NME (4).
    assert total == 12
    browser = Browser(tmp_path / "profile")
    try:
        browser.open(peptide_report.as_uri(), 1280)
        # The count is what 3Dmol parsed: without keepH its PDB reader would drop every hydrogen.
        count = browser.js("document.getElementById('structure-count').textContent")
        assert re.fullmatch(r"\d+ atoms per structure, (\d+) of them hydrogens", count)[1] == str(total) != "0"
        every, polar, none = (_pixels(browser, h) for h in ("all", "polar", "none"))
        # Fewer painted pixels as hydrogens go; polar-only keeps the two N-H sticks.
        assert every.mean() > polar.mean() > none.mean() > 0.01
        assert (every & ~none).mean() > 0.005
        _pixels(browser, "all")
        _, page_png = browser.shot()
        print(f"screenshot: {_keep(page_png, tmp_path / 'peptide-report-1280.png')}")
    finally:
        browser.close()
    assert _problems(browser.events) == []
