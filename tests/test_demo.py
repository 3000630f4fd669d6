"""The demo world: determinism, what lands in the catalog, and the physics checked against published formulas."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from conftest import snapshot
from tracegen import demo
from tracegen.catalog import Catalog
from tracegen.ingest import Labels, read_file

SMALL = dict(sessions=12, duration_s=60)  # one cycle of the twelve archetypes: every format and access


@pytest.fixture(scope="module")
def full(tmp_path_factory):
    """The default demo (36 sessions of 300 s), built once for the module."""
    root = tmp_path_factory.mktemp("demo")
    report = demo.build_demo(root, seed=7, progress=False)
    return root, report


def test_the_demo_fits_a_model_of_its_lte_traces(full):
    from tracegen.model import load

    root, report = full
    model = load(report.model_path)
    assert report.model_path == root / "demo-model.json"
    assert model.report["selection"] == ["access=lte"] and model.report["traces"] == 27
    assert model.states[0].kind == "outage"  # the demo's failed handovers and coverage holes
    assert "tracegen model show" in report.text()


def _sources(root: Path) -> dict[str, bytes]:
    return snapshot(root / "demo-sources")


def test_same_seed_gives_the_same_bytes_and_ids(tmp_path):
    a = demo.build_demo(tmp_path / "a", seed=5, progress=False, **SMALL)
    b = demo.build_demo(tmp_path / "b", seed=5, progress=False, **SMALL)
    assert _sources(tmp_path / "a") == _sources(tmp_path / "b")
    assert a.added == b.added and len(a.added) == 12
    assert snapshot(tmp_path / "a" / "traces") == snapshot(tmp_path / "b" / "traces")
    assert (tmp_path / "a" / "demo-model.json").read_bytes() == (tmp_path / "b" / "demo-model.json").read_bytes()
    again = demo.build_demo(tmp_path / "a", seed=5, progress=False, fit_model=False, **SMALL)  # rebuild in place
    assert _sources(tmp_path / "a") == _sources(tmp_path / "b")
    assert again.added == () and sorted(again.present) == sorted(a.added)


def test_another_seed_gives_other_files_and_traces(tmp_path):
    a = demo.build_demo(tmp_path / "a", seed=5, progress=False, fit_model=False, **SMALL)
    b = demo.build_demo(tmp_path / "b", seed=6, progress=False, fit_model=False, **SMALL)
    sa, sb = _sources(tmp_path / "a"), _sources(tmp_path / "b")
    assert sorted(sa) == sorted(sb)  # the same plan of files ...
    assert all(sa[k] != sb[k] for k in sa)  # ... with other contents, every one
    assert not set(a.added) & set(b.added)


def test_catalog_holds_every_session_with_its_tags(full):
    root, report = full
    cat = Catalog.open(root)
    traces = list(cat.traces())
    assert len(traces) == 36 and sorted(t.id for t in traces) == sorted(report.added)
    assert {k: len(v) for k, v in report.files.items()} == {"csv": 27, "ping": 3, "rtcp": 6}
    truth = json.loads((root / "demo-sources" / "truth.json").read_text())["files"]
    for tr in traces:
        t = truth[tr.provenance["file"]]
        assert dict(tr.tags) == {"access": t["access"], "mobility": t["mobility"], "place": t["place"],
                                 "direction": t["direction"], "device": t["device"]}
    by_access = {}
    for tr in traces:
        by_access[tr.tags["access"]] = by_access.get(tr.tags["access"], 0) + 1
    assert by_access == {"lte": 27, "wifi": 9} == report.counts["access"]
    assert report.counts["mobility"] == {"cart": 15, "docked": 9, "walking": 12}


def test_personal_columns_are_pseudonymised_and_coarsened(full):
    root, _ = full
    for tr in Catalog.open(root).traces():
        assert not tr.group.startswith(("QR-", "QC-"))
        if tr.provenance["reader"] == "csv":
            assert tr.group.startswith("p-")  # the device id column, replaced by the reader's pseudonym
        if "lat_deg" in tr.data:
            lat = tr["lat_deg"][~np.isnan(tr["lat_deg"])]
            np.testing.assert_array_equal(lat, np.round(lat, 2))
    raw = (root / "demo-sources" / "qn01-tinker-quay-walking-lte-do.csv").read_text()
    assert "QR-" in raw and raw.splitlines()[1].split(",")[6].count(".") == 1  # the file itself is precise


def test_outage_seconds_carry_exactly_zero_bandwidth(full):
    root, _ = full
    truth = json.loads((root / "demo-sources" / "truth.json").read_text())["files"]
    checked = 0
    for tr in Catalog.open(root).traces():
        if tr.provenance["reader"] != "csv":
            continue
        t, bw = tr["t_s"], tr["bandwidth_bps"]
        inside = np.zeros(len(t), dtype=bool)
        for start, end, _cause in truth[tr.provenance["file"]]["outages"]:
            inside |= (t >= start) & (t + 1.0 <= end)  # the whole 1 s sample lies in the outage
        assert np.all(bw[inside] == 0.0), tr.source
        assert np.all(bw[~inside] > 0.0), tr.source  # and nothing else is an outage
        checked += int(inside.sum())
    assert checked > 20


def test_rtcp_rtt_is_the_simulated_rtt_to_1_over_65536_s(full):
    root, _ = full
    sims = {s.name: s for s in demo.simulate_fleet(7, 36, 300, progress=False)}
    traces = {tr.provenance["file"]: tr for tr in Catalog.open(root).traces() if tr.provenance["reader"] == "rtcp"}
    assert len(traces) == 6
    for source, tr in traces.items():
        rtt = sims[source.split(".")[0]].columns["rtt_ms"]
        sent = rtt[np.isfinite(rtt)]  # no report arrives in a second that is all outage
        # RFC 3550 6.4.1: RTT = A - LSR - DLSR in NTP short format, units of 1/65536 s
        expected = np.rint(sent / 1000.0 * 65536) / 65536 * 1000.0
        np.testing.assert_allclose(tr["rtt_ms"], expected, rtol=0, atol=1e-9)
        assert np.max(np.abs(tr["rtt_ms"] - sent)) <= 0.5 / 65536 * 1000.0 + 1e-9


def test_rtcp_report_arithmetic_by_hand():
    s = demo.simulate_session(demo.ARCHETYPES[4], 4, 20, np.random.default_rng(1))
    for variant in (0, 1):
        reports = demo.rtcp_reports(s, variant)
        rtt = s.columns["rtt_ms"][np.isfinite(s.columns["rtt_ms"])]
        for r, want_ms in zip(reports, rtt):
            if "arrival_ntp" in r:
                a = (r["arrival_ntp"] >> 16) & 0xFFFFFFFF  # middle 32 bits of the 64-bit NTP time
            else:
                sec = math.floor(r["arrival_s"]) + 2208988800  # RFC 868 NTP-Unix offset
                a = ((sec & 0xFFFF) << 16) | round((r["arrival_s"] % 1) * 65536)
            delay = (a - r["lsr"] - r["dlsr"]) % 2**32  # RFC 3550 6.4.1
            assert r["lsr"] != 0 and abs(delay / 65536 * 1000 - want_ms) <= 0.5 / 65536 * 1000 + 1e-9
            assert 0 <= r["fraction_lost"] <= 255 and r["clock_rate_hz"] == 90000


def test_ping_file_is_the_simulated_rtt_as_iputils_prints_it(full):
    root, _ = full
    sims = {s.name: s for s in demo.simulate_fleet(7, 36, 300, progress=False)}
    for path in sorted((root / "demo-sources").glob("*.ping")):
        (tr,) = read_file(path, "ping", Labels(), interval_s=1.0)
        s = sims[path.stem]
        replied = np.isfinite(s.columns["rtt_ms"]) & ~s.extra["probe_lost"]
        first = int(np.flatnonzero(replied)[0])
        got = tr["rtt_ms"]
        want = s.columns["rtt_ms"][first:first + len(got)]
        ok = replied[first:first + len(got)]
        np.testing.assert_array_equal(np.isfinite(got), ok)
        # iputils prints the reply time truncated to 3 digits (1 ms steps from 100 ms, 0.1 ms from 10 ms, ...):
        # never above the true value, less than one printed step below it
        step = np.where(want[ok] >= 100, 1.0, np.where(want[ok] >= 10, 0.1, 0.01))
        diff = want[ok] - got[ok]
        assert np.all((diff >= -1e-9) & (diff < step + 1e-9))
        text = path.read_text()
        assert text.startswith("PING ") and "ping statistics" in text
        assert all(h in ("192.0.2.10", "198.51.100.23", "203.0.113.5") for h in [text.split()[1]])


def test_capacity_never_exceeds_the_shannon_bound_of_the_simulated_sinr():
    rng = np.random.default_rng(3)
    for i, plan in enumerate(demo.ARCHETYPES):
        s = demo.simulate_session(plan, i, 30, rng)
        r = s.radio
        bound = r["alloc_hz"] * np.log2(1.0 + r["sinr"])  # Shannon (1948): C = B log2(1 + S/N)
        assert np.all(r["capacity_bps"] <= bound * (1 + 1e-12)), plan
        per_sec = (bound * r["avail"]).reshape(-1, demo.SUB).mean(1)
        assert np.all(s.columns["bandwidth_bps"] <= per_sec * (1 + 1e-12))


def test_shannon_capacity_formula():
    sinr = np.array([0.0, 1.0, 3.0, 1000.0])
    # Shannon (1948): B log2(1 + SINR); 1 MHz at SINR 1 (0 dB) carries 1 Mbit/s, at SINR 3 carries 2
    np.testing.assert_allclose(demo.shannon_capacity_bps(1e6, sinr), [0.0, 1e6, 2e6, 1e6 * math.log2(1001)])
    capped = demo.shannon_capacity_bps(1e6, sinr, efficiency=0.6, max_se=4.4)
    np.testing.assert_allclose(capped, 1e6 * np.minimum(0.6 * np.log2(1 + sinr), 4.4))


def test_log_distance_path_loss_formula():
    f = 2.0e9
    # Friis (1946) free-space loss 20 log10(4 pi d / lambda), lambda = c / f: at 1 m and 2 GHz
    lam = 299_792_458.0 / f
    assert demo.free_space_path_loss_db(1.0, f) == pytest.approx(20 * math.log10(4 * math.pi / lam))
    for n in (2.0, 3.5):
        # log-distance model: PL(10 d0) - PL(d0) = 10 n dB; PL(d0) is the free-space loss at d0
        pl = demo.log_distance_path_loss_db(np.array([1.0, 10.0, 100.0]), n, f)
        assert pl[0] == pytest.approx(demo.free_space_path_loss_db(1.0, f))
        np.testing.assert_allclose(np.diff(pl), [10 * n, 10 * n])


def test_gudmundson_shadowing_correlation_and_spread():
    rng = np.random.default_rng(11)
    arc = np.arange(0.0, 20000.0, 5.0)
    x = demo.gudmundson_shadowing_db(arc, 40, sigma_db=8.0, decorrelation_m=50.0, rng=rng)
    assert x.std() == pytest.approx(8.0, rel=0.05)
    for lag_m in (25.0, 50.0, 100.0):
        k = int(lag_m / 5.0)
        r = np.mean([np.corrcoef(x[:-k, j], x[k:, j])[0, 1] for j in range(40)])
        assert r == pytest.approx(math.exp(-lag_m / 50.0), abs=0.04)  # Gudmundson (1991): exp(-dx / d_corr)
    parked = demo.gudmundson_shadowing_db(np.zeros(100), 3, 8.0, 50.0, np.random.default_rng(2))
    assert np.all(parked == parked[0])  # a parked device does not move through the shadowing field


def test_fading_average_has_unit_mean_and_rician_variance():
    rng = np.random.default_rng(5)
    for k, m in ((0.0, 1), (0.0, 8), (3.0, 4)):
        g = demo.fading_power_mean(rng, np.full(200_000, k), np.full(200_000, m))
        assert g.mean() == pytest.approx(1.0, abs=0.01)
        # Rician power |h|^2 with unit mean has variance (1 + 2K) / (K + 1)^2 (K = 0: Rayleigh, exponential,
        # variance 1); the mean of M independent ones has 1/M of it
        assert g.var() == pytest.approx((1 + 2 * k) / (k + 1) ** 2 / m, rel=0.04)


def test_a3_handover_fires_only_after_hysteresis_held_for_time_to_trigger():
    n, ttt, hyst = 100, 8, 3.0
    rsrp = np.full((n, 3), -90.0)
    rsrp[:, 0] = -80.0
    rsrp[:, 2] = -80.0 + hyst  # equal to the hysteresis is not above it (TS 36.331 A3: Mn - Hys > Ms)
    rsrp[20:20 + ttt - 1, 1] = -80.0 + hyst + 0.5  # above, but one step short of the time-to-trigger
    assert demo.a3_next(rsrp, 0, 0, hyst, ttt) is None
    rsrp[50:, 1] = -80.0 + hyst + 0.5  # above from step 50 on: the time-to-trigger runs out at 50 + TTT
    assert demo.a3_next(rsrp, 0, 0, hyst, ttt) == (50 + ttt, 1)  # executes at onset + TTT
    assert demo.a3_next(rsrp, 50 + ttt, 1, hyst, ttt) is None  # the old cell is now below: no ping-pong


def test_cell_changes_in_the_logs_match_true_handovers(full):
    root, _ = full
    truth = json.loads((root / "demo-sources" / "truth.json").read_text())["files"]
    changes = 0
    for tr in Catalog.open(root).traces():
        if "cell" not in tr.data:
            continue
        t = truth[tr.provenance["file"]]
        events = np.array(t["handovers_s"] + [o[1] for o in t["outages"]] + [f for f in t["handover_failures_s"]])
        cells = tr["cell"]
        for i in range(1, len(cells)):  # a loop over 1 s labels in a test, not the simulator
            if cells[i] != cells[i - 1]:
                changes += 1
                assert events.size and np.min(np.abs(events - tr["t_s"][i])) <= 1.0, (tr.source, i)
    assert changes > 50


def test_report_text_names_the_catalog_when_asked(full):
    root, report = full
    plain = report.text()
    assert "Port Quillon (invented" in plain and "tracegen catalog stats --by access" in plain
    assert "--catalog" not in plain
    named = report.text(str(root))
    for cmd in ("list", "stats --by access", "verify"):
        assert f"tracegen catalog {cmd} --catalog {root}" in named
    assert f"tracegen catalog show {report.trace_ids[0]} --catalog {root}" in named
