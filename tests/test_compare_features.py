"""tracegen.compare.features against outside references: statsmodels' acf, numpy's percentiles and
hand-worked tiny traces. Invented data comes from fixed seeds."""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.tsa.stattools import acf as sm_acf

from tracegen.compare import features as F
from tracegen.compare.features import (TRACE_FEATURES, WINDOW_FEATURES, Prepared, dwell_runs, event_rates, pooled_acf,
                                       prepare, trace_features, window_features)
from tracegen.errors import TracegenError
from tracegen.trace import OUTAGE_FLOOR_BPS, Trace

FLOOR = OUTAGE_FLOOR_BPS
COL = {name: j for j, name in enumerate(WINDOW_FEATURES)}


def _trace(bw, *, step=1.0, t0=0.0, rtt=None, loss=None, **optional) -> Trace:
    bw = np.asarray(bw, dtype=float)
    return Trace.from_columns(t0 + step * np.arange(bw.size), bandwidth_bps=bw, rtt_ms=rtt, loss=loss, **optional)


def _random_traces(seed: int, n_traces: int = 3, n: int = 250) -> list[Trace]:
    """AR(1) log bandwidth with outages, unknown samples, RTT and loss (invented, fixed seed)."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_traces):
        e = rng.normal(0.0, 0.4, n)
        lb = np.empty(n)
        lb[0] = e[0]
        for i in range(1, n):  # the test's own AR(1) recursion (data generation, not the code under test)
            lb[i] = 0.8 * lb[i - 1] + e[i]
        bw = np.exp(14.0 + lb)
        bw[rng.random(n) < 0.05] = 0.0
        bw[rng.random(n) < 0.05] = np.nan
        rtt = rng.uniform(20.0, 200.0, n)
        rtt[rng.random(n) < 0.1] = np.nan
        loss = rng.uniform(0.0, 0.05, n)
        loss[rng.random(n) < 0.1] = np.nan
        out.append(_trace(bw, rtt=rtt, loss=loss))
    return out


def _windows_of(tr: Trace, table, m: int):
    """(row index, slice) of each table row that comes from ``tr``'s windows, by start time."""
    t = np.asarray(tr["t_s"])
    for row in range(len(table)):
        i = int(np.searchsorted(t, table.start_s[row]))
        yield row, slice(i, i + m)


# --- prepare ------------------------------------------------------------------------------------
def test_prepare_resamples_mixed_steps_to_the_coarsest():
    rng = np.random.default_rng(3)
    fine = _trace(rng.uniform(1e5, 1e6, 1000), step=0.01)          # 10 ms for 10 s
    coarse = _trace(rng.uniform(1e5, 1e6, 30), step=1.0)
    prep = prepare([fine, coarse])
    assert prep.step_s == 1.0
    assert prep.traces[1] is coarse                                   # already on the step: untouched
    expected = fine.resample(1.0)                                     # the project's documented resampler
    np.testing.assert_array_equal(prep.traces[0]["bandwidth_bps"], expected["bandwidth_bps"])
    assert len(prep.traces[0]) == 10
    assert prep.notes == ("resampled 1 trace from 0.01 s to 1 s",)


def test_prepare_given_step_and_irregular_traces():
    regular = _trace(np.full(20, 1e6), step=1.0)
    gappy = Trace.from_columns([0.0, 1.0, 2.0, 7.0, 8.0, 9.0], bandwidth_bps=np.full(6, 2e6))
    prep = prepare([regular, gappy])
    assert prep.traces[0] is regular
    # the gap of 5 steps is longer than three steps: the resampled bins inside it are unknown
    np.testing.assert_array_equal(np.isnan(prep.traces[1]["bandwidth_bps"]), [0, 0, 0, 1, 1, 1, 1, 0, 0, 0])
    assert any("1 irregular trace" in n for n in prep.notes)
    half = prepare([regular], step_s=2.0)
    assert half.step_s == 2.0 and len(half.traces[0]) == 10
    assert half.notes == ("resampled 1 trace from 1 s to 2 s",)


