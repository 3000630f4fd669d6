"""Handovers and outages as a marked point process: when events happen, how long they interrupt, what follows.

Event times. Where a trace has cell labels, a handover is a change between consecutive known labels
(unknown labels in between break nothing); its time is that of the first sample after the last sample
with the old label, so for ``A, None, None, B`` it is the first ``None``: where the interruption begins.
Without labels (or with none known) handovers are detected from the columns by this rule
(:func:`detect_handovers`), built on the signature a handover leaves in ~1 s samples:

- an *interruption*: a run of samples below OUTAGE_FLOOR_BPS lasting at most ``max_interruption_s``
  (10 s; longer runs are coverage outages, not handovers) is an event at the run's start, with no level
  test: a failed handover re-establishes on the strongest cell, often at the old level. A logger's
  silence (consecutive samples more than 1.5 steps apart, the gap at most ``max_interruption_s``) is
  one too, at the first missing step: a receiver that stops reporting lost its link;
- a *short deep dip*: one or two samples whose log bandwidth lies more than ``log(deep_dip_ratio)``
  (0.25, a factor 4) below the rolling median of a centred ``rtt_window_s`` (31 s) window: a
  sub-second interruption inside a 1 s sample;
- an *RTT spike*: RTT above ``rtt_factor`` (2.5) times the rolling median RTT of the same window, at a
  sample that is not an outage, together with either a level change (the median log bandwidth over the
  ``level_window_s`` (5 s) after differs from the median over the 5 s before by more than
  ``level_change``, 0.3 in natural log, a factor 1.35), a dip (bandwidth below ``dip_ratio`` (0.7) of
  its rolling median), or no bandwidth at all (an RTT-only trace): packets held through an interruption
  arrive late;
- candidates less than ``min_spacing_s`` (2 s) apart chain into one event, placed at the chain's first
  interruption start, else at its first candidate.
The thresholds were chosen on the demo world (seed 7) and are options; on real traces with handovers
of tens of milliseconds a 1 s series carries little of this signature, so prefer cell labels.

Marks. The interruption of an event is the outage run touching it (covering its time, starting within
one sample step after it, or ending at it), in seconds; 0 when none. A *failure* is an interruption
longer than ``failure_threshold_s`` (2 s: a successful handover interrupts for tens to hundreds of
milliseconds, a failed one until the link is re-established, seconds). Interruption lengths, failure
lengths and standalone outage lengths are each fitted by a log-normal (maximum likelihood: mean and
standard deviation of log seconds).

What follows. The level change of an event is the median log bandwidth over ``level_window_s`` after it
(after the interruption, if any) minus the median over ``level_window_s`` before it. With decoded level
states, the post-event state is the first known, non-outage state after the event within that window.
New level drawn how: a generator draws the post-event state from ``post_state_probs``, independent of
the pre-event state (with tens of events per fit a state-to-state table would leave most rows empty).

Standalone outages are outage runs that touch no event; their rate is per hour of known samples, and
their lengths (runs cut by a trace's start or end left out) get a log-normal. The exposure (``hours``)
is the time covered by samples with known bandwidth or a known cell label.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ..errors import TracegenError
from ..trace import GAP_FACTOR, OUTAGE_FLOOR_BPS

SOURCES = ("cell", "detected", "mixed")
_LOGNORMALS = ("interruption", "failure", "outage")


# --- small array helpers ------------------------------------------------------------------------
def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of equal values of a boolean array: starts, stops, values."""
    if mask.size == 0:
        return np.zeros(0, int), np.zeros(0, int), mask
    cut = np.flatnonzero(mask[1:] != mask[:-1]) + 1
    starts = np.concatenate(([0], cut))
    return starts, np.concatenate((cut, [mask.size])), mask[starts]


def _step_s(t: np.ndarray) -> float:
    return float(np.median(np.diff(t))) if len(t) > 1 else 1.0


def _durations_s(t: np.ndarray, step: float) -> np.ndarray:
    """How long each sample holds: to the next sample, but one step before a silence or at the end."""
    dt = np.append(np.diff(t), step)
    return np.where(dt > GAP_FACTOR * step, step, dt)


