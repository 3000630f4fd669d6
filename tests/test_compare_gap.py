"""The gap ratio against its noise floor: the same process scores about 1, a changed one scores above the
floor and is named; JSON and HTML outputs; the CLI; bad input."""

from __future__ import annotations

import json
import math

import pytest
from click.testing import CliRunner

import tracegen
from builders import ar, dwell, level_state, model
from tracegen import Trace, TracegenError
from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.compare.gap import WITHIN_NOISE, coverage, group_splits, reading

SCALES = (10.0, 60.0)


def two_levels(sigma2: float = 0.02, dwell_scale: float = 1.0):
    """Two level states with lognormal / gamma dwells and AR(1) residuals (invented parameters)."""
    return model([level_state(2e6, 0.4, dwell("lognormal", mu=math.log(20.0 * dwell_scale), sigma=0.6),
                              ar_fit=ar([0.7], sigma2)),
                  level_state(8e6, 0.6, dwell("gamma", shape=2.0, scale_s=15.0 * dwell_scale),
                              ar_fit=ar([0.6], sigma2))], [[0, 1], [1, 0]])


def traces_of(m, n: int, seed: int, duration_s: float = 600.0) -> list[Trace]:
    # each trace is its own session (group = its own id): the splits keep a trace on one side
    return tracegen.synth(m, n, duration_s, 1.0, seed)


@pytest.fixture(scope="module")
def field():
    return traces_of(two_levels(), 24, seed=1)


@pytest.fixture(scope="module")
def same(field):
    return coverage(field, traces_of(two_levels(), 24, seed=2), scales_s=SCALES, splits=5, seed=0,
                    n_permutations=20)


def test_two_samples_of_one_process_score_about_one(same):
    g = same.data["gap_ratio"]
    assert g["overall"] is not None and g["overall"] < 2.0, g
    for key in ("10", "60"):
        assert same.data["scales"][key]["energy"]["ratio"] < 2.0
    assert max(v for v in g["by_feature"].values() if v is not None) < 3.0
    assert same.data["noise_floor"]["splits"] == 5


def test_doubled_variance_scores_above_the_floor_and_a_spread_feature_is_worst(field):
    res = coverage(field, traces_of(two_levels(sigma2=0.08), 24, seed=2), scales_s=SCALES, n_permutations=20)
    g = res.data["gap_ratio"]
    assert g["overall"] > 3.0
    worst = res.data["worst_features"][0]
    assert worst["feature"] in ("cv_bw", "p5_log_bw", "spread_of_window_means"), worst
    assert worst["ratio"] > 3.0 and worst["reading"] == "far"


def test_halved_dwell_times_score_above_the_floor_and_a_dwell_feature_is_worst(field):
    res = coverage(field, traces_of(two_levels(dwell_scale=0.5), 24, seed=2), scales_s=SCALES, n_permutations=20)
    assert res.data["gap_ratio"]["overall"] > 3.0
    assert res.data["gap_ratio"]["temporal"]["dwell"] > WITHIN_NOISE  # shorter runs above/below the median
    # more level switching within a window: the autocorrelation and crossing features lead, not the level
    worst = [w["feature"] for w in res.data["worst_features"][:3]]
    assert set(worst) & {"level_changes", "acf1_log_bw", "acf5_log_bw"}, worst
    assert res.data["gap_ratio"]["by_feature"]["trace_mean_log_bw"] < WITHIN_NOISE


def test_json_is_stable_and_has_the_documented_keys(same, field):
    text = same.to_json()
    d = json.loads(text)
    assert d["format"] == "tracegen-coverage" and d["version"] == 1
    assert set(d["gap_ratio"]) >= {"overall", "by_scale", "by_feature", "temporal"}
    assert set(d["gap_ratio"]["by_scale"]) == {"10", "60"}
    assert "noise_floor" in d and set(d["noise_floor"]["by_scale"]) >= {"10", "60"}
    again = coverage(field, traces_of(two_levels(), 24, seed=2), scales_s=SCALES, splits=5, seed=0, n_permutations=20)
    assert again.to_json() == text  # same inputs and seed: the same bytes


def test_html_is_self_contained_and_holds_every_plot(same):
    page = same.to_html()
    assert page.startswith("<!DOCTYPE html>") and "</html>" in page
    assert "http://" not in page and "https://" not in page and "<script" not in page
    # CDF overlays per scale (2 + per trace), autocorrelation, dwell times, a projection per window scale
    assert page.count('<img src="data:image/png;base64,') == 3 + 2 + 2
    assert "within noise" in page


