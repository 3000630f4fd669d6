"""Event model: cell changes, the no-label detection rule, and the fitted rates and marks.

Test data: hand-made traces, two test-only samplers with planted events whose parameters are written
here, and the demo world's own ground truth (truth.json), which the demo simulator records itself.
Closed forms used (from memory):
- elementary renewal theorem: a renewal process with mean gap m has rate 1 / m; its count over T has
  variance about T var(gap) / m^3 (renewal central limit theorem);
- log-normal: P(L > x) = 1 - Phi((ln x - mu) / sigma); the MLE of (mu, sigma) is the mean and sd of
  ln L, with standard errors sigma / sqrt(n) and sigma / sqrt(2 n);
- a binomial proportion has standard error sqrt(q (1 - q) / n);
- ln L given L >= x is a normal truncated below at ln x (scipy.stats.truncnorm gives its mean and sd).
"""

from __future__ import annotations

import json
from pathlib import Path
import math

import numpy as np
import pytest
from scipy import stats

from tracegen.catalog import Catalog
from tracegen.demo import build_demo
from tracegen.errors import TracegenError
from tracegen.fit.events import (EventModel, cell_changes, detect_handovers, fit_events, handover_times,
                                 outage_runs)


# --- cell labels ----------------------------------------------------------------------------------
def test_cell_changes_on_a_hand_made_trace():
    t = np.arange(12.0) * 2.0
    cell = ["A", "A", None, "A", "B", "B", None, float("nan"), "C", "C", None, "C"]
    # by hand: A..A across a None is no change; A -> B at sample 4; B -> C: the last B is sample 5, so
    # the change is at the first sample after it (6, where the interruption starts); C, None, C is none
    assert cell_changes(t, cell).tolist() == [8.0, 12.0]
    assert handover_times({"t_s": t, "bandwidth_bps": np.full(12, 1e6), "rtt_ms": np.full(12, 30.0),
                           "cell": cell}).tolist() == [8.0, 12.0]
    assert cell_changes(t[:2], ["A", None]).size == 0
    with pytest.raises(TracegenError, match="'cell'"):
        cell_changes(t, ["A"])


# --- detection on planted events ------------------------------------------------------------------
HANDOVERS_S = [100.0, 220.0, 340.0, 460.0, 580.0, 700.0, 820.0]
INTERRUPTION_SAMPLES = {340.0: 3, 700.0: 2}  # handovers that interrupt, in 1 s samples
SPIKE_ONLY_S, LEVEL_ONLY_S, LONG_OUTAGE_S = 160.0, 280.0, (400.0, 430.0)


def planted_trace(rng: np.random.Generator) -> dict:
    """Test-only sampler: 900 one-second samples with handovers at HANDOVERS_S.

    Between events log bandwidth is a level plus N(0, 0.08) noise and RTT is 40 ms x exp(N(0, 0.1)).
    A handover multiplies that second's RTT by 4 and moves the level by 0.7 (alternating up and down);
    two of them interrupt (bandwidth 0, RTT unknown). Decoys: an RTT spike with no level change, a level
    change with no RTT spike, and a 30 s outage (longer than the 10 s a handover may interrupt).
    """
    n = 900
    t = np.arange(n, dtype=float)
    level = np.full(n, np.log(8e6))
    for k, h in enumerate(HANDOVERS_S + [LEVEL_ONLY_S]):
        level[int(h) + 1:] += 0.7 if k % 2 == 0 else -0.7
    bw = np.exp(level + rng.normal(0, 0.08, n))
    rtt = 40.0 * np.exp(rng.normal(0, 0.1, n))
    for h in HANDOVERS_S + [SPIKE_ONLY_S]:
        rtt[int(h)] *= 4.0
    rtt[339] *= 4.0  # the second before an interruption can spike too: the event is the interruption
    for h, k in INTERRUPTION_SAMPLES.items():
        bw[int(h):int(h) + k], rtt[int(h):int(h) + k] = 0.0, np.nan
    a, b = (int(v) for v in LONG_OUTAGE_S)
    bw[a:b], rtt[a:b] = 0.0, np.nan
    return {"t_s": t, "bandwidth_bps": bw, "rtt_ms": rtt}