def outage_runs(t_s: np.ndarray, bandwidth_bps: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Runs of samples below OUTAGE_FLOOR_BPS: (first index, stop index, start s, end s).

    A run ends when the next sample starts (one step after its last sample at a silence or the end).
    Unknown (NaN) bandwidth is not an outage and ends a run.
    """
    t = np.asarray(t_s, dtype=np.float64)
    out = np.asarray(bandwidth_bps, dtype=np.float64) < OUTAGE_FLOOR_BPS
    edges = np.flatnonzero(np.diff(np.concatenate(([0], out.astype(np.int8), [0]))))
    a, b = edges[0::2], edges[1::2]
    if not a.size:
        return a, b, np.zeros(0), np.zeros(0)
    dur = _durations_s(t, _step_s(t))
    return a, b, t[a], t[b - 1] + dur[b - 1]


def _lognormal(x: np.ndarray) -> tuple[float | None, float | None]:
    x = np.asarray(x, dtype=np.float64)
    x = x[x > 0]
    if not x.size:
        return None, None
    lx = np.log(x)
    return float(lx.mean()), float(lx.std())


def _check_columns(columns: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    try:
        t = np.asarray(columns["t_s"], dtype=np.float64).reshape(-1)
    except KeyError:
        raise TracegenError("trace columns have no t_s", field="t_s") from None
    n = len(t)
    cols = []
    for name in ("bandwidth_bps", "rtt_ms"):
        v = columns.get(name)
        arr = np.full(n, np.nan) if v is None else np.asarray(v, dtype=np.float64).reshape(-1)
        if len(arr) != n:
            raise TracegenError(f"has {len(arr)} values but t_s has {n}", field=name)
        cols.append(arr)
    if n > 1 and not np.all(np.diff(t) > 0):
        i = int(np.flatnonzero(np.diff(t) <= 0)[0]) + 1
        raise TracegenError(f"time {t[i]:g} s does not increase after {t[i - 1]:g} s (sample {i})", field="t_s")
    return t, cols[0], cols[1]


def _labels_known(cell: Any, n: int) -> np.ndarray:
    lab = np.asarray(cell, dtype=object).reshape(-1)
    if len(lab) != n:
        raise TracegenError(f"has {len(lab)} values but t_s has {n}", field="cell")
    return lab


# --- event times --------------------------------------------------------------------------------
def cell_changes(t_s: np.ndarray, cell: Sequence[Any]) -> np.ndarray:
    """Times of changes between consecutive known cell labels (the first sample after the old label)."""
    t = np.asarray(t_s, dtype=np.float64)
    lab = _labels_known(cell, len(t))
    known = np.flatnonzero(~pd.isna(lab))
    if known.size < 2:
        return np.zeros(0)
    k = lab[known]
    change = np.flatnonzero(k[1:] != k[:-1])
    return t[known[change] + 1]


def detect_handovers(t_s: np.ndarray, bandwidth_bps: np.ndarray, rtt_ms: np.ndarray, *, rtt_factor: float = 2.5,
                     rtt_window_s: float = 31.0, level_window_s: float = 5.0, level_change: float = 0.3,
                     max_interruption_s: float = 10.0, min_spacing_s: float = 2.0,
                     dip_ratio: float = 0.7, deep_dip_ratio: float = 0.25) -> np.ndarray:
    """Handover times detected from bandwidth and RTT alone (the rule is in the module docstring)."""
    t, bw, rtt = _check_columns({"t_s": t_s, "bandwidth_bps": bandwidth_bps, "rtt_ms": rtt_ms})
    for name, v in (("rtt_factor", rtt_factor), ("rtt_window_s", rtt_window_s), ("level_window_s", level_window_s),
                    ("max_interruption_s", max_interruption_s)):
        if not (np.isfinite(v) and v > 0):
            raise TracegenError(f"value {v} must be a positive number", field=name)
    if not (np.isfinite(level_change) and level_change >= 0) or not (np.isfinite(min_spacing_s) and min_spacing_s >= 0):
        raise TracegenError(f"level change {level_change} and spacing {min_spacing_s} s must be >= 0",
                            field="level_change")
    if len(t) == 0:
        return np.zeros(0)
    a, b, start, end = outage_runs(t, bw)
    step = _step_s(t)
    dt = np.diff(t)
    silent = (dt > 1.5 * step) & (dt - step <= max_interruption_s)  # no samples at all: a logger's silence
    cand_t = [np.concatenate((start[end - start <= max_interruption_s], t[:-1][silent] + step))]
    out = bw < OUTAGE_FLOOR_BPS
    index = pd.to_timedelta(t, unit="s")
    med = pd.Series(rtt, index=index).rolling(pd.Timedelta(seconds=rtt_window_s), center=True,
                                              min_periods=3).median().to_numpy()
    with np.errstate(invalid="ignore"):
        spike = (rtt > rtt_factor * med) & ~out
    lb = np.where(bw >= OUTAGE_FLOOR_BPS, np.log(np.maximum(bw, OUTAGE_FLOOR_BPS)), np.nan)
    win = pd.Timedelta(seconds=level_window_s)
    before = pd.Series(lb, index=index).rolling(win, closed="left", min_periods=1).median().to_numpy()
    rev = pd.Series(lb[::-1], index=pd.to_timedelta(-t[::-1], unit="s"))
    after = rev.rolling(win, closed="left", min_periods=1).median().to_numpy()[::-1]  # (t, t + window]
    around = pd.Series(lb, index=index).rolling(pd.Timedelta(seconds=rtt_window_s), center=True,
                                                min_periods=3).median().to_numpy()
    with np.errstate(invalid="ignore"):
        stepped = np.abs(after - before) > level_change
        dipped = lb < around + np.log(dip_ratio)
        deep = lb < around + np.log(deep_dip_ratio)
    spike &= stepped | dipped | np.isnan(lb)
    # a deep dip of one or two samples is an interruption too (longer ones are fading or load)
    ds, de, dv = _runs(deep)
    short_deep = np.zeros(len(t), bool)
    keep = dv & (de - ds <= 2)
    short_deep[ds[keep]] = True
    cand_t.append(t[spike | short_deep])
    times = np.concatenate(cand_t)
    kind = np.concatenate([np.zeros(len(cand_t[0]), np.int8), np.ones(len(cand_t[1]), np.int8)])
    if not times.size:
        return np.zeros(0)
    order = np.argsort(times, kind="stable")
    times, kind = times[order], kind[order]
    chain = np.concatenate(([0], np.cumsum(np.diff(times) >= min_spacing_s)))
    pick = np.lexsort((times, kind, chain))  # per chain: interruptions first, then by time
    _, first = np.unique(chain[pick], return_index=True)
    return np.sort(times[pick[first]])


def handover_times(columns: Mapping[str, Any], **detection: float) -> np.ndarray:
    """Handover times of one trace: cell-label changes if it has known labels, else :func:`detect_handovers`."""
    return _times(columns, detection)[0]


def _times(columns: Mapping[str, Any], detection: Mapping[str, float]) -> tuple[np.ndarray, str]:
    t, bw, rtt = _check_columns(columns)
    cell = columns.get("cell")
    if cell is not None and bool(np.any(~pd.isna(_labels_known(cell, len(t))))):
        return cell_changes(t, cell), "cell"
    return detect_handovers(t, bw, rtt, **detection), "detected"


# --- the fitted model ---------------------------------------------------------------------------
@dataclass(frozen=True)
class EventModel:
    """Handovers (rate, interruption and failure marks, what follows) and standalone outages.

    Lengths are log-normal: ``*_mu_log_s`` / ``*_sigma_log_s`` are the mean and sd of log seconds
    (None when there was nothing to fit). ``level_change_*_log`` are in natural log of the bandwidth
    ratio after/before. ``post_state_probs[k]`` is the probability that the level after an event is
    state k. ``source`` says where the event times came from: "cell", "detected" or "mixed".
    """

    source: str
    hours: float
    n_events: int
    rate_per_hour: float
    share_with_interruption: float | None
    interruption_mu_log_s: float | None
    interruption_sigma_log_s: float | None
    failure_threshold_s: float
    failure_probability: float | None
    failure_mu_log_s: float | None
    failure_sigma_log_s: float | None
    n_level_changes: int
    level_change_mean_log: float | None
    level_change_sd_log: float | None
    post_state_probs: tuple[float, ...] | None
    n_outages: int
    outage_rate_per_hour: float
    outage_mu_log_s: float | None
    outage_sigma_log_s: float | None
    max_interruption_s: float

    def __post_init__(self) -> None:
        _validate(self.to_dict())

    def summary(self) -> str:
        """One line for people."""
        text = f"{self.rate_per_hour:.1f} handovers/h ({self.source}, {self.n_events} in {self.hours:.2f} h)"
        if self.failure_probability is not None:
            text += f", {self.share_with_interruption:.0%} interrupt, {self.failure_probability:.0%} fail"
        if self.level_change_mean_log is not None:
            text += f", level change {self.level_change_mean_log:+.2f} ± {self.level_change_sd_log:.2f} (log)"
        return text + f"; standalone outages {self.outage_rate_per_hour:.1f}/h"

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able values."""
        d = asdict(self)
        d["post_state_probs"] = None if self.post_state_probs is None else list(self.post_state_probs)
        return d

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> "EventModel":
        """Rebuild from :meth:`to_dict` output; raises TracegenError naming the bad field."""
        if not isinstance(data, Mapping):
            raise TracegenError(f"an event model is a mapping, not {type(data).__name__}")
        names = list(cls.__dataclass_fields__)
        missing = [f for f in names if f not in data]
        if missing:
            raise TracegenError(f"missing from the event model: {missing}", field=missing[0])
        extra = sorted(set(data) - set(names))
        if extra:
            raise TracegenError(f"unknown field(s) {extra} in the event model", field=extra[0])
        _validate(data)
        d = dict(data)
        if d["post_state_probs"] is not None:
            d["post_state_probs"] = tuple(float(v) for v in d["post_state_probs"])
        return cls(**d)


def _num(d: Mapping[str, Any], name: str, *, lo: float | None = None, hi: float | None = None,
         none: bool = False, whole: bool = False) -> None:
    v = d[name]
    if v is None and none:
        return
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not np.isfinite(v):
        raise TracegenError(f"value {v!r} is not a finite number", field=name)
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        raise TracegenError(f"value {v} is outside [{lo}, {hi}]", field=name)
    if whole and int(v) != v:
        raise TracegenError(f"value {v} is not a whole number", field=name)


def _validate(d: Mapping[str, Any]) -> None:
    if d["source"] not in SOURCES:
        raise TracegenError(f"source {d['source']!r} is not one of {SOURCES}", field="source")
    for name in ("hours", "rate_per_hour", "outage_rate_per_hour"):
        _num(d, name, lo=0.0)
    for name in ("n_events", "n_level_changes", "n_outages"):
        _num(d, name, lo=0, whole=True)
    for name in ("failure_threshold_s", "max_interruption_s"):
        _num(d, name, lo=0.0)
    for name in ("share_with_interruption", "failure_probability"):
        _num(d, name, lo=0.0, hi=1.0, none=True)
    for what in _LOGNORMALS:
        _num(d, f"{what}_mu_log_s", none=True)
        _num(d, f"{what}_sigma_log_s", lo=0.0, none=True)
        if (d[f"{what}_mu_log_s"] is None) != (d[f"{what}_sigma_log_s"] is None):
            raise TracegenError(f"{what} mu and sigma must both be given or both be null", field=f"{what}_mu_log_s")
    _num(d, "level_change_mean_log", none=True)
    _num(d, "level_change_sd_log", lo=0.0, none=True)
    probs = d["post_state_probs"]
    if probs is not None:
        if isinstance(probs, (str, bytes)) or not isinstance(probs, Sequence) or not probs:
            raise TracegenError(f"value {probs!r} is not a non-empty list of probabilities", field="post_state_probs")
        for i, v in enumerate(probs):
            _num({f"post_state_probs[{i}]": v}, f"post_state_probs[{i}]", lo=0.0, hi=1.0)
        if abs(sum(probs) - 1.0) > 1e-6:
            raise TracegenError(f"probabilities sum to {sum(probs):.6g}, not 1", field="post_state_probs")


# --- fitting ------------------------------------------------------------------------------------
def _median_in(t: np.ndarray, lb: np.ndarray, lo: float, hi: float, left_closed: bool) -> float:
    i = np.searchsorted(t, lo, side="left" if left_closed else "right")
    j = np.searchsorted(t, hi, side="left" if left_closed else "right")
    v = lb[i:j]
    v = v[~np.isnan(v)]
    return float(np.median(v)) if v.size else float("nan")


def fit_events(traces_columns: Sequence[Mapping[str, Any]], *, outage_state: int | None = None,
               n_states: int | None = None, failure_threshold_s: float = 2.0, max_interruption_s: float = 10.0,
               level_window_s: float = 5.0, detection: Mapping[str, float] | None = None) -> EventModel | None:
    """Fit the event model to traces given as columns (module docstring: rule, marks, what follows).

    Each mapping has ``t_s``, ``bandwidth_bps``, ``rtt_ms``, optionally ``cell`` (labels) and ``state``
    (decoded level state per sample, -1 unknown; ``outage_state`` is the outage's state, if any).
    ``detection`` passes thresholds on to :func:`detect_handovers`. None when no sample is known.
    """
    if not (np.isfinite(failure_threshold_s) and failure_threshold_s >= 0):
        raise TracegenError(f"failure threshold {failure_threshold_s} s must be >= 0", field="failure_threshold_s")
    if not (np.isfinite(level_window_s) and level_window_s > 0):
        raise TracegenError(f"level window {level_window_s} s must be > 0", field="level_window_s")
    detection = {**dict(detection or {}), "max_interruption_s": max_interruption_s, "level_window_s": level_window_s}
    hours, sources = 0.0, set()
    interrupt, changes, post, standalone, standalone_len = [], [], [], 0, []
    for cols in traces_columns:  # a loop over traces, then over each trace's events
        t, bw, rtt = _check_columns(cols)
        if not len(t):
            continue
        step = _step_s(t)
        cell = cols.get("cell")
        known = ~np.isnan(bw)
        if cell is not None:
            known |= ~pd.isna(_labels_known(cell, len(t)))
        hours += float(np.sum(_durations_s(t, step)[known])) / 3600.0
        times, source = _times(cols, detection)
        if source == "detected" and not np.any(~np.isnan(bw)):
            continue  # nothing to detect from: no exposure either
        sources.add(source)
        a, b, start, end = outage_runs(t, bw)
        # an outage run touches an event when it covers it, starts within a step after it or ends at it
        touch = (start[None, :] <= times[:, None] + step + 1e-9) & (end[None, :] >= times[:, None] - 1e-9)
        length = np.where(touch, end - start, 0.0).max(axis=1, initial=0.0)
        resume = np.where(touch, end, -np.inf).max(axis=1, initial=-np.inf)
        interrupt.append(length)
        free = ~touch.any(axis=0)
        standalone += int(free.sum())
        inner = free & (a > 0) & (b < len(t))
        standalone_len.append((end - start)[inner])
        lb = np.where(bw >= OUTAGE_FLOOR_BPS, np.log(np.maximum(bw, OUTAGE_FLOOR_BPS)), np.nan)
        state = cols.get("state")
        state = None if state is None else np.asarray(state).reshape(-1)
        if state is not None and len(state) != len(t):
            raise TracegenError(f"has {len(state)} values but t_s has {len(t)}", field="state")
        for te, r in zip(times.tolist(), resume.tolist()):
            before = _median_in(t, lb, te - level_window_s, te, True)
            lo = r if np.isfinite(r) else te
            after = _median_in(t, lb, lo, lo + level_window_s, np.isfinite(r))
            if np.isfinite(before) and np.isfinite(after):
                changes.append(after - before)
            if state is not None:
                i = np.searchsorted(t, lo, side="left" if np.isfinite(r) else "right")
                j = np.searchsorted(t, lo + level_window_s, side="right")
                s = state[i:j]
                s = s[(s >= 0) & (s != outage_state)] if outage_state is not None else s[s >= 0]
                if s.size:
                    post.append(int(s[0]))
    if hours <= 0:
        return None
    lengths = np.concatenate(interrupt) if interrupt else np.zeros(0)
    n = len(lengths)
    fails = lengths[lengths > failure_threshold_s]
    i_mu, i_sd = _lognormal(lengths)
    f_mu, f_sd = _lognormal(fails)
    o_mu, o_sd = _lognormal(np.concatenate(standalone_len) if standalone_len else np.zeros(0))
    probs = None
    if post:
        k = max(post) + 1 if n_states is None else int(n_states)
        if max(post) >= k:
            raise TracegenError(f"decoded state {max(post)} is outside 0..{k - 1}", field="state")
        probs = tuple(float(v) for v in np.bincount(post, minlength=k) / len(post))
    ch = np.asarray(changes)
    return EventModel(
        source=sources.pop() if len(sources) == 1 else ("mixed" if sources else "detected"),
        hours=hours, n_events=n, rate_per_hour=n / hours,
        share_with_interruption=float(np.mean(lengths > 0)) if n else None,
        interruption_mu_log_s=i_mu, interruption_sigma_log_s=i_sd, failure_threshold_s=float(failure_threshold_s),
        failure_probability=float(len(fails) / n) if n else None, failure_mu_log_s=f_mu, failure_sigma_log_s=f_sd,
        n_level_changes=len(ch), level_change_mean_log=float(ch.mean()) if ch.size else None,
        level_change_sd_log=float(ch.std(ddof=1)) if ch.size > 1 else (0.0 if ch.size else None),
        post_state_probs=probs, n_outages=standalone, outage_rate_per_hour=standalone / hours,
        outage_mu_log_s=o_mu, outage_sigma_log_s=o_sd, max_interruption_s=float(max_interruption_s))
