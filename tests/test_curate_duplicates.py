"""Duplicates and near copies.

What the checks rest on: a corpus whose duplicates are known by construction (copies made in the test);
the FFT score against its definition computed lag by lag with np.corrcoef (brute-force numpy reference);
spurious correlation of persistent series and differencing as the cure (Box-Jenkins prewhitening, common
practice; Granger & Newbold, "Spurious regressions in econometrics", 1974, from memory); time-zone offsets
per ISO 8601 (the standard's rule: 12:05+02:00 is 10:05 UTC)."""

from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest
import scipy.signal

from tracegen.curate import duplicates as dup
from tracegen.curate.duplicates import CORRELATED, SAME_RECORDING, find_duplicates, lagged_corr, prewhitened
from tracegen.errors import TracegenError
from tracegen.trace import Trace

LEVELS_BPS = (1e6, 4e6, 12e6)


def log_bandwidth(seed: int, n: int) -> np.ndarray:
    """Semi-Markov level switching (gamma dwell times, mean 30 s) plus AR(1) noise, in log bit/s."""
    rng = np.random.default_rng(seed)
    dwell = np.ceil(rng.gamma(2.0, 15.0, size=n)).astype(np.int64)
    segments = int(np.searchsorted(np.cumsum(dwell), n)) + 1
    level = np.log(rng.choice(LEVELS_BPS, size=segments))
    noise = scipy.signal.lfilter([1.0], [1.0, -0.8], rng.normal(0.0, 0.15, n))
    return np.repeat(level, dwell[:segments])[:n] + noise


def sha(name: str) -> str:
    return hashlib.sha256(name.encode()).hexdigest()


def measured(bw: np.ndarray, name: str, rtt_ms: np.ndarray | None = None, **prov) -> Trace:
    """A 1 s trace as if read from file ``name`` (its sha256 in provenance unless given)."""
    prov = {"file": name, "file_sha256": sha(name), **prov}
    return Trace.from_columns(np.arange(len(bw), dtype=np.float64), bandwidth_bps=bw, rtt_ms=rtt_ms, source=name,
                              provenance=prov)


def brute_best(a: np.ndarray, b: np.ndarray, min_pairs: int) -> tuple[float, int, int]:
    """The definition, one lag at a time: max over L of np.corrcoef(a[t + L], b[t]) over the known pairs,
    among lags with at least ``min_pairs`` of them (first lag wins a tie, lags ascending)."""
    n, m = len(a), len(b)
    best = (-math.inf, 0, 0)
    for lag in range(-(m - 1), n):  # the reference loops on purpose
        t = np.arange(max(0, -lag), min(m, n - lag))
        x, y = a[t + lag], b[t]
        ok = ~np.isnan(x) & ~np.isnan(y)
        if ok.sum() < max(min_pairs, dup.MIN_PAIRS) or x[ok].std() == 0 or y[ok].std() == 0:
            continue
        r = np.corrcoef(x[ok], y[ok])[0, 1]
        if r > best[0]:
            best = (float(r), lag, int(ok.sum()))
    return best


# --------------------------------------------------------------------------------------------------
# a corpus with a known duplicate set


def corpus() -> list[Trace]:
    """12 independent traces, then (a) an exact copy of trace 2 under another name and tags, (b) trace 5
    read again with its bandwidth rounded to 1 kbit/s and RTT left out (same file), (c) 400 s of trace 7
    from 137 s with 1 % multiplicative noise under another name."""
    rng = np.random.default_rng(2026)
    lengths = rng.integers(600, 1201, size=12)
    traces = [measured(np.exp(log_bandwidth(100 + k, int(n))), f"path{k}.csv", rtt_ms=np.full(n, 40.0))
              for k, n in enumerate(lengths)]
    original = traces[2]
    traces.append(Trace.from_columns(original["t_s"], bandwidth_bps=original["bandwidth_bps"],
                                     rtt_ms=original["rtt_ms"], source="copy.csv", tags={"site": "b"},
                                     provenance={"file": "copy.csv", "file_sha256": sha("copy.csv")}))
    twice = traces[5]
    traces.append(measured(np.round(np.asarray(twice["bandwidth_bps"]), -3), "path5.csv"))
    seg = np.asarray(traces[7]["bandwidth_bps"])[137:137 + 400]
    traces.append(measured(seg * np.exp(np.random.default_rng(7).normal(0.0, 0.01, seg.size)), "cut.csv"))
    return traces