def test_detection_finds_the_planted_handovers_within_one_second():
    cols = planted_trace(np.random.default_rng(3))
    found = detect_handovers(cols["t_s"], cols["bandwidth_bps"], cols["rtt_ms"])
    assert len(found) == len(HANDOVERS_S), found
    assert np.all(np.abs(found - np.array(HANDOVERS_S)) <= 1.0), found
    assert handover_times(cols).tolist() == found.tolist()  # no cell column: detection
    # the same trace fitted: 7 events, one interruption (3 s) longer than 2 s, the 30 s outage standalone
    m = fit_events([cols])
    assert (m.source, m.n_events, m.n_outages) == ("detected", 7, 1)
    assert m.share_with_interruption == pytest.approx(2 / 7)
    assert m.failure_probability == pytest.approx(1 / 7)
    assert m.failure_mu_log_s == pytest.approx(math.log(3.0))
    assert m.outage_mu_log_s == pytest.approx(math.log(30.0))
    assert m.hours == pytest.approx(900 / 3600)
    # alternating +-0.7 jumps: four up, three down
    assert m.level_change_mean_log == pytest.approx(0.1, abs=0.05)


def test_detection_thresholds_are_checked_and_named():
    cols = planted_trace(np.random.default_rng(3))
    with pytest.raises(TracegenError, match="'rtt_factor'.*-1"):
        detect_handovers(cols["t_s"], cols["bandwidth_bps"], cols["rtt_ms"], rtt_factor=-1)
    with pytest.raises(TracegenError, match="'t_s'.*5 s"):
        detect_handovers(np.array([0.0, 5.0, 5.0]), np.ones(3), np.ones(3))
    # a higher level-change threshold than the planted 0.7, and no dip test, leave the interruptions only
    only = detect_handovers(cols["t_s"], cols["bandwidth_bps"], cols["rtt_ms"], level_change=1.0, dip_ratio=1e-12)
    assert only.tolist() == sorted(INTERRUPTION_SAMPLES)


# --- fitted rates and marks from planted events ---------------------------------------------------
STEP_S, TRACE_S = 0.1, 1800.0
N_EVENT_TRACES, N_OUTAGE_TRACES = 60, 40
GAP_MIN_S, GAP_MEAN_EXTRA_S = 20.0, 100.0        # event gaps: 20 s + Exponential(mean 100 s)
Q_INTERRUPT, INT_MU, INT_SIGMA = 0.4, 0.5, 0.6    # share interrupting; log-normal of seconds
JUMP_MEAN, JUMP_SD = 0.1, 0.4                      # level change at an event, natural log
POST_PROBS = np.array([0.0, 0.2, 0.5, 0.3])        # state after an event; state 0 is the outage state
OUT_GAP_MIN_S, OUT_GAP_MEAN_EXTRA_S = 60.0, 300.0  # standalone outages: start-to-start gaps
OUT_MU, OUT_SIGMA = 2.0, 0.5


def planted_events(rng: np.random.Generator) -> tuple[list[dict], dict]:
    """Test-only sampler on a 0.1 s grid, with cell labels so that event times are known exactly.

    Event traces: handovers as a renewal process; each changes the cell label and moves the log level
    by N(JUMP_MEAN, JUMP_SD); with probability Q_INTERRUPT it interrupts for a log-normal time (bandwidth
    0, label unknown, state 0); the decoded state after it is drawn from POST_PROBS. Outage traces: one
    cell throughout and standalone outages with log-normal lengths.
    """
    n = int(TRACE_S / STEP_S)
    t = np.arange(n) * STEP_S
    traces, truth = [], {"events": 0, "interruptions": [], "outages": []}
    for _ in range(N_EVENT_TRACES):
        starts = np.cumsum(GAP_MIN_S + rng.exponential(GAP_MEAN_EXTRA_S, 64))
        starts = starts[starts < TRACE_S - 30.0]
        idx = np.floor(starts / STEP_S + 0.5).astype(np.int64)
        level = np.full(n, np.log(2e7))
        cell = np.empty(n, dtype=object)
        state = np.full(n, rng.choice(4, p=POST_PROBS), dtype=np.int64)
        cell[:] = "c0"
        for k, i in enumerate(idx):  # a loop over planted events
            level[i:] += rng.normal(JUMP_MEAN, JUMP_SD)
            cell[i:] = f"c{k + 1}"
            state[i:] = rng.choice(4, p=POST_PROBS)
            if rng.random() < Q_INTERRUPT:
                m = max(1, int(np.floor(rng.lognormal(INT_MU, INT_SIGMA) / STEP_S + 0.5)))
                cell[i:i + m], state[i:i + m], level[i:i + m] = None, 0, -np.inf
                truth["interruptions"].append(m * STEP_S)
            else:
                truth["interruptions"].append(0.0)
        truth["events"] += len(idx)
        bw = np.exp(level + rng.normal(0, 0.05, n))
        traces.append({"t_s": t, "bandwidth_bps": bw, "rtt_ms": np.full(n, 30.0), "cell": cell, "state": state})
    for _ in range(N_OUTAGE_TRACES):
        starts = 10.0 + np.cumsum(OUT_GAP_MIN_S + rng.exponential(OUT_GAP_MEAN_EXTRA_S, 32))
        lengths = rng.lognormal(OUT_MU, OUT_SIGMA, len(starts))
        keep = starts + lengths < TRACE_S - 10.0
        bw = np.exp(np.log(5e6) + rng.normal(0, 0.05, n))
        cell = np.full(n, "solo", dtype=object)
        for s, length in zip(starts[keep], lengths[keep]):
            i, m = int(np.floor(s / STEP_S + 0.5)), max(1, int(np.floor(length / STEP_S + 0.5)))
            bw[i:i + m], cell[i:i + m] = 0.0, None
            truth["outages"].append(m * STEP_S)
        traces.append({"t_s": t, "bandwidth_bps": bw, "rtt_ms": np.full(n, 30.0), "cell": cell,
                       "state": np.ones(n, dtype=np.int64)})
    return traces, truth


