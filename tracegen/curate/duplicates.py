"""Duplicates and near copies in a set of traces.

Three checks, each on its own evidence:

* **identical**: traces with the same ``Trace.id``, i.e. the same samples whatever their source or tags.
* **same recording**: traces read from one recording whose time spans overlap. The recording is the
  provenance ``file_sha256``, else the ``source`` without its ``#part`` suffix; a synthetic trace's is its
  (``model_sha256``, ``seed``, ``index``). When both traces carry a full start time (provenance
  ``calendar_start`` or ``start`` with more than the day) their spans ``[start, start + duration]`` are
  compared. Otherwise (no start, or the day only, as ingest keeps by default) two traces of the same
  part, or both without a part, are the same recording read twice and flagged; different parts cannot be
  told apart and are only counted in the notes.
* **correlated**: all traces go on one step (``features.prepare``) and each becomes the first differences
  of its clamped log bandwidth ``log(max(bw, OUTAGE_FLOOR_BPS))``, unknown samples masked out.
  Differencing is the usual prewhitening before cross-correlating persistent series (Box-Jenkins
  practice): without it two unrelated, slowly varying traces correlate highly at some lag. A pair's score
  is the largest Pearson correlation over lags, each computed over that lag's overlap only, among lags
  whose overlap reaches ``max(min_overlap_s, min_overlap_share * shorter duration)``. The overlap of a lag
  is (known difference pairs + 1) * step: the time its samples span when unbroken. All lags come at once
  from six FFT cross-correlations (masked normalised cross-correlation, Padfield, "Masked object
  registration in the Fourier domain", IEEE Trans. Image Processing 2012). A coarse pass first scores
  every pair on a step coarse enough for the longest trace to fit ``COARSE_POINTS`` samples (overlapping
  windows of two coarse steps, and two sampling phases, so that a copy offset by part of a coarse step
  is not smeared out); only pairs scoring at least ``min_corr - COARSE_MARGIN`` are scored again at the
  common step.

A pair's ``lag_s`` says how the two line up: b's sample at trace time t matches a's at t + lag_s, so a
positive lag means b starts lag_s seconds into a (a leads).
"""

from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import scipy.fft

from ..compare.features import prepare
from ..compare.gap import common_step
from ..errors import TracegenError
from ..trace import OUTAGE_FLOOR_BPS, Trace

SAME_RECORDING = "same recording"
CORRELATED = "correlated"
COARSE_POINTS = 2048     # the coarse pass's longest trace, in samples
COARSE_MARGIN = 0.15     # a pair goes to the fine pass when its coarse score is at least min_corr minus this
MIN_PAIRS = 3            # known difference pairs a correlation needs at the very least
_CORR_SLACK = 1e-9       # so that min_corr=1 still finds exact copies through rounding
_BLOCK = 1 << 20         # partners x FFT length per block (bounds the temporaries' memory)
_CACHE_BYTES = 128 << 20  # spectra of all traces are kept when they fit in this
_DAY_LENGTH = len("YYYY-MM-DD")


@dataclass(frozen=True)
class NearCopy:
    """Traces ``a`` < ``b`` (indices into the input) flagged for ``reasons``; ``corr``, ``lag_s`` (module
    docstring) and ``overlap_s`` when one of them is "correlated"."""

    a: int
    b: int
    reasons: tuple[str, ...]
    corr: float | None = None
    lag_s: float | None = None
    overlap_s: float | None = None