def test_prepare_refuses_nothing_and_bad_steps():
    with pytest.raises(TracegenError, match="no traces"):
        prepare([])
    with pytest.raises(TracegenError, match="step"):
        prepare([_trace([1e6, 1e6])], step_s=0.0)
    with pytest.raises(TracegenError, match="single sample"):
        prepare([_trace([1e6])])


# --- window features against numpy and statsmodels -------------------------------------------------
def test_acf_per_window_equals_statsmodels():
    traces = _random_traces(11)
    prep = prepare(traces)
    table = window_features(prep, 60.0)
    assert len(table) == 3 * 4                                        # 250 samples: 4 windows of 60 each
    checked_gappy = 0
    for row in range(len(table)):
        tr = prep.traces[table.trace[row]]
        i = int(table.start_s[row])
        lc = np.log(np.maximum(np.asarray(tr["bandwidth_bps"])[i:i + 60], FLOOR))
        if np.isnan(lc).any():
            # statsmodels.tsa.stattools.acf with missing="conservative": NaNs out of mean and products
            ref = sm_acf(lc, nlags=5, missing="conservative")
            checked_gappy += 1
        else:
            ref = sm_acf(lc, nlags=5)                                 # statsmodels' defaults (biased, fft)
        np.testing.assert_allclose(table.values[row, COL["acf1_log_bw"]], ref[1], rtol=0, atol=1e-12)
        np.testing.assert_allclose(table.values[row, COL["acf5_log_bw"]], ref[5], rtol=0, atol=1e-12)
    assert checked_gappy > 0


def test_acf_of_complete_windows_equals_statsmodels_default():
    rng = np.random.default_rng(5)
    bw = np.exp(rng.normal(13.0, 1.0, 600))
    table = window_features(prepare([_trace(bw)]), 30.0)
    for row, sl in _windows_of(prepare([_trace(bw)]).traces[0], table, 30):
        ref = sm_acf(np.log(bw[sl]), nlags=5)                         # statsmodels.tsa.stattools.acf, defaults
        np.testing.assert_allclose(table.values[row, [COL["acf1_log_bw"], COL["acf5_log_bw"]]], ref[[1, 5]],
                                   rtol=0, atol=1e-12)


def test_constant_window_has_no_acf():
    # zero variance: the autocorrelation is 0/0, undefined (hand-worked)
    table = window_features(prepare([_trace(np.full(20, 3e6))]), 10.0)
    assert np.isnan(table.values[:, [COL["acf1_log_bw"], COL["acf5_log_bw"]]]).all()
    assert (table.values[:, COL["cv_bw"]] == 0).all()


def test_percentiles_and_means_equal_numpy():
    prep = prepare(_random_traces(23))
    table = window_features(prep, 50.0)
    assert len(table) == 15
    for row in range(len(table)):
        tr = prep.traces[table.trace[row]]
        i = int(table.start_s[row])
        bw = np.asarray(tr["bandwidth_bps"])[i:i + 50]
        rtt = np.asarray(tr["rtt_ms"])[i:i + 50]
        loss = np.asarray(tr["loss"])[i:i + 50]
        ok = np.log(bw[bw >= FLOOR])
        v = table.values[row]
        close = dict(rtol=1e-13, atol=0)
        np.testing.assert_allclose(v[COL["median_log_bw"]], np.percentile(ok, 50), **close)   # numpy.percentile
        np.testing.assert_allclose(v[COL["median_log_bw"]], np.median(ok), **close)           # numpy.median
        np.testing.assert_allclose(v[COL["mean_log_bw"]], np.mean(ok), **close)
        np.testing.assert_allclose(v[COL["p5_log_bw"]], np.nanpercentile(np.log(np.maximum(bw, FLOOR)), 5),
                                   **close)                                                   # numpy.nanpercentile
        np.testing.assert_allclose(v[COL["cv_bw"]], np.nanstd(bw) / np.nanmean(bw), **close)  # numpy, ddof 0
        np.testing.assert_allclose(v[COL["rtt_p50_ms"]], np.nanpercentile(rtt, 50), **close)
        np.testing.assert_allclose(v[COL["rtt_p95_ms"]], np.nanpercentile(rtt, 95), **close)
        np.testing.assert_allclose(v[COL["loss_mean"]], np.nanmean(loss), **close)
        np.testing.assert_allclose(v[COL["outage_share"]], np.mean(bw[~np.isnan(bw)] < FLOOR), **close)