@pytest.fixture(scope="module")
def known() -> list[Trace]:
    return corpus()


def check_known_set(found: dup.Duplicates, traces: list[Trace]) -> None:
    assert found.identical == [[2, 12]]
    assert traces[2].id == traces[12].id
    got = {(p.a, p.b): p for p in found.pairs}
    assert set(got) == {(5, 13), (7, 14)}
    twice, cut = got[(5, 13)], got[(7, 14)]
    assert twice.reasons == (SAME_RECORDING, CORRELATED)
    assert twice.corr > 0.999 and twice.lag_s == 0.0 and twice.overlap_s == len(traces[13])
    assert cut.reasons == (CORRELATED,)
    assert cut.corr > 0.95
    assert abs(cut.lag_s - 137.0) <= found.step_s  # b starts 137 s into a
    assert cut.overlap_s == pytest.approx(400.0, abs=found.step_s)
    assert found.duplicate_ids() == {traces[k].id for k in (2, 5, 13, 7, 14)}


def test_known_duplicate_set_is_found_and_nothing_else(known):
    # ground truth by construction (corpus); the 12 originals come from 12 seeds and share nothing
    found = find_duplicates(known)
    assert found.step_s == 1.0
    check_known_set(found, known)
    assert found.notes == ()


def test_coarse_pass_finds_the_same_set(known, monkeypatch):
    # a coarse step of 5 s: 137 s is not a whole number of coarse steps, so the copy sits between them
    monkeypatch.setattr(dup, "COARSE_POINTS", 256)
    found = find_duplicates(known)
    check_known_set(found, known)
    assert any(n.startswith("coarse pass on a 5 s step") for n in found.notes)


@pytest.mark.parametrize("offset", range(8))
def test_coarse_pass_keeps_copies_between_coarse_steps(offset, monkeypatch):
    # 600 s of a 1200 s trace from 100 + offset s, 1 % noise: on a coarse step of 8 s the copy sits
    # offset mod 8 samples off the coarse grid; with a strict min_corr the coarse pass must still pass
    # it on, so the result equals the fine-only search (itself checked against brute force below)
    a = np.exp(log_bandwidth(21, 1200))
    b = a[100 + offset:700 + offset] * np.exp(np.random.default_rng(offset).normal(0.0, 0.01, 600))
    traces = [measured(a, "a.csv"), measured(b, "b.csv")]
    monkeypatch.setattr(dup, "COARSE_POINTS", 10**6)
    fine_only = find_duplicates(traces, min_corr=0.995)
    monkeypatch.setattr(dup, "COARSE_POINTS", 150)
    coarse = find_duplicates(traces, min_corr=0.995)
    assert any(n.startswith("coarse pass on a 8 s step: 1 of 1 pairs") for n in coarse.notes)
    assert [(p.a, p.b, p.lag_s) for p in fine_only.pairs] == [(0, 1, 100.0 + offset)]
    assert coarse.pairs == fine_only.pairs


def test_lag_sign_follows_the_order(known):
    # the cut listed first: now a = the cut, b = trace 7, and b's time t matches a's at t - 137 s
    found = find_duplicates([known[14], known[7], known[0]])
    assert [(p.a, p.b) for p in found.pairs] == [(0, 1)]
    assert abs(found.pairs[0].lag_s + 137.0) <= 1.0


def test_copy_on_another_step_and_clock_is_found_on_the_common_step():
    # the copy holds each value for two 0.5 s samples and its clock starts at 1000 s: averaged onto 1 s it
    # is trace a's samples from 137 s again, and lag_s is in the two traces' own times
    a = np.exp(log_bandwidth(31, 900))
    seg = np.repeat(a[137:537], 2)
    b = Trace.from_columns(1000.0 + 0.5 * np.arange(seg.size), bandwidth_bps=seg, source="fast.csv")
    found = find_duplicates([measured(a, "a.csv"), b], step_s=1.0)
    (pair,) = found.pairs
    assert pair.corr == pytest.approx(1.0, abs=1e-9)
    assert pair.lag_s == 137.0 - 1000.0 and pair.overlap_s == 400.0
    assert any(n.startswith("resampled 1 trace from 0.5 s to 1 s") for n in found.notes)


