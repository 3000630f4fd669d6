"""The audit: a corpus with a known empty cell, a known thin one and known duplicates; the binomial tail
against scipy; target mixes; the CLI. Traces are built in the test (flat levels chosen to sit in bins)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.curate.audit import audit, binomial_low_tail
from tracegen.curate.cells import CellScheme
from tracegen.curate.mix import parse_mix
from tracegen.errors import TracegenError
from tracegen.trace import Trace

LEVELS = {"low": 0.5e6, "mid": 3e6, "high": 10e6, "top": 30e6}


def flat(level: str, i: int, seconds: int = 300, access: str = "lte") -> Trace:
    rng = np.random.default_rng(list(LEVELS).index(level) * 100 + i)
    t = np.arange(seconds, dtype=float)
    bw = LEVELS[level] * np.exp(0.01 * rng.standard_normal(seconds))
    return Trace.from_columns(t, bandwidth_bps=bw, rtt_ms=np.full(seconds, 30.0), loss=np.zeros(seconds),
                              source=f"{level}-{i}.csv", group=f"{level}-{i}", tags={"access": access, "level": level})


def corpus(levels=("low", "mid", "high", "top"), per: int = 3, seconds: int = 300) -> list[Trace]:
    return [flat(lv, i, seconds) for lv in levels for i in range(per)]


def cell(level_bin: str) -> str:
    return f"level={level_bin},variability=<0.2,rtt=<50ms,loss=<1%,outage=none"


def test_known_empty_cell_found_exactly():
    reference = corpus()                          # 4 levels x 3 traces x 5 windows = 60 windows
    selection = corpus(("low", "mid", "high"))    # no 30 Mbit/s traces: 45 windows
    r = audit(selection, against=reference, duplicates=False)
    flagged = r.flagged()
    assert [(x["cell"], x["status"]) for x in flagged] == [(cell("20M+"), "empty")]
    assert flagged[0]["expected"] == pytest.approx(0.25 * 45)
    statuses = {x["cell"]: x["status"] for x in r.data["comparisons"]["reference"]["cells"]}
    assert statuses == {cell("<1M"): "ok", cell("1M-5M"): "ok", cell("5M-20M"): "ok", cell("20M+"): "empty"}
    tags = {x["value"]: x["status"] for x in r.data["comparisons"]["reference"]["tags"]["level"]}
    assert tags == {"low": "ok", "mid": "ok", "high": "ok", "top": "empty"}


def test_known_thin_cell_and_outside_cell():
    reference = corpus(("low", "mid", "high"), per=4)          # 60 windows, a third each
    selection = corpus(("low", "mid"), per=4) + [flat("high", 9, 60), flat("top", 0)]
    r = audit(selection, against=reference, duplicates=False)
    statuses = {x["cell"]: x["status"] for x in r.data["comparisons"]["reference"]["cells"]}
    # 46 windows: high expects 46/3 = 15.3 and has 1 (thin); top has 5 the reference never shows (outside)
    assert statuses[cell("5M-20M")] == "thin" and statuses[cell("20M+")] == "outside"
    assert [x["cell"] for x in r.flagged()] == [cell("5M-20M")]


def test_composition_and_spread():
    sel = corpus(("low", "mid"), per=2) + [flat("high", 0, 120)]
    r = audit(sel, duplicates=False)
    d = r.data
    assert d["selection"] == {"traces": 5, "groups": 5, "hours": pytest.approx((4 * 300 + 120) / 3600, abs=1e-6),
                              "windows": 22}
    assert d["durations"]["duration_s"]["min"] == 120 and d["durations"]["duration_s"]["max"] == 300
    assert d["durations"]["steps"] == {"1": 5}
    assert d["tags"]["level"]["low"]["traces"] == 2
    assert d["cells"]["marginals"]["level"]["<1M"]["windows"] == 10
    assert d["cells"]["marginals"]["level"]["5M-20M"]["windows"] == 2
    assert d["cells"]["marginals"]["level"]["20M+"]["windows"] == 0
    assert d["comparisons"] == {}


def test_binomial_tail_matches_scipy():
    # reference: scipy.stats.binom.cdf for whole numbers
    k = np.array([0, 1, 3, 7, 20])
    for n, p in ((20, 0.1), (50, 0.3), (7, 0.9)):
        np.testing.assert_allclose(binomial_low_tail(k, n, np.full(k.size, p)),
                                   np.where(k >= n, 1.0, stats.binom.cdf(k, n, p)), rtol=1e-10)


def test_target_mix_with_cells_and_tags():
    scheme = CellScheme()
    mix = parse_mix({"cells": {"level=<1M": 0.25, "level=1M-5M": 0.25, "level=5M-20M": 0.25, "level=20M+": 0.25},
                     "tags": {"access": {"lte": 0.5, "wifi": 0.5}}}, scheme)
    r = audit(corpus(("low", "mid", "high")), mix=mix, duplicates=False)
    target = r.data["comparisons"]["target"]
    assert {x["cell"]: x["status"] for x in target["cells"]} == {
        "level=<1M": "ok", "level=1M-5M": "ok", "level=5M-20M": "ok", "level=20M+": "empty"}
    assert {x["value"]: x["status"] for x in target["tags"]["access"]} == {"lte": "ok", "wifi": "empty"}


def test_unknown_tag_in_mix_is_refused():
    mix = parse_mix({"tags": {"device": {"a": 1.0}}}, CellScheme())
    with pytest.raises(TracegenError, match="no trace of the selection has a tag 'device'"):
        audit(corpus(("low",)), mix=mix, duplicates=False)


def test_same_result_same_bytes_and_page():
    sel, ref = corpus(("low", "mid", "high")), corpus()
    a = audit(sel, against=ref, duplicates=False)
    b = audit(sel, against=ref, duplicates=False)
    assert a.to_json() == b.to_json()
    json.loads(a.to_json())
    page = a.to_html()
    assert page == b.to_html()
    assert "<h2>Against reference</h2>" in page and "data:image/png;base64," in page and "empty" in page


def test_duplicates_are_in_the_audit():
    base = corpus(("low", "mid"), per=2)
    copy = base[0].with_meta(source="again.csv", group="again")
    r = audit(base + [copy])
    sets = r.data["duplicates"]["identical"]
    assert len(sets) == 1 and {x["id"] for x in sets[0]["traces"]} == {base[0].id}


# --------------------------------------------------------------------------------------------------
# the command


@pytest.fixture()
def catalog(tmp_path):
    root = tmp_path / "cat"
    cat = Catalog.open(root, create=True)
    cat.add(corpus(("low", "mid", "high")) + [flat("top", i, 300, access="wifi") for i in range(3)])
    return root


def test_cli_writes_json_and_html(catalog, tmp_path):
    out_json, out_html = tmp_path / "a.json", tmp_path / "a.html"
    res = CliRunner().invoke(cli, ["audit", "--catalog", str(catalog), "access=lte", "--against", "level~*",
                                   "--json", str(out_json), "--html", str(out_html)])
    assert res.exit_code == 0, res.output
    data = json.loads(out_json.read_text())
    assert [x["cell"] for x in data["comparisons"]["reference"]["cells"] if x["status"] == "empty"] == [cell("20M+")]
    assert out_html.read_text().startswith("<!DOCTYPE html>")
    assert "empty  " + cell("20M+") in res.output


@pytest.mark.parametrize("mix_text, words", [
    ('[cells]\n"level=<1M" = 0.5\n"level=1M-5M" = 0.4\n', "sum to 0.9"),
    ('[tags.device]\nphone = 1.0\n', "no trace of the selection has a tag 'device'"),
    ('[cells]\n"level=<3M" = 1.0\n', "not a bin of level"),
    ('[cells\n', "not valid TOML"),
])
def test_cli_bad_mix_is_one_line_and_changes_nothing(catalog, tmp_path, mix_text, words):
    mix = tmp_path / "mix.toml"
    mix.write_text(mix_text)
    before = (catalog / "index.parquet").read_bytes()
    res = CliRunner().invoke(cli, ["audit", "--catalog", str(catalog), "--mix", str(mix), "--json",
                                   str(tmp_path / "x.json")])
    assert res.exit_code == 2
    assert words in res.output and "Traceback" not in res.output
    assert not (tmp_path / "x.json").exists()
    assert (catalog / "index.parquet").read_bytes() == before
