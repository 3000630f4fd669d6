"""The HTML coverage report in a real browser: headless Chromium (Debian's chromium package, which
.ci/run installs) opens it without console messages, every plot decodes, and a screenshot is not blank."""

from __future__ import annotations

import io
import math
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

import tracegen
from builders import ar, dwell, level_state, model

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (Debian package "
                                                           "'chromium'; .ci/run installs it): HTML check skipped")
# flags for a closed network and no desktop session (a fresh profile each run)
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]


def chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.iterdir()))}"
    return subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True, text=True,
                          timeout=120)


@pytest.fixture(scope="module")
def page(tmp_path_factory) -> Path:
    m = model([level_state(2e6, 0.5, dwell("lognormal", mu=math.log(15.0), sigma=0.5), ar_fit=ar([0.6], 0.03)),
               level_state(9e6, 0.5, dwell("gamma", shape=2.0, scale_s=10.0), ar_fit=ar([0.5], 0.02))],
              [[0, 1], [1, 0]])
    real = tracegen.synth(m, 12, 400.0, 1.0, 1)
    synthetic = tracegen.synth(m, 12, 400.0, 1.0, 2)
    res = tracegen.coverage(real, synthetic, scales_s=(10.0, 60.0), n_permutations=0)
    path = tmp_path_factory.mktemp("report") / "coverage.html"
    path.write_text(res.to_html(), encoding="utf-8")
    return path


def test_the_report_opens_without_console_messages_and_is_not_blank(page, tmp_path):
    shot = tmp_path / "shot.png"
    run = chromium(tmp_path, "--window-size=1200,2400", f"--screenshot={shot}", page.as_uri())
    assert shot.exists(), run.stderr[-2000:]
    console = [line for line in run.stderr.splitlines() if ":CONSOLE" in line]
    assert console == []  # the page has no script: any console line is an error (e.g. a resource that failed)
    import matplotlib.image as mpimg

    pixels = mpimg.imread(shot)[..., :3]
    not_white = np.mean(np.any(pixels < 0.9, axis=-1))
    assert not_white > 0.02, f"only {not_white:.2%} of the screenshot is not white"
    assert pixels.std() > 0.05


def test_every_plot_is_decoded_by_the_browser(page, tmp_path):
    # a copy of the page with a probe that counts the images the browser decoded, read back with --dump-dom
    probe = ("<script>addEventListener('load',()=>{const i=[...document.images];"
             "document.body.dataset.loaded=i.filter(x=>x.complete&&x.naturalWidth>0).length;"
             "document.body.dataset.total=i.length;});</script></body>")
    copy = tmp_path / "probe.html"
    copy.write_text(page.read_text().replace("</body>", probe), encoding="utf-8")
    run = chromium(tmp_path, "--virtual-time-budget=5000", "--dump-dom", copy.as_uri())
    loaded = re.search(r'data-loaded="(\d+)"', run.stdout)
    total = re.search(r'data-total="(\d+)"', run.stdout)
    assert loaded and total, run.stdout[:500]
    assert int(total.group(1)) == page.read_text().count("<img ") >= 5
    assert loaded.group(1) == total.group(1)


def test_plots_are_real_images():
    # independent of the browser: each embedded PNG decodes and has content (matplotlib's own reader)
    import base64

    import matplotlib.image as mpimg

    m = model([level_state(3e6, 1.0, dwell("geometric", p=0.1), ar_fit=ar([0.5], 0.02))], [[0.0]])
    res = tracegen.coverage(tracegen.synth(m, 8, 300.0, 1.0, 1), tracegen.synth(m, 8, 300.0, 1.0, 2),
                            scales_s=(10.0,), n_permutations=0)
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', res.to_html())
    assert images
    for b64 in images:
        img = mpimg.imread(io.BytesIO(base64.b64decode(b64)), format="png")
        assert img.shape[0] > 100 and img.shape[1] > 100 and img[..., :3].std() > 0.02
