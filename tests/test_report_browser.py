"""The demo's report opened in headless Chromium: every figure loads, the planted effect is listed.

Chromium is Debian's package (``.ci/run`` installs it when absent). The report itself holds no
script; the test adds one to a copy so that the browser writes what it sees into the page,
which ``--dump-dom`` then prints.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import pytest

from glmeeg.testing import HANG_TIMEOUT

CHECK = """<script>
window.addEventListener("load", () => {
  const imgs = Array.from(document.images);
  const ok = imgs.filter(i => i.complete && i.naturalWidth > 0).length;
  const rows = Array.from(document.querySelectorAll("table tr")).map(r => r.innerText).join("\\n");
  const out = document.createElement("pre");
  out.id = "browser-check";
  out.textContent = "images " + imgs.length + " loaded " + ok + "\\n" + rows;
  document.body.appendChild(out);
});
</script>"""


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def test_demo_report_loads_every_figure_in_chromium(tmp_path):
    browser = _chromium()
    if browser is None:
        if os.environ.get("GLMEEG_REQUIRE_BROWSER"):
            pytest.fail("GLMEEG_REQUIRE_BROWSER is set but no chromium is on PATH")
        pytest.skip("Debian's chromium is not installed (.ci/run installs it)")
    from typer.testing import CliRunner

    from glmeeg.cli import app

    # The demo as a user runs it (fewer volunteers, to keep the suite short).
    demo = CliRunner().invoke(app, ["demo", str(tmp_path / "demo"), "--subjects", "12", "-q"])
    assert demo.exit_code == 0, demo.output
    page = (tmp_path / "demo" / "results" / "report.html").read_text(encoding="utf-8")
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", CHECK + "</body>"), encoding="utf-8")
    # Flags as the workplace's notes give them: no sandbox as root, no background networking
    # (the machine's network is closed), a fresh profile.
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=10000", "--dump-dom",
           probe.as_uri()]
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=HANG_TIMEOUT).stdout
    found = re.search(r'<pre id="browser-check">images (\d+) loaded (\d+)\n(.*?)</pre>', out, re.S)
    assert found, out[-2000:]
    total, loaded, rows = int(found.group(1)), int(found.group(2)), found.group(3)
    assert total >= 8 and loaded == total
    # The planted urgency effect (DEMO_TRUTH: centro-parietal, 300-550 ms) is a cluster table
    # row: header cells name the columns, each row's cells are tab-separated.
    from glmeeg.demo import DEMO_TRUTH

    lines = [ln.split("\t") for ln in rows.splitlines()]
    header = next(ln for ln in lines if "peak_channel" in ln)
    col = {name: i for i, name in enumerate(header)}
    clusters = [ln for ln in lines if len(ln) == len(header) and ln is not header
                and ln[col["significant"]] == "True"]
    assert any(ln[col["peak_channel"]] in DEMO_TRUTH.urgency.channels
               and 0.30 <= float(ln[col["peak_time"]]) <= 0.55 for ln in clusters), clusters