def test_traces_without_varying_bandwidth_are_left_out_and_noted():
    n = 300
    rtt_only = Trace.from_columns(np.arange(n, dtype=np.float64), rtt_ms=np.full(n, 30.0), source="ping.txt")
    flat = measured(np.full(n, 2e6), "flat.csv")
    single = measured(np.array([1e6]), "one.csv")
    found = find_duplicates([rtt_only, flat, single, measured(np.exp(log_bandwidth(3, n)), "x.csv")])
    assert found.pairs == [] and found.identical == []
    assert "3 traces with too little varying bandwidth to correlate" in found.notes


def test_to_data_is_plain_stable_and_tied_to_its_traces(known):
    found = find_duplicates(known)
    data = found.to_data(known)
    assert json.dumps(data, allow_nan=False) == json.dumps(find_duplicates(known).to_data(known), allow_nan=False)
    assert [x["id"] for x in data["identical"][0]["traces"]] == [known[2].id] * 2
    assert [x["source"] for x in data["identical"][0]["traces"]] == ["path2.csv", "copy.csv"]
    assert [(p["a"]["index"], p["b"]["index"]) for p in data["pairs"]] == [(5, 13), (7, 14)]
    assert data["pairs"][1]["b"]["source"] == "cut.csv" and data["pairs"][1]["reasons"] == [CORRELATED]
    with pytest.raises(TracegenError) as err:
        found.to_data(known[:-1])
    assert err.value.field == "traces"


# --------------------------------------------------------------------------------------------------
# the score against the definition