def test_hand_worked_tiny_trace():
    # step 0.5 s, windows of 2 s = 4 samples; values in Mbit/s, 0 an outage, nan unknown
    mb = [1, 0, 0, 4,  1, 4, np.nan, 1,  4, 2, 2, 1,  np.nan, np.nan, np.nan, 4,  2]
    bw = np.array(mb, dtype=float) * 1e6
    rtt = np.array([10, 20, 30, 40] + [np.nan] * 4 + [50, 60, 70, 80] + [10] * 5, dtype=float)
    loss = np.array([0.0, 0.1, 0.2, 0.3] + [0.0] * 13)
    short = _trace([1e6, 2e6, 3e6], step=0.5)
    table = window_features(prepare([_trace(bw, step=0.5, rtt=rtt, loss=loss), short]), 2.0)
    # windows at 0, 2, 4 s; the one at 6 s has 1 of 4 known (dropped), the sample at 8 s is a partial window
    np.testing.assert_array_equal(table.start_s, [0.0, 2.0, 4.0])
    np.testing.assert_array_equal(table.trace, [0, 0, 0])
    assert any("dropped 1 of 4 windows" in n for n in table.notes)
    assert any("trailing partial" in n for n in table.notes)
    assert any("1 trace shorter than one 2 s window" in n and "1 (" in n for n in table.notes)
    v = table.values
    # outages: window 0 has 2 of 4 (a run of 2 samples = 1 s), the others none
    np.testing.assert_array_equal(v[:, COL["outage_share"]], [0.5, 0.0, 0.0])
    np.testing.assert_array_equal(v[:, COL["longest_outage_s"]], [1.0, 0.0, 0.0])
    # the trace median of log bw over known non-outage samples: 1,1,1,1,2,2,2,4,4,4,4 Mb/s -> log 2e6.
    # window 0: - - - +            -> 1 crossing
    # window 1: - + (nan) -        -> 2 (the unknown sample is skipped)
    # window 2: + (on) (on) -      -> 1 (samples on the median are skipped)
    np.testing.assert_array_equal(v[:, COL["level_changes"]], [1, 2, 1])
    np.testing.assert_allclose(v[0, COL["mean_log_bw"]], (math.log(1e6) + math.log(4e6)) / 2, rtol=1e-15)
    np.testing.assert_allclose(v[0, COL["cv_bw"]], math.sqrt(10.75 / 4) / 1.25, rtol=1e-14)  # by hand, in Mb/s
    np.testing.assert_allclose(v[0, COL["p5_log_bw"]], math.log(FLOOR), rtol=1e-15)  # 5% of 4 sorted: the floor
    # RTT 10,20,30,40: p50 = 25, p95 = 30 + 0.85 * 10 = 38.5 (linear interpolation, by hand)
    np.testing.assert_allclose(v[0, [COL["rtt_p50_ms"], COL["rtt_p95_ms"]]], [25.0, 38.5], rtol=1e-14)
    assert np.isnan(v[1, COL["rtt_p50_ms"]]) and np.isnan(v[1, COL["rtt_p95_ms"]])
    np.testing.assert_allclose(v[:, COL["loss_mean"]], [0.15, 0.0, 0.0], rtol=1e-14)


def test_level_changes_match_a_direct_count():
    # a direct reading of the definition (a loop over samples, test only) on invented data with ties and gaps
    rng = np.random.default_rng(8)
    bw = rng.choice([5e5, 1e6, 2e6, 0.0, np.nan], size=400, p=[0.3, 0.2, 0.3, 0.1, 0.1])
    tr = _trace(bw)
    med = np.median(np.log(bw[bw >= FLOOR]))
    table = window_features(prepare([tr]), 25.0)
    for row, sl in _windows_of(tr, table, 25):
        lc = np.log(np.maximum(bw[sl], FLOOR))
        signs = [np.sign(x - med) for x in lc if not np.isnan(x) and x != med]
        expected = sum(a != b for a, b in zip(signs, signs[1:]))
        assert table.values[row, COL["level_changes"]] == expected


