"""The audit page in a real browser (headless Chromium, as for the coverage report): no console
messages and every plot decoded."""

from __future__ import annotations

import re

import pytest

from test_compare_html import CHROMIUM, chromium
from test_curate_audit import corpus
from tracegen.curate.audit import audit

pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (Debian package "
                                                           "'chromium'; .ci/run installs it): HTML check skipped")


def test_audit_page_opens_clean_and_every_plot_decodes(tmp_path):
    sel, ref = corpus(("low", "mid", "high")), corpus()
    page = audit(sel + [sel[0].with_meta(source="copy.csv")], against=ref).to_html()
    assert page.count("<img ") == 3  # bins against the reference, level x variability, durations
    probe = ("<script>addEventListener('load',()=>{const i=[...document.images];"
             "document.body.dataset.loaded=i.filter(x=>x.complete&&x.naturalWidth>0).length;"
             "document.body.dataset.total=i.length;});</script></body>")
    plain, probed = tmp_path / "audit.html", tmp_path / "probe.html"
    plain.write_text(page, encoding="utf-8")
    probed.write_text(page.replace("</body>", probe), encoding="utf-8")
    run = chromium(tmp_path, "--window-size=1200,2400", f"--screenshot={tmp_path / 'shot.png'}", plain.as_uri())
    assert [line for line in run.stderr.splitlines() if ":CONSOLE" in line] == []
    run = chromium(tmp_path, "--virtual-time-budget=5000", "--dump-dom", probed.as_uri())
    loaded = re.search(r'data-loaded="(\d+)"', run.stdout)
    assert loaded and loaded.group(1) == "3", run.stdout[:500]
    assert "Identical samples" in run.stdout
