"""`corral report`: one self-contained HTML file per run, opened in a real headless browser.

A tripped run (a sensor spike injected on the simulated rig) is reported; Chromium, run
headless, loads the file with the network off and dumps its DOM: every section must be
there and every image must have loaded (its naturalWidth > 0, read in the page by the
browser's own DOM). Each embedded data URI is decoded as a PNG by matplotlib's reader, an
image decoder we did not write. When no browser can be installed the browser check is
skipped with the reason; the PNG and section checks still run.
"""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess

import pytest
from matplotlib import image as mpimg
from runtime_helpers import run_unpaced

from runtime.cli.main import main as corral
from runtime.review.report import SECTIONS


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    _, summary = run_unpaced(folder, 2.5, faults=["spike@1.6"])
    assert summary["trips"], "precondition: the spike trips the run"
    out = folder / "run.html"
    assert corral(["report", summary["run_log"], "--out", str(out)]) == 0
    return out, summary


def _browser() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def test_the_report_has_every_section_and_its_images_are_pngs(report):
    out, summary = report
    text = out.read_text()
    for sid in SECTIONS:
        assert f'id="{sid}"' in text
    assert "http://" not in text and "https://" not in text  # nothing to fetch
    uris = re.findall(r'src="data:image/png;base64,([^"]+)"', text)
    assert len(uris) == 1 + len(summary["trips"])  # the margin plot and one per trip
    for b64 in uris:
        img = mpimg.imread(io.BytesIO(base64.b64decode(b64)), format="png")
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
    assert "tripped and stopped" in text and "jump" in text
    assert "innovation over the jump limit" in text  # what crossed, in words


def test_the_report_opens_in_a_headless_browser(report, tmp_path):
    out, summary = report
    browser = _browser()
    if browser is None:
        pytest.skip("no Chromium on this machine (apt-get install -y chromium to run this)")
    # A page that reports, in its own DOM, whether each image decoded.
    probe = out.read_text().replace(
        "</body>",
        "<script>window.addEventListener('load',()=>{const s=[...document.images].map("
        "i=>i.complete&&i.naturalWidth>0);const p=document.createElement('pre');"
        "p.id='probe';p.textContent=JSON.stringify({images:s,sections:[...document."
        "querySelectorAll('section')].map(x=>x.id)});document.body.appendChild(p);});"
        "</script></body>")
    page = tmp_path / "probe.html"
    page.write_text(probe)
    res = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu",
                          "--virtual-time-budget=5000", "--proxy-server=127.0.0.1:9",
                          "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, res.stderr[-2000:]
    m = re.search(r'<pre id="probe">(.*?)</pre>', res.stdout, re.S)
    assert m, "the page's load handler did not run"
    probe_out = json.loads(m.group(1).replace("&quot;", '"'))
    assert probe_out["sections"] == list(SECTIONS)
    assert probe_out["images"] and all(probe_out["images"])


def test_report_errors_are_one_line(tmp_path):
    import sys

    entry = "import sys; from runtime.cli.main import main; sys.exit(main())"
    res = subprocess.run([sys.executable, "-c", entry, "report", str(tmp_path / "nope.run")],
                         capture_output=True, text=True)
    assert res.returncode == 2 and "no run log" in res.stderr and "Traceback" not in res.stderr
    bad = tmp_path / "x.run"
    bad.write_bytes(b"\x01\x02")
    res = subprocess.run([sys.executable, "-c", entry, "report", str(bad)],
                         capture_output=True, text=True)
    assert res.returncode == 2 and "Traceback" not in res.stderr