def test_blocks_do_not_change_the_bytes(monkeypatch):
    prep = prepare(_random_traces(31, n_traces=4, n=400))
    whole = window_features(prep, 20.0)
    monkeypatch.setattr(F, "_BLOCK", 45)                              # 2 windows per block
    blocked = window_features(prep, 20.0)
    assert whole.values.tobytes() == blocked.values.tobytes()
    assert whole.features == WINDOW_FEATURES and whole.values.shape == (len(whole), len(WINDOW_FEATURES))


def test_window_arguments_are_checked():
    prep = prepare([_trace(np.full(10, 1e6))])
    for bad in (0.0, -5.0, math.nan, math.inf, 0.2):
        with pytest.raises(TracegenError, match="scale"):
            window_features(prep, bad)


# --- per trace -------------------------------------------------------------------------------------
def test_trace_features_by_hand_and_numpy():
    # trace 0 (step 1 s): known non-outage samples are six of 1 and six of 4 Mb/s, so its median lies between
    mb0 = np.array([4, 4, 1, 1, 4, 4, 4, 1, 0, 4, np.nan, 1, 1, 1], dtype=float)
    # trace 1 crosses once: both of its runs are cut by the ends
    mb1 = np.array([1, 1, 1, 1, 1, 4, 4, 4, 4, 4], dtype=float)
    prep = prepare([_trace(mb0 * 1e6), _trace(mb1 * 1e6)])
    table = trace_features(prep, window_s=4.0)
    assert table.features == TRACE_FEATURES and math.isinf(table.scale_s)
    np.testing.assert_array_equal(table.trace, [0, 1])
    np.testing.assert_array_equal(table.start_s, [0.0, 0.0])
    v = table.values
    np.testing.assert_allclose(v[:, 0], [np.mean(np.log(m[m > 0] * 1e6)) for m in (mb0, mb1)], rtol=1e-14)
    # window means (windows of 4 samples, the partial one left out): numpy mean, then numpy std with ddof 1
    def spread(mb, n_windows):
        means = []
        for w in mb[: 4 * n_windows].reshape(n_windows, 4):
            w = w[~np.isnan(w)]
            means.append(np.mean(np.log(w[w > 0] * 1e6)))
        return np.std(means, ddof=1)
    np.testing.assert_allclose(v[:, 1], [spread(mb0, 3), spread(mb1, 2)], rtol=1e-12)
    # trace 0 above runs: [0,1] cut by the start, [4..6] complete (3 s), [9] ends at an unknown (cut);
    # below runs: [2,3] complete (2 s), [7,8] complete (2 s, the outage counts as below), [11..13] cut by the end
    np.testing.assert_allclose(v[0, 2:], [3.0, 2.0])
    # trace 1: no complete run, so the cut ones: above 5 s, below 5 s
    np.testing.assert_allclose(v[1, 2:], [5.0, 5.0])


def test_dwell_runs_hand_made():
    thr = math.log(2e6)
    # step 2 s; above (A) / below (B): A B B A A A B B(outage) A nan A B A
    a = np.array([5, 1, 1, 5, 5, 5, 1, 0, 5, np.nan, 5, 1, 5], dtype=float) * 1e6
    b = np.array([1, 5, 1], dtype=float) * 1e6
    above, below = dwell_runs(prepare([_trace(a, step=2.0), _trace(b, step=2.0)]), thr)
    # complete runs only: above [3..5] (3 samples), trace 2's [1] (1); below [1,2], [6,7], [11]
    np.testing.assert_array_equal(above, [6.0, 2.0])
    np.testing.assert_array_equal(below, [4.0, 4.0, 2.0])
    with pytest.raises(TracegenError, match="threshold"):
        dwell_runs(prepare([_trace(a)]), math.nan)


