"""The report in a real browser: headless Chromium driven over the W3C WebDriver protocol
(chromedriver, plain HTTP from the standard library: no extra Python package).

Skipped, with the reason, where Chromium or chromedriver is not installed; ``.ci/run`` installs
Debian's ``chromium`` and ``chromium-driver`` so that CI always runs it.  The screenshot goes to
pytest's temporary folder, never into git.
"""
import base64
import json
import shutil
import socket
import subprocess
import time
import urllib.request

import numpy as np
import pytest

from edges.io import write_micrograph
from edges.render import SEMSettings
from roughness.app.comparing import compare
from roughness.app.settings import MeasureSettings
from roughness.synth import simulate_line_space

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")
DRIVER = shutil.which("chromedriver")
pytestmark = pytest.mark.skipif(not (CHROMIUM and DRIVER),
                                reason="headless Chromium and chromedriver are not installed "
                                       "(Debian: apt-get install chromium chromium-driver; .ci/run does this)")
WIDTH, HEIGHT = 1280, 900


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _Driver:
    def __init__(self, port):
        self.base = f"http://127.0.0.1:{port}"
        caps = {"capabilities": {"alwaysMatch": {
            "browserName": "chrome", "goog:loggingPrefs": {"browser": "ALL"},
            "goog:chromeOptions": {"binary": CHROMIUM, "args": [
                "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--disable-dev-shm-usage", f"--window-size={WIDTH},{HEIGHT}"]}}}}
        self.session = self.call("POST", "/session", caps)["sessionId"]

    def call(self, method, path, body=None):
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.base + path, data=data, method=method,
                                     headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=60) as r:
            return json.loads(r.read())["value"]

    def s(self, method, path, body=None):
        return self.call(method, f"/session/{self.session}{path}", body)

    def run(self, script):
        return self.s("POST", "/execute/sync", {"script": script, "args": []})


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    rng = np.random.default_rng(5)
    root = tmp_path_factory.mktemp("browser")
    groups = {}
    for name, dose in (("low-dose", 40), ("high-dose", 400)):
        files = []
        for i in range(2):
            pixels, _ = simulate_line_space(n_rows=256, n_cols=320, pitch_nm=40, cd_nm=20, sigma_nm=1.0,
                                            correlation_length_nm=8, roughness_exponent=0.6,
                                            settings=SEMSettings(dose_per_pixel=dose, blur_nm=2.0), rng=rng)
            files.append(write_micrograph(root / f"{name}_{i}.tif", pixels, pixel_size_nm=1.0))
        groups[name] = files
    compare(groups, settings=MeasureSettings(n_resamples=100, model_resamples=0), out=root / "out")
    return root / "out" / "report.html"


@pytest.fixture(scope="module")
def browser():
    port = _free_port()
    proc = subprocess.Popen([DRIVER, f"--port={port}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(100):
            try:
                urllib.request.urlopen(f"http://127.0.0.1:{port}/status", timeout=1)
                break
            except OSError:
                time.sleep(0.1)
        d = _Driver(port)
        yield d
        d.call("DELETE", f"/session/{d.session}")
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_report_loads_cleanly_in_chromium(report, browser, tmp_path):
    browser.s("POST", "/url", {"url": report.as_uri()})
    assert browser.run("return document.readyState") == "complete"
    png = base64.b64decode(browser.s("GET", "/screenshot"))
    (tmp_path / "report.png").write_bytes(png)
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000
    # no console errors (the sortable table's script included)
    log = browser.s("POST", "/se/log", {"type": "browser"})
    assert [e for e in log if e.get("level") == "SEVERE"] == []
    # no network request: every resource is inline (data: images are not fetched)
    assert browser.run("return performance.getEntriesByType('resource').map(e => e.name)") == []
    # every figure decodes
    images = browser.run("return Array.from(document.images).map(i => [i.complete, i.naturalWidth])")
    assert len(images) >= 6 and all(ok and w > 100 for ok, w in images)
    # the verdict box is on the first screen
    box = browser.run("var r = document.getElementById('verdict').getBoundingClientRect();"
                      "return [r.top, r.bottom, window.innerHeight]")
    assert 0 <= box[0] and box[1] <= box[2]
    # the images table sorts when a heading is clicked
    order = browser.run("var t = document.querySelector('table.sortable'); t.tHead.rows[0].cells[4].click();"
                        "return Array.from(t.tBodies[0].rows).map(r => parseFloat(r.cells[4].textContent))")
    assert order == sorted(order)
