"""The report as a reader sees it: rendered by headless Chromium (Debian's ``chromium`` package).

A copy of the page gets a small script run at the load event that records, on the <body>, how many
images there are, which did not load (not complete or no natural width), the page height and the
section titles; ``--dump-dom`` returns the DOM after it ran. A page with a broken image is checked the same
way to show that the check can fail. A full-page screenshot must be a non-blank PNG of the page's height.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from .conftest import page_tables
from .test_report_page import SECTIONS, shown_equals

pytestmark = [pytest.mark.browser, pytest.mark.filterwarnings("ignore:The inplace keyword")]

CHECK = """<script>
window.addEventListener("load", () => {
  const images = Array.from(document.images);
  const broken = images.filter(i => !(i.complete && i.naturalWidth > 0)).map(i => i.alt);
  const b = document.body;
  b.setAttribute("data-images", String(images.length));
  b.setAttribute("data-broken", JSON.stringify(broken));
  b.setAttribute("data-height", String(document.documentElement.scrollHeight));
  b.setAttribute("data-sections", Array.from(document.querySelectorAll("section")).map(s => s.id).join(" "));
});
</script>"""


@pytest.fixture(scope="module")
def chromium():
    path = shutil.which("chromium")
    if path is None:
        pytest.skip("chromium is not installed and could not be installed here (Debian package `chromium`; "
                    ".ci/run installs it with apt-get where apt-get is available)")
    return path


def _run(chromium: str, profile, *args: str) -> subprocess.CompletedProcess:
    cmd = [chromium, "--headless", "--disable-gpu", "--hide-scrollbars", "--no-first-run",
           f"--user-data-dir={profile}", *args]
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        cmd.insert(2, "--no-sandbox")          # Chromium refuses to run as root inside its sandbox
    return subprocess.run(cmd, capture_output=True, text=True, timeout=180)


def _checked_dom(chromium: str, tmp_path, html: str) -> tuple[dict, str]:
    page = tmp_path / "checked.html"
    page.write_text(html.replace("</body>", CHECK + "</body>"))
    done = _run(chromium, tmp_path / "profile", "--virtual-time-budget=10000", "--dump-dom", page.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", done.stdout)
    assert body, done.stdout[:500]
    attrs = dict(re.findall(r'(data-[a-z]+)="([^"]*)"', body.group(1)))
    return attrs, done.stdout


def test_every_image_loads_and_every_section_renders(written, chromium, tmp_path):
    run, _, html = written
    attrs, dom = _checked_dom(chromium, tmp_path, html)
    assert attrs["data-images"] == str(html.count("<img "))
    assert json.loads(attrs["data-broken"].replace("&quot;", '"')) == []
    assert attrs["data-sections"].split() == SECTIONS
    rows = page_tables(dom)["tables/ranking.csv"]                   # the numbers as rendered
    ranking = pd.read_csv(run / "ranking.csv")
    assert [r["structure"] for r in rows] == list(ranking["structure"])
    for row, (_, r) in zip(rows, ranking.iterrows()):
        for col in ("elpd", "se", "elpd_diff", "se_diff", "weight", "mcse", "rmse", "r2", "max_khat"):
            assert shown_equals(row[col], r[col]), (col, row[col], r[col])


def test_the_image_check_catches_a_broken_image(written, chromium, tmp_path):
    _, _, html = written
    broken = html.replace('src="data:image/png;base64,', 'src="data:image/png;base64,AAAA', 1)
    attrs, _ = _checked_dom(chromium, tmp_path, broken)
    assert json.loads(attrs["data-broken"].replace("&quot;", '"')) == [
        "Ranking of the structures by elpd difference to the best"]


def test_full_page_screenshot_is_a_page_not_a_blank(written, chromium, tmp_path):
    _, path, html = written
    attrs, _ = _checked_dom(chromium, tmp_path, html)
    height = int(attrs["data-height"])
    assert 3000 < height < 30000
    shot = tmp_path / "report.png"
    done = _run(chromium, tmp_path / "profile2", f"--screenshot={shot}", f"--window-size=1240,{height}",
                path.as_uri())
    assert done.returncode == 0 and shot.exists(), done.stderr[-2000:]
    image = Image.open(shot)
    assert image.format == "PNG" and image.size == (1240, height)
    pixels = np.asarray(image.convert("RGB"))
    inked = (pixels < 235).any(axis=2)
    assert inked.mean() > 0.02                                        # text, tables and figures, not a blank
    packed = pixels.reshape(-1, 3).astype(np.int32) @ np.array([1 << 16, 1 << 8, 1], np.int32)
    assert np.unique(packed).size > 200                               # anti-aliased text and figure colours
    assert inked[-height // 8:].any()                                 # the last section is drawn too
    blue = np.all(np.abs(pixels.astype(int) - [0, 114, 178]) < 8, axis=2)
    assert blue.sum() > 100                                           # the figures' Okabe-Ito blue is on the page
