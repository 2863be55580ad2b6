"""The report in a real browser: headless Chromium loads every image, shows the tables, logs no error.

A copy of the page gets a small probe script as the first element of its
head; after the load event the probe writes what it saw (images and their
natural width, tables, errors caught from ``window.onerror``, failed resource
loads and ``console.error``) into the DOM, which Chromium prints with
``--dump-dom``.  Chromium's own log of console messages is checked as well.
The report itself carries no script.

Chromium is Debian's ``chromium`` package (``.ci/run`` installs it when it is
missing and apt-get is available).  Without a browser these tests are skipped
with a reason that says so.
"""

import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

from _fan_data import (synthetic_fan, synthetic_gate_map, synthetic_gate_result,
                        synthetic_result)
from fanmap import report as R

pytestmark = pytest.mark.browser

_PROBE = """<script>
(function () {
  var errors = [];
  var original = console.error;
  console.error = function () {
    errors.push("console.error: " + Array.prototype.slice.call(arguments).join(" "));
    original.apply(console, arguments);
  };
  window.addEventListener("error", function (event) {
    var target = event.target || {};
    errors.push(event.message ? "error: " + event.message
                : "failed to load: " + (target.src || target.href || target.tagName));
  }, true);
  window.addEventListener("load", function () {
    var images = Array.prototype.slice.call(document.images);
    var out = {
      images: images.length,
      broken: images.filter(function (i) { return !(i.complete && i.naturalWidth > 0); })
                    .map(function (i) { return i.alt || i.src.slice(0, 40); }),
      tables: document.querySelectorAll("table").length,
      rows: document.querySelectorAll("tbody tr").length,
      headings: Array.prototype.slice.call(document.querySelectorAll("h2"))
                     .map(function (h) { return h.textContent; }),
      errors: errors
    };
    var pre = document.createElement("pre");
    pre.id = "fanmap-probe";
    pre.textContent = JSON.stringify(out);
    document.body.appendChild(pre);
  });
})();
</script>
"""


def _find_chromium():
    candidates = [os.environ.get("FANMAP_CHROMIUM"), "/usr/bin/chromium",
                  shutil.which("chromium"), shutil.which("chromium-browser")]
    for path in candidates:
        if path and os.path.isfile(path) and os.access(path, os.X_OK):
            return path
    return None


@pytest.fixture(scope="module")
def chromium():
    path = _find_chromium()
    if path is None:
        pytest.skip("BROWSER TEST NOT RUN: no Chromium found (/usr/bin/chromium, $PATH or "
                    "$FANMAP_CHROMIUM); install Debian's 'chromium' package (.ci/run does so "
                    "when apt-get is available)")
    return path


def render(chromium, page):
    """Load ``page`` (a copy with the probe) in headless Chromium; return (probe dict, console lines)."""
    page = Path(page)
    probed = page.with_name(f".probe-{page.name}")
    text = page.read_text(encoding="utf-8")
    probed.write_text(text.replace("<head>", "<head>\n" + _PROBE, 1), encoding="utf-8")
    profile = tempfile.mkdtemp(prefix="fanmap-chromium-")
    command = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
               "--enable-logging=stderr", "--v=0", "--virtual-time-budget=10000",
               "--dump-dom", probed.resolve().as_uri()]
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
        probed.unlink(missing_ok=True)
    match = re.search(r'<pre id="fanmap-probe">(.*?)</pre>', done.stdout, re.S)
    assert match, f"Chromium printed no probe result (exit {done.returncode}):\n{done.stderr[-3000:]}"
    probe = json.loads(match.group(1).replace("&quot;", '"').replace("&amp;", "&")
                       .replace("&lt;", "<").replace("&gt;", ">"))
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    return probe, console


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    out = tmp_path_factory.mktemp("browser")
    ds, result = synthetic_fan(n_field=16, n_gate=61), synthetic_result()
    page = R.write_fan_outputs(out / "maps" / "demo", ds, result)["report.html"]
    rows = [{"device": "demo", "cooldown": "1", "map": "demo", "status": "ok",
             "density_per_volt": result.density_per_volt,
             "density_per_volt_stderr": result.density_per_volt_stderr,
             "zero_density_voltage": result.zero_density_voltage,
             "zero_density_voltage_stderr": result.zero_density_voltage_stderr}]
    index = R.write_batch_report(out, rows, [page])
    return page, index


def test_map_report_renders_in_chromium(chromium, outputs):
    page, _ = outputs
    probe, console = render(chromium, page)
    assert probe["images"] == 5 and probe["broken"] == []
    assert probe["tables"] >= 4 and probe["rows"] > 20
    for heading in ("Calibration", "Warnings", "Figures", "States", "Cautions"):
        assert heading in probe["headings"]
    assert probe["errors"] == []
    assert console == []


def test_batch_index_renders_in_chromium(chromium, outputs):
    _, index = outputs
    probe, console = render(chromium, index)
    assert probe["images"] == 1 and probe["broken"] == []
    assert probe["tables"] == 1 and probe["rows"] == 1
    assert probe["errors"] == [] and console == []


def test_probe_sees_a_broken_page(chromium, tmp_path):
    # The check itself must be able to fail: a missing image and a script error are caught.
    page = tmp_path / "broken.html"
    page.write_text("<!DOCTYPE html><html><head><title>x</title></head><body><table></table>"
                    '<img src="missing.png" alt="gone"><script>notDefined();</script>'
                    "</body></html>", encoding="utf-8")
    probe, console = render(chromium, page)
    assert probe["broken"] == ["gone"]
    assert any("notDefined" in e for e in probe["errors"])
    assert any("failed to load" in e and "missing.png" in e for e in probe["errors"])
    assert console


def test_gate_report_renders_in_chromium(chromium, tmp_path):
    from fanmap.gatemap import to_density_displacement

    maps = [synthetic_gate_map(0.0), synthetic_gate_map(2.0)]
    result = synthetic_gate_result()
    page = R.write_gate_outputs(tmp_path, maps, result,
                                to_density_displacement(maps[0], result))["report.html"]
    probe, console = render(chromium, page)
    assert probe["images"] == 2 and probe["broken"] == []
    assert probe["tables"] >= 2 and "Calibration" in probe["headings"]
    assert probe["errors"] == [] and console == []