def test_group_splits_never_put_a_group_on_both_sides(field):
    tagged = [t.with_meta(group=f"g{i // 3}") for i, t in enumerate(field)]
    for mask in group_splits(tagged, 10, seed=4):
        groups_a = {t.group for t, m in zip(tagged, mask) if m}
        groups_b = {t.group for t, m in zip(tagged, mask) if not m}
        assert groups_a and groups_b and not groups_a & groups_b
    assert group_splits([t.with_meta(group="one") for t in field], 3, 0) == []


def test_readings():
    assert reading(1.2) == "within noise" and reading(2.0) == "wider than noise" and reading(3.5) == "far"
    assert reading(None) == "no noise floor" and reading(math.inf) == "far"


def test_a_real_set_of_one_group_reports_distances_without_ratios(field):
    one = [t.with_meta(group="everything") for t in field[:8]]
    res = coverage(one, field[8:16], scales_s=SCALES, n_permutations=0)
    assert res.data["gap_ratio"]["overall"] is None
    assert any("cannot be split" in n for n in res.data["notes"])
    assert res.data["scales"]["10"]["ks"]["mean_log_bw"]["distance"] >= 0


def test_mismatched_steps_are_resampled_and_said(field):
    fine = tracegen.synth(two_levels(), 6, 300.0, 0.1, 3)
    res = coverage(field[:12], fine, scales_s=SCALES, n_permutations=0)
    assert res.data["step_s"] == 1.0
    assert any("resampled" in n for n in res.data["notes"])


def test_nan_only_columns_and_short_traces_are_said(field):
    no_rtt = [Trace.from_columns(t["t_s"], bandwidth_bps=t["bandwidth_bps"], group=t.group) for t in field[12:20]]
    res = coverage(field[:12], no_rtt, scales_s=(10.0, 60.0, 3600.0), n_permutations=0)
    notes = " ".join(res.data["notes"])
    assert "rtt_p50_ms has no values in the synthetic set" in notes
    assert "3600" in notes and "3600" not in res.data["scales"]


def test_empty_sides_and_hopeless_scales_are_refused(field):
    with pytest.raises(TracegenError, match="real selection holds no traces"):
        coverage([], field)
    with pytest.raises(TracegenError, match="synthetic selection holds no traces"):
        coverage(field, [])
    with pytest.raises(TracegenError) as err:
        coverage(field[:4], field[4:8], scales_s=(7200.0,))
    assert err.value.field == "scales_s"


def test_cli_compares_a_catalog_selection_with_a_folder(tmp_path, field):
    cat = Catalog.open(tmp_path / "cat", create=True)
    cat.add([t.with_meta(origin="measured", tags={"access": "lte"}) for t in field[:16]])
    out = tmp_path / "synthetic"
    runner = CliRunner()
    res = runner.invoke(cli, ["synth", str(tmp_path / "m.json"), "--out", str(out)])
    assert res.exit_code == 2  # no such model file: refused
    two_levels().save(tmp_path / "m.json")
    assert runner.invoke(cli, ["synth", str(tmp_path / "m.json"), "--count", "10", "--duration", "600",
                               "--out", str(out)]).exit_code == 0
    res = runner.invoke(cli, ["coverage", "--catalog", str(tmp_path / "cat"), "--real", "access=lte",
                              "--synthetic", str(out), "--scales", "10,60", "--json", str(tmp_path / "c.json"),
                              "--html", str(tmp_path / "c.html")])
    assert res.exit_code == 0, res.output
    assert "gap ratio" in res.output
    d = json.loads((tmp_path / "c.json").read_text())
    assert d["real"]["traces"] == 16 and d["synthetic"]["traces"] == 10
    assert (tmp_path / "c.html").read_text().count("<img") >= 4
    res = runner.invoke(cli, ["coverage", "--catalog", str(tmp_path / "cat"), "--real", "access=wifi",
                              "--synthetic", str(out)])
    assert res.exit_code == 2 and "real selection access=wifi holds no traces" in res.output


def test_the_permutation_test_does_not_move_the_ratios(field):
    other = traces_of(two_levels(), 12, seed=2)
    a = coverage(field[:12], other, scales_s=SCALES, n_permutations=0)
    b = coverage(field[:12], other, scales_s=SCALES, n_permutations=30)
    assert a.data["gap_ratio"] == b.data["gap_ratio"]
    assert a.data["scales"]["10"]["energy"]["p_value"] is None and b.data["scales"]["10"]["energy"]["p_value"] > 0
