"""The report page rendered by a real browser: headless Chromium (Debian's `chromium`).

Skipped only where no Chromium is installed; CI installs it (.ci/run) and sets
SNAPLIFT_REQUIRE_CHROMIUM=1, which turns the skip into a failure.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest

from snaplift.report.page import MARKER, report_folder

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def _chromium(profile: Path, *arguments: str) -> subprocess.CompletedProcess:
    profile.mkdir(parents=True, exist_ok=True)
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *arguments], capture_output=True,
                          text=True, timeout=180, check=False)


@pytest.fixture()
def chromium() -> str:
    if CHROMIUM is None:
        if os.environ.get("SNAPLIFT_REQUIRE_CHROMIUM") == "1":
            pytest.fail("Chromium is required here (SNAPLIFT_REQUIRE_CHROMIUM=1) but not installed")
        pytest.skip("no chromium installed (apt-get install chromium)")
    return CHROMIUM


def test_report_renders_in_a_browser(wave_stores: dict[str, Path], tmp_path: Path, chromium: str) -> None:
    # the page the run's report stage wrote next to the store (tests/conftest.py, wave_stores)
    index = report_folder(wave_stores["rank6"]) / "index.html"
    figures = json.loads((index.parent / MARKER).read_text())["figures"]
    url = index.resolve().as_uri()
    dom = _chromium(tmp_path / "profile-dom", "--virtual-time-budget=10000", "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    # the page's own script counts images with naturalWidth > 0 after the load event
    found = re.search(r"images decoded: (\d+) of (\d+)", dom.stdout)
    assert found, dom.stdout[-2000:]
    decoded, total = int(found.group(1)), int(found.group(2))
    assert total == len(figures) >= 7 and decoded == total
    shot = tmp_path / "screenshot.png"
    done = _chromium(tmp_path / "profile-shot", "--window-size=1280,2000", f"--screenshot={shot}",
                     "--virtual-time-budget=10000", url)
    assert done.returncode == 0 and shot.is_file(), done.stderr[-2000:]
    pixels = matplotlib.image.imread(shot)[..., :3]
    # not blank: many distinct colours, and a good share of pixels away from the page background
    assert pixels.shape[:2] == (2000, 1280)
    background = np.array([0xfb, 0xfa, 0xf7]) / 255
    away = np.mean(np.abs(pixels - background).sum(axis=-1) > 0.1)
    assert away > 0.05, away
    assert len(np.unique((pixels * 255).astype(np.uint8).reshape(-1, 3), axis=0)) > 200