@pytest.mark.parametrize("seed", range(40))
def test_fft_score_matches_brute_force_over_lags(seed):
    rng = np.random.default_rng(seed)
    n, m = int(rng.integers(30, 70)), int(rng.integers(20, 60))
    a = rng.normal(size=n)
    if seed % 2:  # half the cases hold a noisy copy, so the best lag is a real peak rather than noise
        start = int(rng.integers(0, n - 10))
        take = min(m, n - start)
        b = rng.normal(size=m)
        b[:take] = a[start:start + take] + 0.3 * rng.normal(size=take)
    else:
        b = rng.normal(size=m)
    if seed % 4 == 2:  # a flat from a third on (pinned at a cap): lags meeting only that have no correlation
        a[n // 3:] = 0.5
    if seed % 4 == 3:  # far from zero, as log levels are: the sums must not cancel
        a += 1e4
        b -= 3e4
    a[rng.random(n) < 0.15] = np.nan
    b[rng.random(m) < 0.15] = np.nan
    # up to most of the shorter series: the FFT is then shorter than a full linear correlation and lags
    # that cannot qualify wrap around onto others, which must not count
    min_pairs = int(rng.integers(5, 0.7 * min(n, m)))
    corr, lag, pairs = lagged_corr(a, b, min_pairs)
    ref = brute_best(a, b, min_pairs)
    assert corr == pytest.approx(ref[0], abs=1e-9)
    assert (lag, pairs) == ref[1:]


def test_lags_where_one_side_is_constant_do_not_count():
    # a varies only at its first sample, so only lags whose overlap holds it have a correlation (np.corrcoef
    # is undefined on a constant); there b is low, so every defined correlation is negative
    a = np.zeros(50)
    a[0] = 5.0
    b = np.random.default_rng(8).normal(size=30)
    b[:11] -= 5.0
    corr, lag, pairs = lagged_corr(a, b, 20)
    ref = brute_best(a, b, 20)
    assert ref[0] < 0
    assert corr == pytest.approx(ref[0], abs=1e-9)
    assert (lag, pairs) == ref[1:]


def test_reported_score_is_the_definition_on_prewhitened_bandwidth():
    bw = np.exp(log_bandwidth(5, 500))
    bw[rng_mask(500, 0.05, 11)] = np.nan
    other = bw[60:360] * np.exp(np.random.default_rng(3).normal(0.0, 0.05, 300))
    traces = [measured(bw, "a.csv"), measured(other, "b.csv")]
    found = find_duplicates(traces, min_corr=0.5)
    (pair,) = found.pairs
    # overlap rule: (pairs + 1) * step >= max(120 s, 0.5 * 300 s)
    ref = brute_best(prewhitened(bw), prewhitened(other), 149)
    assert pair.corr == pytest.approx(ref[0], abs=1e-9)
    assert (pair.lag_s, pair.overlap_s) == (float(ref[1]), float(ref[2] + 1))


def test_overlap_threshold_is_inclusive_and_counts_samples():
    # b's first 150 samples are a's last 150 (a random walk in log bandwidth, so its steps are white): the
    # copy's only lag overlaps by exactly 150 s, which meets 150 s and misses 150.5 s
    rng = np.random.default_rng(4)
    a = np.log(5e6) + np.cumsum(rng.normal(0.0, 0.1, 300))
    b = np.concatenate((a[150:], a[-1] + np.cumsum(rng.normal(0.0, 0.1, 150))))
    traces = [measured(np.exp(a), "a.csv"), measured(np.exp(b), "b.csv")]
    (pair,) = find_duplicates(traces, min_overlap_s=150.0, min_overlap_share=0.0).pairs
    assert (pair.lag_s, pair.overlap_s) == (150.0, 150.0) and pair.corr == pytest.approx(1.0, abs=1e-12)
    assert find_duplicates(traces, min_overlap_s=150.5, min_overlap_share=0.0).pairs == []
    assert find_duplicates(traces, min_overlap_s=0.0, min_overlap_share=0.5).pairs == [pair]
    assert find_duplicates(traces, min_overlap_s=0.0, min_overlap_share=0.51).pairs == []


def rng_mask(n: int, share: float, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).random(n) < share


# --------------------------------------------------------------------------------------------------
# unrelated persistent series


def test_unrelated_random_walks_are_not_flagged():
    # integrated AR(1) increments: smooth, strongly persistent log bandwidth
    walks = [np.log(5e6) + np.cumsum(scipy.signal.lfilter([1.0], [1.0, -0.8],
                                                         np.random.default_rng(100 + s).normal(0.0, 0.05, 600)))
             for s in range(16)]
    found = find_duplicates([measured(np.exp(w), f"walk{k}.csv") for k, w in enumerate(walks)])
    assert found.pairs == [] and found.identical == []
    # why differencing: the same score on the levels calls some unrelated pairs copies (spurious correlation of
    # integrated series, Granger & Newbold 1974, from memory); on the differences none comes near
    levels = [lagged_corr(walks[i], walks[j], 300)[0] for i in range(16) for j in range(i + 1, 16)]
    steps = [lagged_corr(np.diff(walks[i]), np.diff(walks[j]), 299)[0] for i in range(16) for j in range(i + 1, 16)]
    assert max(levels) > 0.95
    assert max(steps) < 0.6


# --------------------------------------------------------------------------------------------------
# one recording, overlapping in time or not


def two(start_a: str | None, start_b: str | None, *, part_a=None, part_b=None, key: str = "calendar_start",
        n: int = 600) -> list[Trace]:
    """Two unrelated traces of one file with the given starts and parts."""
    out = []
    for seed, start, part in ((1, start_a, part_a), (2, start_b, part_b)):
        prov = {k: v for k, v in ((key, start), ("part", part)) if v is not None}
        out.append(measured(np.exp(log_bandwidth(seed, n)), "one.csv", **prov))
    return out


@pytest.mark.parametrize("start_b, flagged", [
    ("2026-03-01T10:05:00+00:00", True),     # 10:00-10:10 and 10:05-10:15
    ("2026-03-01T11:00:00+00:00", False),    # an hour apart
    ("2026-03-01T10:10:00+00:00", False),    # back to back: touching is not overlapping
    ("2026-03-01T09:55:00Z", True),          # ISO 8601 with Z, before a
    ("2026-03-01T12:05:00+02:00", True),     # the same instant as 10:05 UTC (ISO 8601 offset)
])
def test_full_starts_are_compared(start_b, flagged):
    found = find_duplicates(two("2026-03-01T10:00:00+00:00", start_b))
    assert [(p.a, p.b, p.reasons) for p in found.pairs] == ([(0, 1, (SAME_RECORDING,))] if flagged else [])


def test_ping_start_key_counts_too():
    found = find_duplicates(two("2026-03-01T10:00:00+00:00", "2026-03-01T10:20:00+00:00", key="start"))
    assert found.pairs == []


@pytest.mark.parametrize("start", [None, "2026-03-01"])
def test_unknown_starts_flag_the_same_part_only(start):
    same = find_duplicates(two(start, start, part_a="run-1", part_b="run-1"))
    assert [(p.a, p.b, p.reasons) for p in same.pairs] == [(0, 1, (SAME_RECORDING,))]
    whole = find_duplicates(two(start, start))
    assert [(p.a, p.b) for p in whole.pairs] == [(0, 1)]
    parts = find_duplicates(two(start, start, part_a="run-1", part_b="run-2"))
    assert parts.pairs == []
    assert any(n.startswith("1 pair of different parts of one recording") for n in parts.notes)


def test_one_full_start_and_one_day_fall_back_to_parts():
    found = find_duplicates(two("2026-03-01T10:00:00+00:00", "2026-03-01", part_a="run-1", part_b="run-2"))
    assert found.pairs == [] and any("different parts" in n for n in found.notes)


def test_recording_from_source_without_provenance():
    def bare(seed: int, source: str) -> Trace:
        return Trace.from_columns(np.arange(300.0), bandwidth_bps=np.exp(log_bandwidth(seed, 300)), source=source)

    found = find_duplicates([bare(1, "x.csv#run-1"), bare(2, "x.csv#run-2"), bare(3, "x.csv"), bare(4, "x.csv"),
                             bare(5, "")])
    assert [(p.a, p.b) for p in found.pairs] == [(2, 3)]
    # run-1 against run-2, and each of the two part-less x.csv against each part: 5 pairs of different parts
    assert any(n.startswith("5 pairs of different parts") for n in found.notes)


def test_synthetic_recording_is_model_seed_and_index():
    def synthetic(seed: int, index: int, data_seed: int) -> Trace:
        prov = {"model_sha256": sha("model"), "seed": seed, "index": index}
        return Trace.from_columns(np.arange(300.0), bandwidth_bps=np.exp(log_bandwidth(data_seed, 300)),
                                  origin="synthetic", source=f"m#{index}", provenance=prov)

    found = find_duplicates([synthetic(0, 1, 1), synthetic(0, 1, 2), synthetic(0, 2, 3), synthetic(1, 1, 4)])
    assert [(p.a, p.b, p.reasons) for p in found.pairs] == [(0, 1, (SAME_RECORDING,))]


def test_unreadable_start_is_noted():
    found = find_duplicates(two("2026-03-01Tbroken", "2026-03-01T10:00:00+00:00"))
    assert [(p.a, p.b) for p in found.pairs] == [(0, 1)]  # unknown start, both whole files
    assert any("could not be read as ISO 8601" in n for n in found.notes)


# --------------------------------------------------------------------------------------------------
# arguments


@pytest.mark.parametrize("kwargs, field", [
    ({"min_corr": 0.0}, "min_corr"),
    ({"min_corr": 1.5}, "min_corr"),
    ({"min_corr": math.nan}, "min_corr"),
    ({"min_corr": True}, "min_corr"),
    ({"min_overlap_s": -1.0}, "min_overlap_s"),
    ({"min_overlap_share": -0.1}, "min_overlap_share"),
    ({"min_overlap_share": 1.5}, "min_overlap_share"),
    ({"step_s": 0.0}, "step_s"),
])
def test_bad_arguments_name_their_field(kwargs, field):
    with pytest.raises(TracegenError) as err:
        find_duplicates(two(None, None, n=200), **kwargs)
    assert err.value.field == field


@pytest.mark.parametrize("traces", [[], ["not a trace"]])
def test_bad_trace_lists(traces):
    with pytest.raises(TracegenError) as err:
        find_duplicates(traces)
    assert err.value.field == "traces"


def test_min_corr_one_still_finds_an_exact_copy_of_the_samples():
    bw = np.exp(log_bandwidth(9, 400))
    a = measured(bw, "a.csv")
    b = Trace.from_columns(np.arange(400.0), bandwidth_bps=bw, rtt_ms=np.full(400, 30.0), source="b.csv")
    found = find_duplicates([a, b], min_corr=1.0)
    assert [(p.a, p.b, p.reasons) for p in found.pairs] == [(0, 1, (CORRELATED,))]