@pytest.fixture(scope="module")
def planted():
    traces, truth = planted_events(np.random.default_rng(99))
    return fit_events(traces, outage_state=0, n_states=4), truth


def test_rate_recovered_within_renewal_error(planted):
    m, truth = planted
    hours_events, hours_all = N_EVENT_TRACES * TRACE_S / 3600, (N_EVENT_TRACES + N_OUTAGE_TRACES) * TRACE_S / 3600
    assert m.source == "cell"
    assert m.hours == pytest.approx(hours_all)
    assert m.n_events == truth["events"]
    gap_mean, gap_var = GAP_MIN_S + GAP_MEAN_EXTRA_S, GAP_MEAN_EXTRA_S**2
    expected = 3600.0 / gap_mean * hours_events / hours_all  # 30 per hour of event traces
    se = math.sqrt(hours_events * 3600 * gap_var / gap_mean**3) / hours_all
    assert abs(m.rate_per_hour - expected) < 3 * se, (m.rate_per_hour, expected, se)


def test_interruption_and_failure_marks_recovered(planted):
    m, truth = planted
    n = m.n_events
    assert abs(m.share_with_interruption - Q_INTERRUPT) < 3 * math.sqrt(Q_INTERRUPT * (1 - Q_INTERRUPT) / n)
    n_int = round(m.share_with_interruption * n)
    planted_lengths = np.array(truth["interruptions"])
    assert n_int == np.sum(planted_lengths > 0)
    # measured exactly: the fit's log-normal is that of the planted lengths themselves ...
    assert m.interruption_mu_log_s == pytest.approx(np.log(planted_lengths[planted_lengths > 0]).mean())
    # ... and those recover the sampler's parameters within sampling error
    assert abs(m.interruption_mu_log_s - INT_MU) < 3 * INT_SIGMA / math.sqrt(n_int)
    assert abs(m.interruption_sigma_log_s - INT_SIGMA) < 3 * INT_SIGMA / math.sqrt(2 * n_int)
    # lengths sit on the 0.1 s grid: "longer than 2 s" is a drawn length of at least 2.05 s
    cut = math.log(2.0 + STEP_S / 2)
    q_fail = Q_INTERRUPT * stats.norm.sf((cut - INT_MU) / INT_SIGMA)  # log-normal survival, ~0.145
    assert abs(m.failure_probability - q_fail) < 3 * math.sqrt(q_fail * (1 - q_fail) / n)
    a = (cut - INT_MU) / INT_SIGMA
    tail = stats.truncnorm(a, np.inf, loc=INT_MU, scale=INT_SIGMA)
    n_fail = round(m.failure_probability * n)
    assert abs(m.failure_mu_log_s - tail.mean()) < 3 * tail.std() / math.sqrt(n_fail)
    assert abs(m.failure_sigma_log_s - tail.std()) < 3 * tail.std() / math.sqrt(2 * n_fail) + 0.02