# --- pooled autocorrelation ----------------------------------------------------------------------------
def test_pooled_acf_of_one_trace_equals_statsmodels():
    rng = np.random.default_rng(2)
    bw = np.exp(14 + np.cumsum(rng.normal(0, 0.2, 500)) * 0.1 + rng.normal(0, 0.3, 500))
    bw[rng.random(500) < 0.03] = 0.0
    lags, r = pooled_acf(prepare([_trace(bw, step=0.5)]), max_lag_s=10.0)
    np.testing.assert_allclose(lags, 0.5 * np.arange(21))
    ref = sm_acf(np.log(np.maximum(bw, FLOOR)), nlags=20)             # statsmodels.tsa.stattools.acf, defaults
    np.testing.assert_allclose(r, ref, rtol=0, atol=1e-12)


def test_pooled_acf_of_two_traces_by_hand():
    rng = np.random.default_rng(4)
    x1 = np.exp(rng.normal(14, 1, 80))
    x2 = np.exp(rng.normal(12, 0.5, 30))
    x2[[5, 6, 17]] = np.nan                                           # gaps break products
    lags, r = pooled_acf(prepare([_trace(x1), _trace(x2)]), max_lag_s=40.0)
    # hand pooling: demean each trace by its own mean, sum lag products over traces, divide by the lag-0 sum
    d = [np.log(np.maximum(x, FLOOR)) for x in (x1, x2)]
    d = [np.nan_to_num(y - np.nanmean(y)) for y in d]
    num = np.array([sum(float(np.dot(y[: max(y.size - k, 0)], y[k:])) for y in d) for k in range(41)])
    np.testing.assert_allclose(r, num / num[0], rtol=0, atol=1e-12)
    # beyond every trace there is no pair: unknown, not 0
    _, far = pooled_acf(prepare([_trace(x2)]), max_lag_s=35.0)
    assert np.isnan(far[30:]).all() and np.isfinite(far[:30]).all()
    with pytest.raises(TracegenError, match="lag"):
        pooled_acf(prepare([_trace(x1)]), max_lag_s=-1.0)


# --- event rates ---------------------------------------------------------------------------------------
def test_event_rates_from_the_event_column():
    n = 3600                                                          # one hour at 1 s
    bw = np.full(n, 1e6)
    bw[[100, 101, 2000]] = 0.0                                        # two outage runs
    ev = np.full(n, None, dtype=object)
    ev[[10, 500, 900]] = ["handover", "handover-failure", "outage"]
    rates = event_rates(prepare([_trace(bw, event=ev)]))
    assert rates == {"outages_per_hour": 2.0, "handovers_per_hour": 2.0, "hours": 1.0}
    # marks that share a resampled bin are joined with ';' by Trace.resample and still count
    fine_ev = np.full(7200, None, dtype=object)
    fine_ev[40], fine_ev[41] = "outage", "handover"                   # 20.0 s and 20.5 s: one 1 s bin
    fine = _trace(np.full(7200, 1e6), step=0.5, event=fine_ev)
    other = _trace(np.full(3600, 1e6), step=1.0)                      # no source: left out of the handover rate
    prep = prepare([fine, other])
    assert prep.traces[0]["event"][20] == "outage;handover"
    rates = event_rates(prep)
    assert rates["hours"] == 2.0 and rates["outages_per_hour"] == 0.0
    assert rates["handovers_per_hour"] == 1.0


def test_event_rates_from_cell_labels_and_unknowable():
    n = 1800                                                          # half an hour
    cell = np.array(["A"] * 600 + [None] * 5 + ["B"] * 600 + ["A"] * 595, dtype=object)
    rates = event_rates(prepare([_trace(np.full(n, 1e6), cell=cell)]))
    # A -> (unknown) -> B -> A: two changes (tracegen.fit.events.cell_changes) in 0.5 h
    assert rates["handovers_per_hour"] == 4.0 and rates["hours"] == 0.5
    assert rates["outages_per_hour"] == 0.0
    plain = event_rates(prepare([_trace(np.full(n, 1e6))]))
    assert math.isnan(plain["handovers_per_hour"])


def test_empty_windows_and_prepared_checks():
    prep = prepare([_trace(np.full(5, 1e6))])
    table = window_features(prep, 60.0)
    assert len(table) == 0 and table.values.shape == (0, len(WINDOW_FEATURES))
    assert table.trace.dtype == np.int64
    with pytest.raises(TracegenError, match="prepare"):
        window_features([_trace(np.full(5, 1e6))], 1.0)
    assert isinstance(prep, Prepared)
