"""Render a run's report.html in a real headless browser and check the screenshot.

Uses Debian's chromium when it is installed (``.ci/run`` installs it); the test
is skipped, saying why, when no browser is found.
"""

from __future__ import annotations

import shutil
import struct
import subprocess
from pathlib import Path

import pytest

from conduct.cli import main
from conduct.presets import write_study
from conduct.simulate import SimulationSpec

BROWSER = next((b for b in ("chromium", "chromium-browser", "google-chrome")
                if shutil.which(b)), None)


@pytest.mark.skipif(BROWSER is None, reason="no headless chromium installed (apt-get install "
                    "chromium); .ci/run installs it")
def test_report_renders_in_headless_browser(tmp_path):
    study = write_study(tmp_path / "s", SimulationSpec(markets=12, periods=16, seed=5))
    assert main(["estimate", str(study), "--quiet", "--label", "browser"]) == 0
    report = study.parent / "runs" / "browser" / "report.html"
    shot = tmp_path / "report.png"
    assert BROWSER is not None
    proc = subprocess.run(
        [BROWSER, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
         "--window-size=1200,2400", f"--screenshot={shot}", report.as_uri()],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    data = Path(shot).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", data[16:24])
    assert (width, height) == (1200, 2400)
    # a blank page compresses to almost nothing; a rendered report does not
    assert len(data) > 50_000
