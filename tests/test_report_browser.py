"""The report in a real browser: headless Chromium (Debian's ``chromium`` package).

For a lot report and a unit report made by the real pipeline (tests/test_report.py's
generated lot, hostile names included), Chromium must load the page with no console
message at all (the page has no script, so any message is an error: a blocked fetch, a
Content-Security-Policy violation, a broken image), every image must decode to its
declared size and hold a drawing, and a screenshot is saved under the test's temp folder.

Console messages come from ``--enable-logging=stderr --v=0`` (lines with ``:CONSOLE``).
The images are checked in a test-only copy of the page with one inline script that, on
load, writes each image's natural size and the share of non-white pixels (read back
through a canvas) into the DOM; ``--dump-dom`` then shows it. Name resolution is mapped
to nothing, so a page that tried to fetch anything would fail loudly.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from pipeline.report import write_report
from test_report import HOSTILE_LOT, HOSTILE_UNIT, NAMES, Page, build_store

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

pytestmark = [pytest.mark.browser,
              pytest.mark.skipif(CHROMIUM is None, reason="needs headless Chromium "
                                 "(Debian: apt-get install chromium; .ci/run installs it)")]

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--host-resolver-rules=MAP * ~NOTFOUND",
         "--enable-logging=stderr", "--v=0")

PROBE = """<script>
window.addEventListener("load", () => {
  const found = [...document.images].map((img) => {
    const canvas = document.createElement("canvas");
    canvas.width = img.naturalWidth; canvas.height = img.naturalHeight;
    let ink = -1;
    if (img.naturalWidth > 0) {
      const ctx = canvas.getContext("2d");
      ctx.drawImage(img, 0, 0);
      const px = ctx.getImageData(0, 0, canvas.width, canvas.height).data;
      let dark = 0;
      for (let i = 0; i < px.length; i += 4) {
        if (px[i] < 235 || px[i + 1] < 235 || px[i + 2] < 235) dark++;
      }
      ink = dark / (px.length / 4);
    }
    return {complete: img.complete, width: img.naturalWidth, height: img.naturalHeight,
            declared: [Number(img.getAttribute("width")), Number(img.getAttribute("height"))], ink};
  });
  const out = document.createElement("pre");
  out.id = "probe";
  out.textContent = JSON.stringify(found);
  document.body.appendChild(out);
});
</script>"""


def run_chromium(tmp_path: Path, page: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / "chromium-profile"
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args, page.as_uri()],
                          capture_output=True, text=True, timeout=180)


def console_messages(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def probe_copy(page: Path, folder: Path) -> Path:
    """The page plus the probe script, with the policy widened to let that script run."""
    text = page.read_text(encoding="utf-8")
    text = text.replace("default-src 'none';", "default-src 'none'; script-src 'unsafe-inline';", 1)
    text = text.replace("</head>", PROBE + "</head>", 1)
    copy = folder / f"probe-{page.name}"
    copy.write_text(text, encoding="utf-8")
    return copy


@pytest.fixture(scope="module")
def reports(tmp_path_factory) -> dict[str, Path]:
    store = build_store(tmp_path_factory.mktemp("lot"), HOSTILE_LOT, NAMES)
    out = tmp_path_factory.mktemp("reports")
    return {"lot": write_report(store, out, unit_plots=3),
            "unit": write_report(store, out, dut=HOSTILE_UNIT)}


@pytest.mark.parametrize("kind", ["lot", "unit"])
def test_page_loads_without_console_messages_and_screenshot(reports, tmp_path, kind):
    from PIL import Image

    shot = tmp_path / f"{kind}-report.png"
    result = run_chromium(tmp_path, reports[kind], "--window-size=1400,2400", f"--screenshot={shot}")
    assert result.returncode == 0, result.stderr[-2000:]
    assert console_messages(result.stderr) == []
    image = Image.open(shot).convert("RGB")
    assert image.size == (1400, 2400)
    pixels = np.asarray(image)
    assert pixels.std() > 20                         # a page, not a blank sheet
    masthead = pixels[:80, :, :].mean(axis=(0, 1))
    assert masthead.max() < 80                       # the dark masthead rendered (CSS applied)
    print(f"screenshot: {shot}")


@pytest.mark.parametrize("kind, n_images", [("lot", 4 + 3), ("unit", 1)])
def test_every_image_is_present_and_drawn(reports, tmp_path, kind, n_images):
    page = reports[kind]
    assert len(Page(page.read_text(encoding="utf-8")).all("img")) == n_images
    result = run_chromium(tmp_path, probe_copy(page, tmp_path), "--dump-dom")
    assert result.returncode == 0, result.stderr[-2000:]
    assert console_messages(result.stderr) == []
    match = re.search(r'<pre id="probe">(.*?)</pre>', result.stdout, re.S)
    assert match, "the probe did not run"
    images = json.loads(match.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert len(images) == n_images
    for image in images:
        assert image["complete"] and [image["width"], image["height"]] == image["declared"]
        assert image["width"] > 300 and image["ink"] > 0.02, image


def test_a_page_that_fetches_is_caught(reports, tmp_path):
    """The console check is not vacuous: an outside image is blocked and reported."""
    text = reports["lot"].read_text(encoding="utf-8")
    leaky = tmp_path / "leaky.html"
    leaky.write_text(text.replace("<main", '<img src="https://example.invalid/x.png" alt=""><main', 1),
                     encoding="utf-8")
    result = run_chromium(tmp_path, leaky, "--dump-dom")
    assert any("example.invalid" in line for line in console_messages(result.stderr))