def test_what_follows_recovered(planted):
    m, _ = planted
    n = m.n_level_changes
    assert n == m.n_events
    # the 5 s medians add about 1.25 * 0.05 / sqrt(50) of noise per side: small beside JUMP_SD
    assert abs(m.level_change_mean_log - JUMP_MEAN) < 3 * JUMP_SD / math.sqrt(n)
    assert abs(m.level_change_sd_log - JUMP_SD) < 3 * JUMP_SD / math.sqrt(2 * n)
    probs = np.array(m.post_state_probs)
    assert probs.shape == (4,) and probs[0] == 0.0
    se = np.sqrt(POST_PROBS * (1 - POST_PROBS) / m.n_events)
    assert np.all(np.abs(probs - POST_PROBS) < 3 * se + 1e-12), (probs, POST_PROBS)


def test_standalone_outages_recovered(planted):
    m, truth = planted
    hours_out, hours_all = N_OUTAGE_TRACES * TRACE_S / 3600, (N_EVENT_TRACES + N_OUTAGE_TRACES) * TRACE_S / 3600
    assert m.n_outages == len(truth["outages"])
    gap_mean, gap_var = OUT_GAP_MIN_S + OUT_GAP_MEAN_EXTRA_S, OUT_GAP_MEAN_EXTRA_S**2
    expected = 3600.0 / gap_mean * hours_out / hours_all  # 10 per hour of outage traces
    se = math.sqrt(hours_out * 3600 * gap_var / gap_mean**3) / hours_all
    assert abs(m.outage_rate_per_hour - expected) < 3 * se
    k = m.n_outages
    assert abs(m.outage_mu_log_s - OUT_MU) < 3 * OUT_SIGMA / math.sqrt(k)
    assert abs(m.outage_sigma_log_s - OUT_SIGMA) < 3 * OUT_SIGMA / math.sqrt(2 * k)


def test_dict_round_trip_and_validation(planted):
    m, _ = planted
    back = EventModel.from_dict(json.loads(json.dumps(m.to_dict())))
    assert back == m
    assert "handovers/h" in m.summary()
    good = m.to_dict()
    cases = {"failure_probability": 1.5, "rate_per_hour": -1.0, "source": "guessed", "n_events": 2.5,
             "outage_sigma_log_s": -0.1, "post_state_probs": [0.5, 0.6]}
    for name, value in cases.items():
        with pytest.raises(TracegenError, match=f"'{name}'") as err:
            EventModel.from_dict({**good, name: value})
        assert str(value if not isinstance(value, list) else 1.1).split("]")[0] in str(err.value)
    with pytest.raises(TracegenError, match="'outage_mu_log_s'"):
        EventModel.from_dict({**good, "outage_mu_log_s": None})
    with pytest.raises(TracegenError, match="'hours'"):
        EventModel.from_dict({k: v for k, v in good.items() if k != "hours"})


def test_nothing_known_gives_none_and_runs_are_exact():
    unknown = {"t_s": np.arange(5.0), "bandwidth_bps": np.full(5, np.nan), "rtt_ms": np.full(5, 20.0)}
    assert fit_events([unknown]) is None
    assert fit_events([]) is None
    # by hand: samples 1-2 and 5 are below the floor, sample 3 unknown; the last run holds one step
    a, b, start, end = outage_runs(np.arange(6.0), np.array([5e6, 0.0, 10.0, np.nan, 5e6, 0.0]))
    assert (a.tolist(), b.tolist(), start.tolist(), end.tolist()) == ([1, 5], [3, 6], [1.0, 5.0], [3.0, 6.0])


# --- the demo world's handovers, found without its cell labels ----------------------------------
def _matched(found: np.ndarray, truth: np.ndarray, tol_s: float = 2.0) -> int:
    """One-to-one matches within tol_s, closest pairs first."""
    if not (len(found) and len(truth)):
        return 0
    d = np.abs(found[:, None] - truth[None, :])
    used_f, used_t, hits = set(), set(), 0
    for i, j in np.argwhere(d <= tol_s)[np.argsort(d[d <= tol_s], kind="stable")]:
        if i not in used_f and j not in used_t:
            used_f.add(i), used_t.add(j)
            hits += 1
    return hits


