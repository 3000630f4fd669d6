"""Turning traces into what the learners need: a common step, outage runs, level sequences for the HMM.

Every sample of a (resampled) trace is one of three kinds: an outage (bandwidth below the floor, an
explicit state of the model, never ``log(0)``), unknown (NaN bandwidth: a gap that breaks every run), or a
level sample (positive bandwidth, modelled in log space by the hidden states).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import TracegenError
from ..trace import OUTAGE_FLOOR_BPS, Trace

LEVEL, OUTAGE, UNKNOWN = 1, 0, -1
MAX_RTT_FILL_SAMPLES = 5  # RTT gaps up to this many samples are interpolated (in log) for the joint model


@dataclass(frozen=True)
class Prepared:
    """The traces on one step, with the level samples gathered for the HMM.

    ``kinds[i]`` holds LEVEL / OUTAGE / UNKNOWN per sample of trace i; ``features`` stacks the level samples
    of all traces (log bandwidth, and log RTT when joint) in trace order; ``lengths`` are the lengths of
    the level runs in that stack (the HMM's separate sequences); ``run_index[i]`` lists (start, stop) of
    each level run of trace i, in stack order.
    """

    traces: tuple[Trace, ...]
    step_s: float
    floor_bps: float
    kinds: tuple[np.ndarray, ...]
    features: np.ndarray
    lengths: tuple[int, ...]
    run_index: tuple[tuple[tuple[int, int], ...], ...]
    with_rtt: bool

    @property
    def n_samples(self) -> int:
        return int(sum(len(k) for k in self.kinds))

    @property
    def n_known(self) -> int:
        return int(sum(int(np.sum(k != UNKNOWN)) for k in self.kinds))


def runs(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Runs of equal values: (starts, stops, value of each run)."""
    values = np.asarray(values)
    if values.size == 0:
        return np.zeros(0, int), np.zeros(0, int), values[:0]
    cut = np.flatnonzero(values[1:] != values[:-1]) + 1
    starts = np.concatenate(([0], cut))
    stops = np.concatenate((cut, [values.size]))
    return starts, stops, values[starts]


def level_log_bandwidth(prep: "Prepared") -> list[np.ndarray]:
    """Per trace: the log bandwidth the level states see (``prep.features`` column 0), NaN off level runs."""
    out, offset = [], 0
    for kind, index in zip(prep.kinds, prep.run_index):
        x = np.full(kind.size, np.nan)
        for a, b in index:
            x[a:b] = prep.features[offset:offset + b - a, 0]
            offset += b - a
        out.append(x)
    return out


def common_step(traces: Sequence[Trace], step_s: float | None) -> float:
    """The step to fit at: the one asked for, else the median of the traces' own steps."""
    if step_s is not None:
        return float(step_s)
    steps = np.array([t.step_s for t in traces if len(t) > 1])
    if steps.size == 0:
        raise TracegenError("every selected trace has a single sample", field="selection",
                            hint="select longer traces")
    return float(np.median(steps))


def _fill_log_rtt(rtt_ms: np.ndarray) -> np.ndarray:
    """Log RTT with short NaN gaps filled by interpolation; longer gaps stay NaN."""
    log_rtt = np.log(rtt_ms)
    known = np.isfinite(log_rtt)
    if not known.any():
        return log_rtt
    idx = np.arange(log_rtt.size)
    filled = np.interp(idx, idx[known], log_rtt[known])
    s, e, v = runs(known)
    long_gap = np.zeros(log_rtt.size, bool)
    for a, b in zip(s[~v], e[~v]):
        if b - a > MAX_RTT_FILL_SAMPLES:
            long_gap[a:b] = True
    return np.where(long_gap, np.nan, filled)


def prepare(traces: Sequence[Trace], *, step_s: float | None = None, with_rtt: bool = False,
            floor_bps: float = OUTAGE_FLOOR_BPS) -> Prepared:
    """Resample to one step and split into outage, unknown and level runs (see the module docstring)."""
    if not traces:
        raise TracegenError("the selection holds no traces", field="selection",
                            hint="check the --where conditions with `tracegen catalog list`")
    step = common_step(traces, step_s)
    resampled = []
    for tr in traces:
        same = len(tr) > 1 and abs(tr.step_s - step) < 1e-9 * step and np.allclose(np.diff(tr["t_s"]), step)
        resampled.append(tr if same else tr.resample(step))
    if with_rtt and not any(np.isfinite(t["rtt_ms"]).any() for t in resampled):
        raise TracegenError("no selected trace has any RTT, so a joint bandwidth-RTT model cannot be fitted",
                            field="with_rtt", hint="drop --with-rtt or select traces that measured RTT")
    kinds, feats, lengths, index = [], [], [], []
    offset = 0
    for tr in resampled:
        bw = np.asarray(tr["bandwidth_bps"])
        kind = np.where(np.isnan(bw), UNKNOWN, np.where(bw < floor_bps, OUTAGE, LEVEL))
        cols = [np.log(np.where(kind == LEVEL, bw, 1.0))]
        if with_rtt:
            log_rtt = _fill_log_rtt(np.asarray(tr["rtt_ms"]))
            kind = np.where((kind == LEVEL) & ~np.isfinite(log_rtt), UNKNOWN, kind)
            cols.append(np.where(np.isfinite(log_rtt), log_rtt, 0.0))
        kinds.append(kind)
        s, e, v = runs(kind)
        mine = []
        x = np.column_stack(cols)
        for a, b in zip(s[v == LEVEL], e[v == LEVEL]):
            feats.append(x[a:b])
            lengths.append(int(b - a))
            mine.append((int(a), int(b)))
            offset += b - a
        index.append(tuple(mine))
    features = np.concatenate(feats) if feats else np.zeros((0, 2 if with_rtt else 1))
    return Prepared(tuple(resampled), step, float(floor_bps), tuple(kinds), features, tuple(lengths),
                    tuple(index), with_rtt)
