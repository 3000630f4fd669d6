"""Features for comparing trace sets: per window, per trace and over time.

Everything here reads traces put on one common step by :func:`prepare` (the coarsest nominal step among
them unless one is given; traces on another step, and irregular ones, go through ``Trace.resample``).

Notation. ``bw`` is bandwidth in bit/s; a sample is *known* when ``bw`` is not NaN and an *outage* when
it is known and below ``OUTAGE_FLOOR_BPS`` (10 kbit/s). ``lc = log(max(bw, floor))`` (natural log) is the
clamped log bandwidth: outages sit at ``log(floor)``, unknown samples stay NaN. The *trace median* is the
median of ``log(bw)`` over the trace's known non-outage samples (NaN when it has none).

Windows (:func:`window_features`). Tumbling, non-overlapping windows of ``m = round(scale_s / step)``
samples from each trace's first sample; a trailing partial window is dropped, so is a window with fewer
than half its samples of known bandwidth (``2 * known < m``); a trace shorter than one window gives none.
Both are counted in the table's notes. All windows of all traces form one ``(n_windows, m)`` array and
every feature is a row-wise, NaN-aware numpy reduction:

- ``mean_log_bw`` / ``median_log_bw``: mean / median of ``log(bw)`` over known non-outage samples (NaN
  when the window is all outage);
- ``cv_bw``: population standard deviation (ddof 0) over mean of the known bandwidth, outage values as
  they are (NaN when the mean is 0);
- ``p5_log_bw``: 5th percentile of ``lc`` over known samples;
- ``acf1_log_bw`` / ``acf5_log_bw``: sample autocorrelation of ``lc`` at lags 1 and 5 samples within the
  window, biased estimator: ``sum_t x_t x_{t+k} / sum_t x_t^2`` with ``x = lc - mean(lc)``. Unknown
  samples are left out of the mean and their products (that is ``statsmodels.tsa.stattools.acf`` with
  ``missing="conservative"``, the same as its default when nothing is missing). NaN when the window's
  known ``lc`` is constant or shorter than lag + 1;
- ``outage_share``: outage samples over known samples;
- ``longest_outage_s``: the longest run of consecutive outage samples times the step (an unknown sample
  ends a run; 0 without outages);
- ``rtt_p50_ms`` / ``rtt_p95_ms``: percentiles of the known RTT (NaN if none);
- ``loss_mean``: mean of the known loss (NaN if none);
- ``level_changes``: sign changes of ``lc`` minus the trace median inside the window, ignoring samples
  exactly on the median and unknown ones (the sign before and after them is compared).

Percentiles are numpy's default ("linear", Hyndman and Fan type 7), medians the 50th percentile.

Per trace (:func:`trace_features`, one row per trace, ``scale_s = inf``, ``start_s = 0``):
``trace_mean_log_bw`` (mean ``log(bw)`` over known non-outage samples), ``spread_of_window_means`` (sample
standard deviation, ddof 1, of the finite ``mean_log_bw`` of the trace's ``window_s`` windows; NaN with
fewer than two), ``mean_dwell_above_s`` / ``mean_dwell_below_s`` (mean length in seconds of the runs of
``lc`` above / below the trace median). A run is *complete* when the samples on both sides of it are
known; runs cut by a trace's start or end or by unknown samples are left out unless the trace has no
complete run of that side, in which case the cut ones are averaged.

Over time: :func:`pooled_acf` is the autocorrelation of ``lc`` pooled over traces (each trace demeaned by
its own mean over known samples, unknown samples left out of the products, lag products summed over
traces and divided by the pooled lag-0 sum; NaN at a lag without any pair of known samples).
:func:`dwell_runs` gives the complete runs of ``lc`` above / below a threshold the caller chooses (runs
touching a trace end or unknown samples are left out). :func:`event_rates` counts outage runs per hour of
known bandwidth, and handovers per hour from the ``event`` column (marks ``handover`` and
``handover-failure``) where a trace has one, else from changes of known ``cell`` labels, else nothing;
the handover rate's exposure is the time with known bandwidth or a known cell label of the traces that
have either source, and the rate is NaN when no trace has one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd
import scipy.fft

from ..errors import TracegenError
from ..fit.events import cell_changes
from ..trace import OUTAGE_FLOOR_BPS, Trace

DEFAULT_SCALES_S = (10.0, 60.0, 300.0)
WINDOW_FEATURES = ("mean_log_bw", "median_log_bw", "cv_bw", "p5_log_bw", "acf1_log_bw", "acf5_log_bw",
                   "outage_share", "longest_outage_s", "rtt_p50_ms", "rtt_p95_ms", "loss_mean", "level_changes")
TRACE_FEATURES = ("trace_mean_log_bw", "spread_of_window_means", "mean_dwell_above_s", "mean_dwell_below_s")
HANDOVER_MARKS = ("handover", "handover-failure")

_REL = 1e-6            # relative tolerance for "the same step"
_BLOCK = 1 << 21       # samples per block of windows (bounds the temporaries' memory)
_LOG_FLOOR = math.log(OUTAGE_FLOOR_BPS)


@dataclass(frozen=True)
class Prepared:
    """Traces on one common step (``step_s``); ``notes`` says what was done to get there."""

    traces: tuple[Trace, ...]
    step_s: float
    notes: tuple[str, ...]


@dataclass(frozen=True)
class WindowTable:
    """One row per window (or per trace): ``values[i, j]`` is feature ``features[j]`` of row i, which
    comes from ``Prepared.traces[trace[i]]`` and starts at ``start_s[i]`` (trace time)."""

    scale_s: float
    features: tuple[str, ...]
    values: np.ndarray
    trace: np.ndarray
    start_s: np.ndarray
    notes: tuple[str, ...]

    def __len__(self) -> int:
        return int(self.values.shape[0])


# --------------------------------------------------------------------------------------------------
# a common step


def _fmt(x: float) -> str:
    return f"{x:g}"


def _is_regular(t: np.ndarray, step: float) -> bool:
    if len(t) < 2:
        return True
    return bool(np.all(np.abs(np.diff(t) - step) <= _REL * step))


def prepare(traces: Sequence[Trace], step_s: float | None = None) -> Prepared:
    """Put ``traces`` on one step: ``step_s`` if given, else the coarsest nominal step among them.

    A trace whose nominal step differs (relative 1e-6) or whose spacing is uneven (gaps included) is
    resampled with ``Trace.resample``; the notes say how many and from what step. The order is kept:
    ``Prepared.traces[i]`` is ``traces[i]`` (possibly resampled)."""
    traces = list(traces)
    if not traces:
        raise TracegenError("no traces to compare", field="traces", hint="check the selection or the folder")
    for i, tr in enumerate(traces):
        if not isinstance(tr, Trace):
            raise TracegenError(f"item {i} is a {type(tr).__name__}, not a Trace", field="traces")
    if step_s is None:
        steps = [tr.step_s for tr in traces if len(tr) > 1]
        if not steps:
            raise TracegenError("every trace has a single sample, so no step can be read from them",
                                field="step_s", hint="give the step explicitly")
        step = float(max(steps))
    else:
        step = float(step_s)
        if not (math.isfinite(step) and step > 0):
            raise TracegenError(f"step {step_s!r} s must be a positive number", field="step_s")
        finest = min((tr.step_s for tr in traces if len(tr) > 1), default=step)
        if step < finest * (1 - _REL):  # finer than every trace: no detail to gain, only memory to lose
            raise TracegenError(f"step {_fmt(step)} s is finer than every trace's own step (the finest is "
                                f"{_fmt(finest)} s)", field="step_s", hint=f"give a step of at least {_fmt(finest)} s")
    out: list[Trace] = []
    moved: dict[str, int] = {}
    irregular = 0
    for tr in traces:  # a loop over traces
        own = tr.step_s
        if len(tr) > 1 and abs(own - step) > _REL * step:
            moved[_fmt(own)] = moved.get(_fmt(own), 0) + 1
            out.append(tr.resample(step))
        elif not _is_regular(tr["t_s"], step):
            irregular += 1
            out.append(tr.resample(step))
        else:
            out.append(tr)
    steps = sorted(moved, key=float)
    n_moved = sum(moved.values())
    notes = []
    if n_moved:
        span = steps[0] if len(steps) == 1 else f"{steps[0]} to {steps[-1]}"
        notes.append(f"resampled {n_moved} trace{'s' if n_moved > 1 else ''} from {span} s to {_fmt(step)} s")
    if irregular:
        notes.append(f"resampled {irregular} irregular trace{'s' if irregular > 1 else ''} (uneven spacing or "
                     f"gaps) onto a regular {_fmt(step)} s grid")
    return Prepared(tuple(out), step, tuple(notes))


# --------------------------------------------------------------------------------------------------
# small array helpers


def _check_prepared(prep: Prepared) -> None:
    if not isinstance(prep, Prepared):
        raise TracegenError(f"expected the result of prepare(), got a {type(prep).__name__}", field="prep")
    if not (math.isfinite(prep.step_s) and prep.step_s > 0):
        raise TracegenError(f"step {prep.step_s!r} s must be a positive number", field="step_s")


def _clamped_log(bw: np.ndarray) -> np.ndarray:
    """log(max(bw, floor)); NaN stays NaN."""
    return np.log(np.maximum(bw, OUTAGE_FLOOR_BPS))


def _trace_median(bw: np.ndarray) -> float:
    """Median of log(bw) over known non-outage samples (NaN when there is none)."""
    ok = bw[bw >= OUTAGE_FLOOR_BPS]  # NaN compares False
    return float(np.percentile(np.log(ok), 50.0)) if ok.size else math.nan


def _row_quantile(srt: np.ndarray, first: np.ndarray, count: np.ndarray, q: float) -> np.ndarray:
    """The ``q`` quantile (numpy's linear method) of ``srt[i, first[i]:first[i] + count[i]]``, rows sorted
    ascending; NaN where ``count`` is 0. Same arithmetic as ``numpy.quantile``."""
    v = (count - 1) * q
    lo = np.floor(v)
    top = v >= count - 1
    lo_i = np.where(top, count - 1, lo).astype(np.int64)
    hi_i = np.where(top, count - 1, lo + 1).astype(np.int64)
    empty = count <= 0
    lo_i = np.where(empty, 0, lo_i) + first
    hi_i = np.where(empty, 0, hi_i) + first
    last = srt.shape[1] - 1
    a = _pick(srt, np.minimum(lo_i, last))
    b = _pick(srt, np.minimum(hi_i, last))
    g = v - lo
    d = b - a
    with np.errstate(invalid="ignore"):
        r = np.where(g >= 0.5, b - d * (1.0 - g), a + d * g)
    return np.where(empty, np.nan, r)


def _mean_known(x: np.ndarray, known: np.ndarray, count: np.ndarray) -> np.ndarray:
    s = np.where(known, x, 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, s / np.maximum(count, 1), np.nan)


def _flat_runs(idx: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Runs of consecutive flat indices ``idx`` (sorted) into a C-contiguous array of rows of ``m``, cut
    at row ends: the first and the last flat index of each run."""
    if not idx.size:
        return idx, idx
    row = idx // m
    new = np.empty(idx.size, dtype=bool)
    new[0] = True
    new[1:] = (idx[1:] != idx[:-1] + 1) | (row[1:] != row[:-1])
    first = np.flatnonzero(new)
    last = np.append(first[1:], idx.size) - 1
    return idx[first], idx[last]


def _longest_true_run(mask: np.ndarray) -> np.ndarray:
    """Longest run of True in each row of a 2-D boolean array."""
    r, m = mask.shape
    a, b = _flat_runs(np.flatnonzero(mask), m)
    best = np.zeros(r, dtype=np.int64)
    if a.size:
        row = a // m
        first = np.flatnonzero(np.concatenate(([True], row[1:] != row[:-1])))
        best[row[first]] = np.maximum.reduceat(b - a + 1, first)
    return best


def _level_crossings(sign: np.ndarray) -> np.ndarray:
    """Per row, the number of sign changes between consecutive nonzero entries of an int8 array of -1, 0
    and 1: changes between neighbours, plus those across runs of zeros (few: samples exactly on the
    median or unknown), whose two sides are compared."""
    r, m = sign.shape
    count = np.count_nonzero(sign[:, 1:] * sign[:, :-1] < 0, axis=1)
    flat = sign.ravel()
    a, b = _flat_runs(np.flatnonzero(flat == 0), m)
    if a.size:
        rw = a // m
        inside = (a % m > 0) & (b % m < m - 1)
        a, b, rw = a[inside], b[inside], rw[inside]
        cross = flat[a - 1].astype(np.int16) * flat[b + 1] < 0
        count = count + np.bincount(rw[cross], minlength=r)
    return count


def _pick(a: np.ndarray, col: np.ndarray) -> np.ndarray:
    """``a[i, col[i]]`` for every row i of a C-contiguous 2-D array."""
    return a.ravel()[np.arange(a.shape[0]) * a.shape[1] + col]


def _lag_acf(x: np.ndarray, c0: np.ndarray, lag: int, const: np.ndarray) -> np.ndarray:
    if lag >= x.shape[1]:
        return np.full(x.shape[0], np.nan)
    ck = np.einsum("ij,ij->i", x[:, lag:], x[:, :-lag])
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(const, np.nan, ck / np.where(const, 1.0, c0))


# --------------------------------------------------------------------------------------------------
# window features


def _window_block(bw: np.ndarray, rtt: np.ndarray, loss: np.ndarray, med: np.ndarray, step: float) -> np.ndarray:
    """The WINDOW_FEATURES of a block of windows (rows); ``med`` is each row's trace median."""
    r, m = bw.shape
    out = np.empty((r, len(WINDOW_FEATURES)))
    known = ~np.isnan(bw)
    k = known.sum(axis=1)
    outage = bw < OUTAGE_FLOOR_BPS            # NaN compares False: only known samples
    n_out = outage.sum(axis=1)
    ok = known & ~outage
    n_ok = k - n_out
    lc = _clamped_log(bw)
    srt = np.sort(lc, axis=1)                 # NaN last; outages (at log floor) first
    # mean, median of log bw over known non-outage samples
    out[:, 0] = _mean_known(lc, ok, n_ok)
    out[:, 1] = _row_quantile(srt, n_out, n_ok, 0.5)
    # cv of the known bandwidth
    mean_bw = _mean_known(bw, known, k)
    dev = np.where(known, bw - mean_bw[:, None], 0.0)
    sd = np.sqrt(np.einsum("ij,ij->i", dev, dev) / np.maximum(k, 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        out[:, 2] = np.where(mean_bw > 0, sd / np.where(mean_bw > 0, mean_bw, 1.0), np.nan)
    out[:, 3] = _row_quantile(srt, np.zeros_like(k), k, 0.05)
    # autocorrelation of lc within the window
    lc_mean = _mean_known(lc, known, k)
    x = np.where(known, lc - lc_mean[:, None], 0.0)
    c0 = np.einsum("ij,ij->i", x, x)
    const = (k < 1) | (_pick(srt, np.maximum(k - 1, 0)) == srt[:, 0])
    out[:, 4] = _lag_acf(x, c0, 1, const)
    out[:, 5] = _lag_acf(x, c0, 5, const)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[:, 6] = n_out / k
    out[:, 7] = _longest_true_run(outage) * step
    # RTT percentiles, mean loss
    rk = np.count_nonzero(~np.isnan(rtt), axis=1)
    rs = np.sort(rtt, axis=1)
    zero = np.zeros_like(rk)
    out[:, 8] = _row_quantile(rs, zero, rk, 0.5)
    out[:, 9] = _row_quantile(rs, zero, rk, 0.95)
    lknown = ~np.isnan(loss)
    out[:, 10] = _mean_known(loss, lknown, lknown.sum(axis=1))
    # crossings of the trace median
    with np.errstate(invalid="ignore"):
        sign = (lc > med[:, None]).astype(np.int8) - (lc < med[:, None]).astype(np.int8)  # NaN: 0
    out[:, 11] = np.where(np.isnan(med), np.nan, _level_crossings(sign))
    return out


def _trace_list(ids: Sequence[tuple[int, str]], limit: int = 5) -> str:
    shown = ", ".join(f"{i} ({tid})" for i, tid in ids[:limit])
    return shown + (f" and {len(ids) - limit} more" if len(ids) > limit else "")


@dataclass(frozen=True)
class _Rows:
    """The windows of some traces before their notes: rows, their trace numbers (counted from ``first``,
    the number of the first trace given), and what was left out."""

    values: np.ndarray
    trace: np.ndarray
    start: np.ndarray
    short: tuple[tuple[int, str], ...]
    partial: int
    dropped: int
    total: int


def _check_scale(prep: Prepared, scale_s: float) -> int:
    _check_prepared(prep)
    if not (isinstance(scale_s, (int, float, np.integer, np.floating)) and math.isfinite(scale_s) and scale_s > 0):
        raise TracegenError(f"window scale {scale_s!r} s must be a positive number", field="scale_s")
    m = int(round(scale_s / prep.step_s))
    if m < 1:
        raise TracegenError(f"window scale {scale_s:g} s is shorter than the step {prep.step_s:g} s", field="scale_s",
                            hint="use a longer window or a finer step")
    return m


def window_rows(job: tuple[Prepared, int, int]) -> _Rows:
    """The windows of ``m`` samples of the prepared traces, numbered from ``first`` (a task that
    tracegen.parallel can run on a chunk of traces anywhere)."""
    prep, m, first = job
    parts: dict[str, list[np.ndarray]] = {"bw": [], "rtt": [], "loss": [], "med": [], "trace": [], "start": []}
    short: list[tuple[int, str]] = []
    partial = 0
    for i, tr in enumerate(prep.traces, start=first):  # a loop over traces: slices and per-trace medians only
        n = len(tr)
        nw = n // m
        if nw == 0:
            short.append((i, tr.id))
            continue
        partial += n % m > 0
        cut = nw * m
        bw = np.asarray(tr["bandwidth_bps"])
        parts["bw"].append(bw[:cut])
        parts["rtt"].append(np.asarray(tr["rtt_ms"])[:cut])
        parts["loss"].append(np.asarray(tr["loss"])[:cut])
        parts["med"].append(np.full(nw, _trace_median(bw)))
        parts["trace"].append(np.full(nw, i, dtype=np.int64))
        parts["start"].append(np.asarray(tr["t_s"])[:cut:m])
    if not parts["bw"]:
        return _Rows(np.zeros((0, len(WINDOW_FEATURES))), np.zeros(0, np.int64), np.zeros(0), tuple(short), partial, 0, 0)
    bw = np.concatenate(parts["bw"]).reshape(-1, m)
    rtt = np.concatenate(parts["rtt"]).reshape(-1, m)
    loss = np.concatenate(parts["loss"]).reshape(-1, m)
    med = np.concatenate(parts["med"])
    trace = np.concatenate(parts["trace"])
    start = np.concatenate(parts["start"]).astype(np.float64)
    keep = 2 * np.count_nonzero(~np.isnan(bw), axis=1) >= m
    dropped = int(keep.size - np.count_nonzero(keep))
    if dropped:
        bw, rtt, loss, med, trace, start = bw[keep], rtt[keep], loss[keep], med[keep], trace[keep], start[keep]
    rows = max(1, _BLOCK // m)
    blocks = [_window_block(bw[a:a + rows], rtt[a:a + rows], loss[a:a + rows], med[a:a + rows], prep.step_s)
              for a in range(0, bw.shape[0], rows)]  # a loop over blocks of windows
    values = np.concatenate(blocks) if blocks else np.zeros((0, len(WINDOW_FEATURES)))
    return _Rows(values, trace, start, tuple(short), partial, dropped, int(keep.size))


def _chunked(prep: Prepared, m: int, runner) -> list[_Rows]:
    """Rows of all traces: in this process, or in chunks of traces on ``runner`` (tracegen.parallel)."""
    if runner is None or runner.kind == "serial" or len(prep.traces) < 2:
        return [window_rows((prep, m, 0))]
    from ..parallel import chunks

    jobs = [(Prepared(prep.traces[a:a + n], prep.step_s, ()), m, a) for a, n in chunks(len(prep.traces), runner.workers)]
    return list(runner.map(window_rows, jobs))


def window_features(prep: Prepared, scale_s: float, runner=None) -> WindowTable:
    """WINDOW_FEATURES of every tumbling ``scale_s`` window of every prepared trace (module docstring).
    With a ``runner`` (tracegen.parallel) chunks of traces are done there; the table is the same."""
    m = _check_scale(prep, scale_s)
    step = prep.step_s
    parts = _chunked(prep, m, runner)
    notes: list[str] = []
    if abs(m * step - scale_s) > _REL * scale_s:
        notes.append(f"windows of {scale_s:g} s are {m} samples of {step:g} s = {m * step:g} s")
    short = [x for p in parts for x in p.short]
    partial = sum(p.partial for p in parts)
    dropped, total = sum(p.dropped for p in parts), sum(p.total for p in parts)
    if short:
        notes.append(f"{len(short)} trace{'s' if len(short) > 1 else ''} shorter than one {scale_s:g} s window "
                     f"give no windows: {_trace_list(short)}")
    if partial:
        notes.append(f"left out the trailing partial {scale_s:g} s window of {partial} "
                     f"trace{'s' if partial > 1 else ''}")
    if dropped:
        notes.append(f"dropped {dropped} of {total} windows of {scale_s:g} s with less than half their "
                     f"bandwidth known")
    values = np.concatenate([p.values for p in parts])
    trace = np.concatenate([p.trace for p in parts])
    start = np.concatenate([p.start for p in parts])
    return WindowTable(float(scale_s), WINDOW_FEATURES, values, trace, start, tuple(notes))


# --------------------------------------------------------------------------------------------------
# runs of the clamped log bandwidth


def _joined(prep: Prepared) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """All traces' bandwidth in one series, each trace preceded by a NaN and the last followed by one
    (so a run never crosses from one trace into the next); the trace index of every element (-1 on the
    separators) and the offset of each trace's first sample."""
    n = np.array([len(tr) for tr in prep.traces], dtype=np.int64)
    first = np.cumsum(n + 1) - n
    total = int(n.sum() + n.size + 1)
    bw = np.full(total, np.nan)
    tid = np.full(total, -1, dtype=np.int64)
    for i, tr in enumerate(prep.traces):  # a loop over traces
        bw[first[i]:first[i] + n[i]] = tr["bandwidth_bps"]
        tid[first[i]:first[i] + n[i]] = i
    return bw, tid, first


def _runs(mask: np.ndarray, known: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of True in ``mask``: starts, lengths, and whether both neighbours are known (complete).
    ``mask`` must be False at both ends."""
    edges = np.flatnonzero(np.diff(mask.astype(np.int8)))
    a, b = edges[0::2] + 1, edges[1::2] + 1
    return a, b - a, known[a - 1] & known[b]


def dwell_runs(prep: Prepared, threshold_log_bw: float) -> tuple[np.ndarray, np.ndarray]:
    """Lengths in seconds of the complete runs of ``lc`` above and below ``threshold_log_bw`` (natural log
    of bit/s), in trace order; runs touching a trace end or an unknown sample are left out."""
    _check_prepared(prep)
    if not (isinstance(threshold_log_bw, (int, float, np.integer, np.floating)) and math.isfinite(threshold_log_bw)):
        raise TracegenError(f"threshold {threshold_log_bw!r} must be a finite log bandwidth",
                            field="threshold_log_bw", hint="pass e.g. the real set's median log bandwidth")
    bw, _, _ = _joined(prep)
    lc = _clamped_log(bw)
    known = ~np.isnan(lc)
    res = []
    for mask in (lc > threshold_log_bw, lc < threshold_log_bw):  # above, below
        _, length, complete = _runs(mask, known)
        res.append(length[complete] * prep.step_s)
    return res[0], res[1]


def trace_features(prep: Prepared, window_s: float = 60.0, runner=None) -> WindowTable:
    """TRACE_FEATURES, one row per prepared trace (module docstring)."""
    _check_prepared(prep)
    n_tr = len(prep.traces)
    windows = window_features(prep, window_s, runner)
    notes = [f"{window_s:g} s windows: {n}" for n in windows.notes]
    values = np.full((n_tr, len(TRACE_FEATURES)), np.nan)
    # spread of the window means (ddof 1), grouped by trace
    wm = windows.values[:, WINDOW_FEATURES.index("mean_log_bw")]
    fin = np.isfinite(wm)
    wt, wm = windows.trace[fin], wm[fin]
    cnt = np.bincount(wt, minlength=n_tr)
    mu = np.bincount(wt, weights=wm, minlength=n_tr) / np.maximum(cnt, 1)
    ss = np.bincount(wt, weights=(wm - mu[wt]) ** 2, minlength=n_tr)
    with np.errstate(invalid="ignore", divide="ignore"):
        values[:, 1] = np.where(cnt >= 2, ss / np.maximum(cnt - 1, 1), np.nan) ** 0.5
    if n_tr == 0:
        return WindowTable(math.inf, TRACE_FEATURES, values, np.zeros(0, np.int64), np.zeros(0), tuple(notes))
    bw, tid, first = _joined(prep)
    lc = _clamped_log(bw)
    known = ~np.isnan(lc)
    ok = bw >= OUTAGE_FLOOR_BPS
    lok = np.where(ok, lc, 0.0)
    n_ok = np.bincount(tid[ok], minlength=n_tr)
    with np.errstate(invalid="ignore", divide="ignore"):
        values[:, 0] = np.where(n_ok > 0, np.bincount(tid[ok], weights=lok[ok], minlength=n_tr) / np.maximum(n_ok, 1),
                                np.nan)
    med = np.array([_trace_median(np.asarray(tr["bandwidth_bps"])) for tr in prep.traces])  # over traces
    thr = np.where(tid >= 0, med[np.maximum(tid, 0)], np.nan)
    with np.errstate(invalid="ignore"):
        above, below = lc > thr, lc < thr
    for col, mask in ((2, above), (3, below)):
        start, length, complete = _runs(mask, known)
        t_run = tid[start]
        secs = length * prep.step_s
        nc = np.bincount(t_run[complete], minlength=n_tr)
        sc = np.bincount(t_run[complete], weights=secs[complete], minlength=n_tr)
        na = np.bincount(t_run, minlength=n_tr)
        sa = np.bincount(t_run, weights=secs, minlength=n_tr)
        with np.errstate(invalid="ignore", divide="ignore"):
            values[:, col] = np.where(nc > 0, sc / np.maximum(nc, 1), np.where(na > 0, sa / np.maximum(na, 1), np.nan))
    none = np.isnan(med)
    if none.any():
        notes.append(f"{int(none.sum())} trace{'s' if none.sum() > 1 else ''} without a known non-outage "
                     f"bandwidth sample have no level or dwell features")
    return WindowTable(math.inf, TRACE_FEATURES, values, np.arange(n_tr, dtype=np.int64), np.zeros(n_tr),
                       tuple(notes))


# --------------------------------------------------------------------------------------------------
# over time


def pooled_acf(prep: Prepared, max_lag_s: float = 120.0) -> tuple[np.ndarray, np.ndarray]:
    """Autocorrelation of ``lc`` pooled over the traces at lags 0, step, ..., ``max_lag_s`` (module
    docstring): ``(lags_s, acf)``."""
    _check_prepared(prep)
    if not (isinstance(max_lag_s, (int, float, np.integer, np.floating)) and math.isfinite(max_lag_s)
            and max_lag_s >= 0):
        raise TracegenError(f"maximum lag {max_lag_s!r} s must be a number >= 0", field="max_lag_s")
    lag = int(round(max_lag_s / prep.step_s))
    num = np.zeros(lag + 1)
    pairs = np.zeros(lag + 1)
    for tr in prep.traces:  # a loop over traces; each trace's lags by one FFT
        lc = _clamped_log(np.asarray(tr["bandwidth_bps"]))
        known = ~np.isnan(lc)
        if not known.any():
            continue
        x = np.where(known, lc - lc[known].mean(), 0.0)
        size = scipy.fft.next_fast_len(len(x) + lag + 1, real=True)
        for arr, acc in ((x, num), (known.astype(np.float64), pairs)):
            f = scipy.fft.rfft(arr, size)
            c = scipy.fft.irfft(f * np.conj(f), size)[: lag + 1]
            acc += c
    with np.errstate(invalid="ignore", divide="ignore"):
        acf = num / num[0]
    acf = np.where(np.rint(pairs) >= 1, acf, np.nan)
    if not num[0] > 0:
        acf[:] = np.nan
    else:
        acf[0] = 1.0
    return np.arange(lag + 1) * prep.step_s, acf


def _handover_count(tr: Trace) -> tuple[int, np.ndarray] | None:
    """Handovers of one trace and the samples that count as exposure, or None when unknowable."""
    bw_known = ~np.isnan(np.asarray(tr["bandwidth_bps"]))
    ev = tr.data.get("event")
    cell = tr.data.get("cell")
    cell_known = None if cell is None else ~pd.isna(np.asarray(cell, dtype=object))
    exposure = bw_known if cell_known is None else bw_known | cell_known
    if ev is not None:
        ev = np.asarray(ev, dtype=object)
        marked = ev[~pd.isna(ev)]
        if not marked.size:
            return 0, exposure
        tokens = np.array(";".join(str(v) for v in marked.tolist()).split(";"))  # a loop over marks only
        return int(np.isin(tokens, HANDOVER_MARKS).sum()), exposure
    if cell_known is not None and cell_known.any():
        return int(cell_changes(np.asarray(tr["t_s"]), cell).size), exposure
    return None


def event_rates(prep: Prepared) -> dict[str, float]:
    """Outages and handovers per hour (module docstring): ``{"outages_per_hour", "handovers_per_hour",
    "hours"}``; ``hours`` is the time with known bandwidth."""
    _check_prepared(prep)
    step = prep.step_s
    bw, _, _ = _joined(prep)
    known = ~np.isnan(bw)
    hours = float(np.count_nonzero(known)) * step / 3600.0
    outage = bw < OUTAGE_FLOOR_BPS
    n_out = int(np.count_nonzero(np.diff(outage.astype(np.int8)) == 1))
    n_ho, ho_samples, any_source = 0, 0, False
    for tr in prep.traces:  # a loop over traces
        got = _handover_count(tr)
        if got is None:
            continue
        any_source = True
        n_ho += got[0]
        ho_samples += int(np.count_nonzero(got[1]))
    ho_hours = ho_samples * step / 3600.0
    return {
        "outages_per_hour": n_out / hours if hours > 0 else math.nan,
        "handovers_per_hour": n_ho / ho_hours if any_source and ho_hours > 0 else math.nan,
        "hours": hours,
    }
