"""The audit report as a browser shows it: rendered by headless Chromium (Debian's chromium package,
which .ci/run installs), from a file:// URL with the network off, and the screenshot checked.

The screenshot, saved in the test's tmp_path, must not be blank and must show the map (the zone
outlines' orange and the darkest blue of the share colormap, on its colour bar) and the bars (the
claim line's red and the population bars' green): colours that only those pictures use
(areamc.plots).  Elsewhere (no /usr/bin/chromium) the test is skipped and says why.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest

from areamc import plots, report
from test_report import build_views, colour_present, read_png, write_county

CHROMIUM = Path("/usr/bin/chromium")

pytestmark = pytest.mark.skipif(
    not CHROMIUM.exists(),
    reason="the report's rendering is checked with Debian's chromium at /usr/bin/chromium, which is not "
    "installed here (.ci/run installs it with apt-get)")


def screenshot(html: Path, folder: Path) -> Path:
    """A 1200 x 2400 screenshot of `html` by headless Chromium (no GPU, no network use beyond loopback)."""
    shot = folder / "shot.png"
    profile = folder / "chromium-profile"
    profile.mkdir()
    argv = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--disable-extensions", "--hide-scrollbars", f"--user-data-dir={profile}", f"--screenshot={shot}",
            "--window-size=1200,2400", html.as_uri()]
    done = subprocess.run(argv, capture_output=True, text=True, timeout=120)
    assert shot.exists(), f"chromium wrote no screenshot (exit {done.returncode}): {done.stderr[-2000:]}"
    return shot


def test_report__in_headless_chromium__shows_the_map_and_the_bars(tmp_path):
    views, claims = build_views(write_county(tmp_path))
    coverage = [v for v in views if v.kind == "coverage"]  # its map and bars come first on the page
    page = tmp_path / "report.html"
    page.write_text(report.render_report("audit", coverage, claims=claims), encoding="utf-8")
    pixels = read_png(screenshot(page, tmp_path).read_bytes())
    assert pixels.shape[:2] == (2400, 1200)
    assert pixels[..., :3].std() > 0.05, "the screenshot is blank"
    assert colour_present(pixels, plots.ZONE_COLOUR), "no zone outline: the map is not shown"
    assert colour_present(pixels, plots.DARKEST_BLUE), "no darkest blue: the map's colour bar is not shown"
    assert colour_present(pixels, plots.CLAIM_COLOUR), "no claim line: the bars are not shown"
    assert colour_present(pixels, plots.POPULATION_BAR), "no population bars"