@dataclass(frozen=True)
class Duplicates:
    """What :func:`find_duplicates` found: sets of identical traces, flagged pairs (identical ones not
    repeated), notes, the common step of the correlation check and the ids of the traces searched."""

    identical: list[list[int]]
    pairs: list[NearCopy]
    notes: tuple[str, ...]
    step_s: float
    ids: tuple[str, ...]

    def duplicate_ids(self) -> set[str]:
        """Ids of every trace in an identical set or a flagged pair."""
        members = [i for group in self.identical for i in group] + [i for p in self.pairs for i in (p.a, p.b)]
        return {self.ids[i] for i in members}

    def to_data(self, traces: Sequence[Trace]) -> dict[str, Any]:
        """Plain JSON-able dict naming traces by index, id and source, in input order."""
        traces = list(traces)
        if len(traces) != len(self.ids) or any(t.id != i for t, i in zip(traces, self.ids)):
            raise TracegenError("these are not the traces the duplicates were searched in", field="traces",
                                hint="pass the same traces, in the same order, as to find_duplicates")

        def name(i: int) -> dict[str, Any]:
            return {"index": i, "id": self.ids[i], "source": traces[i].source}

        def number(x: float | None, digits: int) -> float | None:
            return None if x is None or not math.isfinite(x) else round(float(x), digits)

        return {
            "step_s": number(self.step_s, 9),
            "identical": [{"traces": [name(i) for i in group]} for group in self.identical],
            "pairs": [{"a": name(p.a), "b": name(p.b), "reasons": list(p.reasons), "corr": number(p.corr, 6),
                       "lag_s": number(p.lag_s, 6), "overlap_s": number(p.overlap_s, 6)} for p in self.pairs],
            "notes": list(self.notes),
        }


# --------------------------------------------------------------------------------------------------
# the correlation score


def prewhitened(bw: np.ndarray) -> np.ndarray:
    """First differences of ``log(max(bw, OUTAGE_FLOOR_BPS))``; NaN where either sample is unknown."""
    return np.diff(np.log(np.maximum(np.asarray(bw, dtype=np.float64), OUTAGE_FLOOR_BPS)))


def _standardised(x: np.ndarray, dtype: type) -> np.ndarray | None:
    """``x`` centred and scaled over its known values (conditioning only: Pearson ignores both), or None
    when too little of it is known or it is constant."""
    known = ~np.isnan(x)
    if np.count_nonzero(known) < MIN_PAIRS:
        return None
    mean = x[known].mean()
    sd = x[known].std()
    if not sd > 0:
        return None
    return ((x - mean) / sd).astype(dtype)


def masked_scores(fa: np.ndarray, fb: np.ndarray, size: int, n_a: int, n_b: np.ndarray, min_pairs: np.ndarray,
                  tol: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Best correlation of one series ``a`` (length ``n_a``, spectra ``fa`` ``(3, bins)`` from
    :func:`spectra`) with each of k partners ``b`` (lengths ``n_b``, spectra ``fb`` ``(3, k, bins)``) over
    the lags L where ``a[t + L]`` meets ``b[t]`` in at least ``min_pairs`` known pairs: ``(corr, lag,
    pairs)`` per partner, corr -inf where no lag qualifies. ``size`` must be at least ``n_a + max(n_b) -
    min(min_pairs)``: then no lag that can qualify wraps around.

    Per lag, with sums over the overlap, Pearson's r is (Sab - Sa Sb / n) / sqrt((Saa - Sa^2 / n) (Sbb -
    Sb^2 / n)); each sum is one masked cross-correlation (Padfield 2012). A lag where either side's
    variance is below ``tol`` per pair (series standardised to 1) is constant there and does not count."""
    need = np.maximum(min_pairs, MIN_PAIRS)
    lowest, highest = need - n_b, n_a - need          # the lags each partner can qualify at
    first, last = int(lowest.min()), int(highest.max())
    k = fb.shape[1]
    if last < first:
        return np.full(k, -np.inf), np.zeros(k, np.int64), np.zeros(k, np.int64)
    lags = np.arange(first, last + 1)
    where = lags % size
    cb = np.conj(fb)

    def xcorr(p: np.ndarray, q: np.ndarray) -> np.ndarray:
        return scipy.fft.irfft(p * q, size, axis=-1)[:, where]

    n = np.rint(xcorr(fa[2], cb[2]))
    inv = 1.0 / np.maximum(n, 1.0)
    sa, sb = xcorr(fa[0], cb[2]), xcorr(fa[2], cb[0])
    cov = xcorr(fa[0], cb[0])
    cov -= sa * sb * inv
    va = xcorr(fa[1], cb[2])
    sa *= sa
    sa *= inv
    va -= sa
    vb = xcorr(fa[2], cb[1])
    sb *= sb
    sb *= inv
    vb -= sb
    ok = (n >= need[:, None]) & (va > tol * n) & (vb > tol * n)
    va *= vb
    np.sqrt(va, out=va, where=ok)
    r = np.full(n.shape, -np.inf, dtype=cov.dtype)
    np.divide(cov, va, out=r, where=ok)
    best = np.argmax(r, axis=1)
    rows = np.arange(k)
    return np.minimum(r[rows, best], 1.0), lags[best], n[rows, best].astype(np.int64)


def spectra(rows: np.ndarray, size: int) -> np.ndarray:
    """rfft of each row's values, squares and known-mask (NaN = unknown, read as 0): ``(3, rows, bins)``."""
    known = ~np.isnan(rows)
    values = np.where(known, rows, 0)
    return scipy.fft.rfft(np.stack([values, values * values, known.astype(rows.dtype)]), size, axis=-1)


