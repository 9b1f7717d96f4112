"""The report in a real browser (headless Chromium): it loads without console errors, every
figure is laid out with a size, and the numbers the browser shows are the CSV's.

Skipped, with the reason, when no Chromium is installed (``.ci/run`` installs one). The
screenshot is kept: in ``$DROMOS_TEST_ARTIFACTS`` when set, else in the test's temp folder.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from cohort.report.build import _drop_fully_withheld
from cohort.report.tables import load_csv

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "chrome")

# The harness loads the report in a frame and writes what the browser laid out into its own
# page as JSON, which --dump-dom then prints.
HARNESS = """<!DOCTYPE html><html><body><pre id="result">pending</pre>
<iframe id="page" src="REPORT" style="width:1280px;height:2000px"></iframe>
<script>
document.getElementById("page").addEventListener("load", function () {
  var doc = this.contentDocument, out = {figures: [], tables: {}, title: doc.title};
  doc.querySelectorAll("figure[data-figure]").forEach(function (f) {
    var svg = f.querySelector("svg"), box = svg ? svg.getBoundingClientRect() : {width: 0, height: 0};
    out.figures.push({name: f.dataset.figure, width: box.width, height: box.height,
                      marks: svg ? svg.querySelectorAll("path, use, rect, text").length : 0});
  });
  doc.querySelectorAll("table[data-source]").forEach(function (t) {
    out.tables[t.dataset.source] = Array.from(t.tBodies[0].rows).map(function (r) {
      return Array.from(r.cells).map(function (c) { return c.textContent; });
    });
  });
  document.getElementById("result").textContent = JSON.stringify(out);
});
</script></body></html>
"""


def find_browser() -> str | None:
    return next((path for name in BROWSERS if (path := shutil.which(name))), None)


def browser_args(browser: str, profile: Path) -> list[str]:
    return [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            f"--user-data-dir={profile}", "--allow-file-access-from-files",
            "--enable-logging=stderr", "--v=0"]


def artifacts_dir(tmp_path: Path) -> Path:
    folder = Path(os.environ.get("DROMOS_TEST_ARTIFACTS", tmp_path))
    folder.mkdir(parents=True, exist_ok=True)
    return folder


@pytest.fixture(scope="module")
def browser() -> str:
    path = find_browser()
    if path is None:
        pytest.skip("no Chromium on PATH: install it (e.g. apt-get install chromium) to run the "
                    "browser test of the report")
    return path


def console_errors(stderr: str) -> list[str]:
    """Console messages of level error (uncaught exceptions, failed resource loads)."""
    return [line for line in stderr.splitlines()
            if "CONSOLE" in line and re.search(r"Uncaught|Failed to load|Error", line)]


@pytest.mark.parametrize("run", ["prevalence", "pacemaker", "site_quality"])
def test_report_renders_in_chromium(report_runs, browser, tmp_path, run):
    folder = report_runs[run]
    harness = folder.parent / f"harness_{run}.html"
    harness.write_text(HARNESS.replace("REPORT", f"{run}/report.html"), encoding="utf-8")
    done = subprocess.run([*browser_args(browser, tmp_path / "profile"), "--virtual-time-budget=20000",
                           "--dump-dom", harness.as_uri()], capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr[-2000:]
    assert not console_errors(done.stderr)
    found = re.search(r'<pre id="result">(.*?)</pre>', done.stdout, re.S)
    assert found and found[1] != "pending", "the report did not finish loading in the browser"
    laid_out = json.loads(found[1].replace("&amp;", "&").replace("&lt;", "<").replace("&gt;", ">")
                          .replace("&quot;", '"'))
    figure_files = sorted(p.name.removesuffix(".data.csv") for p in (folder / "figures").glob("*.data.csv"))
    assert sorted(f["name"] for f in laid_out["figures"]) == figure_files
    for figure in laid_out["figures"]:
        assert figure["width"] > 200 and figure["height"] > 100, figure
        assert figure["marks"] > 10, figure
    for source, rows in laid_out["tables"].items():
        frame = load_csv(folder / source)
        if source.startswith("tables/"):
            frame, _omitted = _drop_fully_withheld(frame)
        assert rows == [list(r) for r in frame.head(len(rows)).iter_rows()], source
        assert len(rows) == min(frame.height, 4000), source
    shot = artifacts_dir(tmp_path) / f"report-{run}.png"
    subprocess.run([*browser_args(browser, tmp_path / "profile"), "--window-size=1280,2400",
                    f"--screenshot={shot}", (folder / "report.html").as_uri()],
                   capture_output=True, timeout=180, check=True)
    assert shot.stat().st_size > 20_000  # a page with content, not a blank frame