def _demo_columns(seed: int) -> list[dict]:
    """The demo catalog of ``seed`` as columns per trace, with its true handover times."""
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        build_demo(root, seed=seed, sessions=36, duration_s=300, progress=False, fit_model=False)
        truth = json.loads((root / "demo-sources" / "truth.json").read_text())["files"]
        out = []
        for tr in Catalog.open(root).traces():
            f = truth[tr.provenance["file"]]
            shift = f["first_sample_s"]  # truth is in session seconds; a trace's t_s starts at its first sample
            out.append({"file": tr.provenance["file"], "t_s": np.asarray(tr["t_s"]),
                        "bandwidth_bps": np.asarray(tr["bandwidth_bps"]), "rtt_ms": np.asarray(tr["rtt_ms"]),
                        "cell": tr.data.get("cell"),
                        "handovers": np.asarray(f["handovers_s"], float) - shift,
                        "failures": np.asarray(f["handover_failures_s"], float) - shift})
    return out


@pytest.fixture(scope="module")
def demo():
    return _demo_columns(7)


def _score(demo, truth_keys, where=lambda d: True, **detection):
    hits = found_n = truth_n = 0
    for d in demo:
        if not where(d) or np.all(np.isnan(d["bandwidth_bps"])):
            continue  # ping traces: no bandwidth, nothing to detect from
        found = detect_handovers(d["t_s"], d["bandwidth_bps"], d["rtt_ms"], **detection)  # cell dropped
        truth = np.concatenate([d[k] for k in truth_keys])
        hits += _matched(found, truth)
        found_n += len(found)
        truth_n += len(truth)
    return hits / max(found_n, 1), hits / max(truth_n, 1)


# Measured with the defaults, the cell column dropped, +-2 s one-to-one matching, all handover attempts
# (handovers_s plus handover_failures_s) in the per-second logger traces (CSV/TSV: bandwidth and RTT each
# second). The thresholds were chosen on this seed: precision 0.91, recall 0.91. Other seeds, same
# defaults: seed 11 0.83 / 0.81, seed 23 0.88 / 0.85. RTCP traces (irregular reports, a noisy sender
# rate estimate, outages as silences): about 0.47 / 0.71, so they are scored apart.
def test_demo_handovers_detected_without_cell_labels(demo):
    precision, recall = _score(demo, ("handovers", "failures"), where=lambda d: not d["file"].endswith(".jsonl"))
    assert precision >= 0.9 and recall >= 0.9, (precision, recall)


def test_demo_handover_detection_holds_on_other_seeds():
    # Seeds 7, 11 and 23 pooled (the logger traces, cell column dropped): precision 0.87, recall 0.85
    # with the defaults; the 0.9 reached on seed 7 alone does not fully carry over.
    pooled = []
    for seed in (7, 11, 23):
        pooled += _demo_columns(seed)
    precision, recall = _score(pooled, ("handovers", "failures"), where=lambda d: not d["file"].endswith(".jsonl"))
    assert precision >= 0.84 and recall >= 0.84, (precision, recall)


def test_demo_rtcp_handovers_are_found_more_often_than_not(demo):
    precision, recall = _score(demo, ("handovers", "failures"), where=lambda d: d["file"].endswith(".jsonl"))
    assert precision >= 0.4 and recall >= 0.6, (precision, recall)


def test_demo_failed_handovers_detected_without_cell_labels(demo):
    logged = lambda d: not d["file"].endswith(".jsonl")  # outages are samples there, not silences
    _, recall = _score(demo, ("failures",), where=logged)
    assert recall >= 0.9, recall
    precision, _ = _score(demo, ("handovers", "failures"), rtt_factor=1e12, deep_dip_ratio=1e-12)  # outages only
    assert precision >= 0.9, precision


def test_demo_cell_changes_match_the_truth(demo):
    # measured: precision 0.996 (278 of 279), recall 0.959 (278 of 290) over the 27 traces with labels
    hits = found_n = truth_n = 0
    for d in demo:
        if d["cell"] is None:
            continue
        found = cell_changes(d["t_s"], d["cell"])
        truth = np.concatenate([d["handovers"], d["failures"]])
        hits, found_n, truth_n = hits + _matched(found, truth), found_n + len(found), truth_n + len(truth)
    assert hits / found_n >= 0.9 and hits / truth_n >= 0.9, (hits, found_n, truth_n)