def lagged_corr(a: np.ndarray, b: np.ndarray, min_pairs: int = MIN_PAIRS) -> tuple[float, int, int]:
    """The largest Pearson correlation of ``a[t + L]`` with ``b[t]`` over lags L with at least ``min_pairs``
    pairs of known (not NaN) values, each over its overlap only: ``(corr, L, pairs)``; corr -inf when no
    lag qualifies."""
    a_std = _standardised(np.asarray(a, dtype=np.float64), np.float64)
    b_std = _standardised(np.asarray(b, dtype=np.float64), np.float64)
    if a_std is None or b_std is None:
        return -math.inf, 0, 0
    need = max(int(min_pairs), MIN_PAIRS)
    size = scipy.fft.next_fast_len(max(len(a) + len(b) - need, len(a), len(b)), real=True)
    corr, lag, pairs = masked_scores(spectra(a_std[None, :], size)[:, 0], spectra(b_std[None, :], size), size,
                                     len(a), np.array([len(b)]), np.array([need]), 1e-10)
    return float(corr[0]), int(lag[0]), int(pairs[0])


def _scan(refs: list[list[np.ndarray]], parts: list[np.ndarray | None], partners: Callable[[int], np.ndarray],
          min_pairs: Callable[[int, np.ndarray], np.ndarray], dtype: type, tol: float,
          keep_at: float) -> tuple[np.ndarray, ...]:
    """Score each trace i (each of its versions ``refs[i]``, the best kept) against ``parts[j]`` for j in
    ``partners(i)``, needing ``min_pairs(i, js)`` pairs: arrays ``(i, j, corr, lag, pairs)`` of the pairs
    scoring at least ``keep_at``."""
    live = [j for j, p in enumerate(parts) if p is not None]
    out: list[tuple[np.ndarray, ...]] = [tuple(np.zeros(0, dtype=t) for t in (np.int64, np.int64, np.float64,
                                                                             np.int64, np.int64))]
    if not live:
        return out[0]
    lengths = np.array([0 if p is None else len(p) for p in parts])
    width = int(lengths.max())
    longest_ref = max(len(v) for vs in refs for v in vs)
    fewest = max(MIN_PAIRS, int(min(min_pairs(k, np.array([k]))[0] for k in live)))  # the shortest's need
    size = scipy.fft.next_fast_len(max(longest_ref + width - fewest, longest_ref, width), real=True)
    bins = size // 2 + 1
    padded = np.full((len(parts), width), np.nan, dtype=dtype)
    for j in live:  # a loop over traces
        padded[j, :len(parts[j])] = parts[j]
    item = 2 * np.dtype(dtype).itemsize
    scored = sum(partners(i).size for i in range(len(refs)))
    # each trace's spectra once when it is a partner more than once on average and they fit, else per block
    cache = spectra(padded, size) if scored > len(live) and 3 * len(parts) * bins * item <= _CACHE_BYTES else None
    chunk = max(1, _BLOCK // size)
    for i in range(len(refs)):  # a loop over traces; each scores all its partners at once
        js = partners(i)
        if not js.size or not refs[i]:
            continue
        versions = [spectra(v[None, :], size)[:, 0] for v in refs[i]]
        for start in range(0, js.size, chunk):
            part = js[start:start + chunk]
            fb = cache[:, part] if cache is not None else spectra(padded[part], size)
            need = min_pairs(i, part)
            best = None
            for v, fa in zip(refs[i], versions):
                got = masked_scores(fa, fb, size, len(v), lengths[part], need, tol)
                if best is None:
                    best = got
                else:
                    better = got[0] > best[0]
                    best = tuple(np.where(better, g, b) for g, b in zip(got, best))
            keep = best[0] >= keep_at
            if keep.any():
                out.append((np.full(int(keep.sum()), i), part[keep]) + tuple(x[keep] for x in best))
    return tuple(np.concatenate(col) for col in zip(*out))


def _coarse(x: np.ndarray, factor: int, phase: int) -> np.ndarray:
    """``x[phase:]`` averaged over windows of ``2 * factor`` samples every ``factor`` samples (NaN-aware; a
    window less than half known is NaN). The windows overlap so that a copy offset by part of a coarse
    step still lines up closely (measured here on level-switching traces with AR(1) noise and on random
    walks: a copy's coarse score stays above 0.93 at every offset with two phases, against 0.65 with
    one phase and windows of one step)."""
    x = x[phase:]
    known = ~np.isnan(x)
    centre = x[known].mean() if known.any() else 0.0
    sums = np.concatenate(([0.0], np.cumsum(np.where(known, x - centre, 0.0))))
    counts = np.concatenate(([0], np.cumsum(known)))
    width = 2 * factor
    start = np.arange(0, max(len(x) - width, 0) + 1, factor)
    end = np.minimum(start + width, len(x))
    n = counts[end] - counts[start]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (sums[end] - sums[start]) / n + centre
    return np.where(2 * n >= end - start, mean, np.nan)


def _correlated(prepared: Sequence[Trace], step: float, reps: list[int], min_corr: float, min_overlap_s: float,
                min_overlap_share: float) -> tuple[dict[tuple[int, int], tuple[float, float, float]], list[str]]:
    """Flagged pairs among ``reps`` (indices into ``prepared``): (a, b) -> (corr, lag_s, overlap_s)."""
    notes: list[str] = []
    logs = [np.log(np.maximum(np.asarray(prepared[i]["bandwidth_bps"], dtype=np.float64), OUTAGE_FLOOR_BPS))
            for i in reps]
    fine = [_standardised(np.diff(lc), np.float64) for lc in logs]
    usable = [k for k, s in enumerate(fine) if s is not None]
    if len(usable) < len(reps):
        lost = len(reps) - len(usable)
        notes.append(f"{lost} trace{'s' if lost > 1 else ''} with too little varying bandwidth to correlate")
    if len(usable) < 2:
        return {}, notes
    duration = np.array([len(prepared[i]) * step for i in reps])
    n_reps = len(reps)
    alive = np.zeros(n_reps, dtype=bool)
    alive[usable] = True
    live = np.flatnonzero(alive)

    def later(k: int) -> np.ndarray:
        return live[live > k] if alive[k] else live[:0]

    def pairs_for(step_of: float, slack: float) -> Callable[[int, np.ndarray], np.ndarray]:
        def need(k: int, js: np.ndarray) -> np.ndarray:
            need_s = np.maximum(min_overlap_s, min_overlap_share * np.minimum(duration[k], duration[js]))
            return np.ceil(need_s / step_of - slack - 1e-9)
        return need

    longest = max(len(logs[k]) for k in usable)
    factor = -(-longest // COARSE_POINTS)
    partners = later
    if factor > 1:
        coarse_step = factor * step
        phases = sorted({0, factor // 2})
        refs: list[list[np.ndarray]] = [[] for _ in range(n_reps)]
        parts: list[np.ndarray | None] = [None] * n_reps
        for k in usable:  # a loop over traces
            versions = [_standardised(np.diff(_coarse(logs[k], factor, p)), np.float32) for p in phases]
            if all(v is not None for v in versions):
                refs[k], parts[k] = versions, versions[0]
        blurred = alive & np.array([p is None for p in parts])  # averaging left too little: all its pairs go on
        # overlap counts on the coarse step are one step short of the fine ones, plus two steps of slack
        i, j, _, _, _ = _scan(refs, parts, later, pairs_for(coarse_step, 3.0), np.float32, 1e-5,
                              min_corr - COARSE_MARGIN)
        kept = np.split(j, np.searchsorted(i, np.arange(1, n_reps)))

        def partners(k: int) -> np.ndarray:
            js = later(k)
            return js if blurred[k] else np.union1d(kept[k], js[blurred[js]])

        chosen = sum(partners(k).size for k in range(n_reps))
        total = sum(later(k).size for k in range(n_reps))
        notes.append(f"coarse pass on a {coarse_step:g} s step: {chosen} of {total} pairs scored again at {step:g} s")
    i, j, corr, lag, pairs = _scan([[s] if s is not None else [] for s in fine], fine, partners, pairs_for(step, 1.0),
                                   np.float64, 1e-10, min_corr - _CORR_SLACK)
    found = {}
    for a, b, r, lag_n, n in zip(i.tolist(), j.tolist(), corr.tolist(), lag.tolist(),
                                 pairs.tolist()):  # a loop over flagged pairs
        ta, tb = prepared[reps[a]], prepared[reps[b]]
        lag_s = lag_n * step + float(ta["t_s"][0]) - float(tb["t_s"][0])
        found[(a, b)] = (r, lag_s, (n + 1) * step)
    return found, notes


# --------------------------------------------------------------------------------------------------
# the same recording


def _recording(tr: Trace) -> tuple[tuple[Any, ...] | None, str | None]:
    """The recording a trace was read from and its part in it (None for a whole recording or unknown)."""
    prov = tr.provenance or {}
    part = prov.get("part")
    part = None if part is None else str(part)
    if tr.origin == "synthetic":
        keys = [prov.get(k) for k in ("model_sha256", "seed", "index")]
        return (("synthetic", *map(str, keys)) if all(k is not None for k in keys) else None), part
    if prov.get("file_sha256"):
        return ("file", str(prov["file_sha256"])), part
    if not tr.source:
        return None, part
    name, hash_mark, suffix = tr.source.rpartition("#")
    if not hash_mark:
        return ("source", tr.source), part
    return ("source", name), part if part is not None else suffix


def _start_s(tr: Trace) -> tuple[float | None, bool]:
    """Absolute start in seconds since the epoch when provenance has a full time (more than the day), and
    whether a start that looked full could not be read."""
    prov = tr.provenance or {}
    text = prov.get("calendar_start") or prov.get("start")
    if not isinstance(text, str) or len(text.strip()) <= _DAY_LENGTH:
        return None, False
    try:
        stamp = pd.to_datetime(text.strip(), format="ISO8601", utc=True)
    except (ValueError, TypeError, OverflowError):
        return None, True
    return stamp.value / 1e9 + float(tr["t_s"][0]), False


def _same_recording(traces: Sequence[Trace]) -> tuple[set[tuple[int, int]], list[str]]:
    """Pairs (a < b) read from one recording with overlapping (or indistinguishable) time spans."""
    groups: dict[tuple[Any, ...], list[int]] = defaultdict(list)
    parts: list[str | None] = []
    for k, tr in enumerate(traces):  # a loop over traces
        key, part = _recording(tr)
        parts.append(part)
        if key is not None:
            groups[key].append(k)
    starts: dict[int, float | None] = {}
    unreadable = 0
    for k in sorted(k for members in groups.values() if len(members) > 1 for k in members):
        starts[k], bad = _start_s(traces[k])
        unreadable += bad
    flagged, unknown = set(), 0
    for members in groups.values():
        for x, a in enumerate(members):  # a loop over pairs of one recording (a handful)
            for b in members[x + 1:]:
                if traces[a].id == traces[b].id:
                    continue
                sa, sb = starts[a], starts[b]
                if sa is not None and sb is not None:
                    if max(sa, sb) < min(sa + traces[a].duration_s, sb + traces[b].duration_s):
                        flagged.add((a, b))
                elif parts[a] == parts[b]:
                    flagged.add((a, b))
                else:
                    unknown += 1
    notes = []
    if unknown:
        notes.append(f"{unknown} pair{'s' if unknown > 1 else ''} of different parts of one recording without a "
                     f"full start time: whether they overlap is unknown, not flagged")
    if unreadable:
        notes.append(f"{unreadable} start time{'s' if unreadable > 1 else ''} in provenance could not be read as "
                     f"ISO 8601 and were treated as unknown")
    return flagged, notes


# --------------------------------------------------------------------------------------------------


def _check(name: str, value: Any, low: float, high: float, low_open: bool, hint: str) -> float:
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value) and (value > low if low_open else value >= low) and value <= high
    if not ok:
        span = f"{'(' if low_open else '['}{low:g}, {high:g}]"
        raise TracegenError(f"must be a number in {span}, got {value!r}", field=name, hint=hint)
    return float(value)


def find_duplicates(traces: Sequence[Trace], *, step_s: float | None = None, min_corr: float = 0.95,
                    min_overlap_s: float = 120.0, min_overlap_share: float = 0.5) -> Duplicates:
    """Identical traces, traces of one recording that overlap in time, and traces whose prewhitened log
    bandwidth correlates at ``min_corr`` or more at some lag (module docstring)."""
    min_corr = _check("min_corr", min_corr, 0.0, 1.0, True, "a correlation above 0, e.g. 0.95 (the default)")
    min_overlap_s = _check("min_overlap_s", min_overlap_s, 0.0, math.inf, False,
                           "seconds of overlap, 0 or more, e.g. 120 (the default)")
    min_overlap_share = _check("min_overlap_share", min_overlap_share, 0.0, 1.0, False,
                               "a share of the shorter trace from 0 to 1, e.g. 0.5 (the default)")
    traces = list(traces)
    if not traces:
        raise TracegenError("no traces to search", field="traces", hint="check the selection or the folder")
    for k, tr in enumerate(traces):
        if not isinstance(tr, Trace):
            raise TracegenError(f"item {k} is a {type(tr).__name__}, not a Trace", field="traces")
    ids = tuple(tr.id for tr in traces)
    by_id: dict[str, list[int]] = defaultdict(list)
    for k, i in enumerate(ids):
        by_id[i].append(k)
    identical = [members for members in by_id.values() if len(members) > 1]
    reps = [members[0] for members in by_id.values()]
    family = {members[0]: members for members in by_id.values()}

    reasons: dict[tuple[int, int], list[str]] = defaultdict(list)
    same, notes = _same_recording(traces)
    for pair in sorted(same):
        reasons[pair].append(SAME_RECORDING)

    step = step_s if step_s is not None else common_step(traces, traces)
    scores: dict[tuple[int, int], tuple[float, float, float]] = {}
    if step is None:
        notes.append("every trace has a single sample: no correlation check")
        step = math.nan
    else:
        prep = prepare(traces, step)
        step = prep.step_s
        notes.extend(prep.notes)
        found, more = _correlated(prep.traces, step, reps, min_corr, min_overlap_s, min_overlap_share)
        notes.extend(more)
        for (x, y), (r, lag_s, overlap_s) in found.items():
            for a in family[reps[x]]:  # every member of the two identical sets
                for b in family[reps[y]]:
                    pair, sign = ((a, b), 1.0) if a < b else ((b, a), -1.0)
                    scores[pair] = (r, sign * lag_s, overlap_s)
                    reasons[pair].append(CORRELATED)
    pairs = []
    for a, b in sorted(reasons):
        r, lag_s, overlap_s = scores.get((a, b), (None, None, None))
        pairs.append(NearCopy(a, b, tuple(reasons[(a, b)]), r, lag_s, overlap_s))
    return Duplicates(sorted(identical), pairs, tuple(notes), float(step), ids)


__all__ = ["CORRELATED", "SAME_RECORDING", "Duplicates", "NearCopy", "find_duplicates", "lagged_corr", "masked_scores",
           "prewhitened", "spectra"]
