"""A bottleneck queue: offered load in, queueing delay, drops and delivered rate out.

Fluid model on the trace's time grid: per step k, ``in_k = offered_k·step/8`` bytes arrive and
``capacity_k·step/8`` can leave; ``backlog_{k+1} = clip(backlog_k + in_k − drops_k − served_k, 0, buffer)``.
Drop-tail is a two-sided reflection on [0, buffer], computed exactly and vectorised: between boundary
hits the walk is a one-sided (Lindley) reflection, ``b0 + S − min(0, min.accumulate(b0 + S))`` at the
floor or its mirror at the ceiling, so a Python loop runs once per boundary alternation, not per step.
RED and CoDel follow the same path while they are idle (RED's average below min_th, CoDel's sojourn
below target) and switch to a per-step loop while they act: their state (the averaged queue, the drop
schedule) feeds back into the backlog step by step, so those stretches are sequential.
``lindley_waits`` is the packet-level recursion for an infinite buffer.

``standing_queue`` (and ``run_standing``, fed chunk by chunk) adds loss-based responsive traffic that
holds the queue at the bottleneck's operating point (the model is described in ``tracegen.synth.link``).
Its backlog obeys b_{k+1} = median(b_k − down_k, level_k, b_k + up_k) (after any overload), solved
exactly by ``_track``: closed forms between level jumps, a Python loop once per jump.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy.signal import lfilter

from ..errors import TracegenError

_SECTION = "bottleneck"
POLICIES = ("drop-tail", "red", "codel")
MAX_QUEUE_MS = 60_000.0  # delay reported for a backlog on a zero-capacity step when the mean capacity is 0
_FAST_WINDOW = 4096      # first window of the vectorised (idle-AQM) path; doubles while the AQM stays idle
_LOOP_CHUNK = 4096       # steps converted to Python floats at a time for the AQM loop
_SHORT_PHASE = 32        # drop-tail phases shorter than this (x2) switch to stepping ...
_SHORT_RUN = 512         # ... this many steps directly
_SNAP_REL = 1e-9         # backlogs below this share of the largest bytes per step count as empty
_LINDLEY_BLOCK = 4096    # packets per block of lindley_waits (bounds rounding, see there)
_CALM_STEPS = 64         # idle AQM steps in a row before the loop hands back to the vectorised path
_CHUNK = 16384           # steps per vectorised chunk of the standing-queue model (small temporaries stay cached)


def _number(name: str, value: object, low: float, high: float = math.inf, *, low_open: bool = False,
            high_open: bool = False) -> None:
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if ok:
        ok = (value > low if low_open else value >= low) and (value < high if high_open else value <= high)
    if not ok:
        lo = f"> {low:g}" if low_open else f">= {low:g}"
        hi = "" if high == math.inf else (f" and < {high:g}" if high_open else f" and <= {high:g}")
        raise TracegenError(f"must be {lo}{hi}, got {value!r}", field=f"{_SECTION}.{name}")


@dataclass(frozen=True)
class Bottleneck:
    """A queue of ``buffer_bytes`` or ``buffer_ms`` (at the mean capacity; give one) under ``policy``.

    RED (Floyd & Jacobson 1993; defaults from memory of the paper's simulations: max_p = 1/50,
    w_q = 0.002 per packet, max_th = 3·min_th): thresholds are fractions of the buffer; the average is
    an EWMA per step with weight 1 − (1 − w_q)^P, P the packets per step at the mean capacity.
    CoDel (Nichols & Jacobson 2012): target 5 ms, interval 100 ms. ``packet_bytes`` sizes RED's packet
    count, CoDel's drops (one packet each) and CoDel's "less than one packet queued" rule.
    """

    buffer_bytes: float | None = None
    buffer_ms: float | None = None
    policy: str = "drop-tail"
    red_min_th_frac: float = 0.25
    red_max_th_frac: float = 0.75
    red_max_p: float = 0.02
    red_weight: float = 0.002
    codel_target_ms: float = 5.0
    codel_interval_ms: float = 100.0
    packet_bytes: float = 1500.0

    def __post_init__(self) -> None:
        self.validate()

    def validate(self) -> None:
        """Raise TracegenError naming the first field that is out of range."""
        if (self.buffer_bytes is None) == (self.buffer_ms is None):
            raise TracegenError("give exactly one of buffer_bytes and buffer_ms", field=_SECTION,
                                hint="e.g. buffer_ms = 100")
        name = "buffer_bytes" if self.buffer_bytes is not None else "buffer_ms"
        _number(name, getattr(self, name), 0.0, low_open=True)
        if self.policy not in POLICIES:
            close = difflib.get_close_matches(str(self.policy).strip().lower(), POLICIES, n=1)
            hint = f"did you mean '{close[0]}'?" if close else f"use one of: {', '.join(POLICIES)}"
            raise TracegenError(f"unknown policy {self.policy!r}", field=f"{_SECTION}.policy", hint=hint)
        _number("red_min_th_frac", self.red_min_th_frac, 0.0, 1.0, high_open=True)
        _number("red_max_th_frac", self.red_max_th_frac, 0.0, 1.0, low_open=True)
        if not self.red_min_th_frac < self.red_max_th_frac:
            raise TracegenError(f"red_min_th_frac must be < red_max_th_frac, got {self.red_min_th_frac} >= "
                                f"{self.red_max_th_frac}", field=f"{_SECTION}.red_min_th_frac")
        _number("red_max_p", self.red_max_p, 0.0, 1.0)
        _number("red_weight", self.red_weight, 0.0, 1.0, low_open=True)
        _number("codel_target_ms", self.codel_target_ms, 0.0, low_open=True)
        _number("codel_interval_ms", self.codel_interval_ms, 0.0, low_open=True)
        _number("packet_bytes", self.packet_bytes, 0.0, low_open=True)

    def buffer_bytes_for(self, capacity_bps: np.ndarray) -> float:
        """The buffer in bytes: ``buffer_bytes``, or ``buffer_ms`` worth of the mean capacity."""
        if self.buffer_bytes is not None:
            return float(self.buffer_bytes)
        return float(self.buffer_ms) / 1000.0 * float(np.mean(capacity_bps)) / 8.0


@dataclass(frozen=True)
class QueueResult:
    """Per-step queue outputs (arrays of the input length) and the buffer used."""

    queue_ms: np.ndarray         # backlog at the end of the step / the step's capacity
    drop_share: np.ndarray       # dropped bytes / offered bytes in the step (0 when nothing is offered)
    delivered_bps: np.ndarray | None  # bytes that left the queue in the step, as a rate
    backlog_bytes: np.ndarray | None  # backlog at the end of the step
    dropped_bytes: np.ndarray | None  # AQM drops + overflow in the step
    buffer_bytes: float
    # (the three above are None only from run_standing without details)
    avg_queue_bytes: np.ndarray | None = None  # RED's averaged queue after the step's update (RED only)
    offered_bps: np.ndarray | None = None      # load offered to the queue (standing_queue only: after the
                                               # responsive senders' probe or back-off)
    level_bytes: np.ndarray | None = None      # the responsive operating point per step (standing_queue only)
    hold: np.ndarray | None = None             # the backlog ends the step on that level (standing_queue only)


def lindley_waits(service_s: np.ndarray, interarrival_s: np.ndarray) -> np.ndarray:
    """Waiting times in queue of packets 0..n−1 at an infinite-buffer FIFO server, W_0 = 0.

    ``service_s[i]`` is packet i's service time, ``interarrival_s[i]`` the gap between the arrivals of
    packets i−1 and i (``interarrival_s[0]`` is not used). W_n = max(0, W_{n−1} + service_{n−1} −
    interarrival_n), solved as C_n − min_{k<=n} C_k with C the cumulative sum of the increments (C_0 = 0).
    Applied per block of 4096 packets from the carried wait (the same identity from W_start), so the
    cumulative sums stay small and rounding does not grow with the series length.
    """
    s = np.asarray(service_s, dtype=float)
    a = np.asarray(interarrival_s, dtype=float)
    if s.ndim != 1 or s.shape != a.shape:
        raise TracegenError(f"service_s and interarrival_s must be 1-D of one length, got {s.shape} and {a.shape}",
                            field="interarrival_s")
    if s.size == 0:
        return np.zeros(0)
    x = s[:-1] - a[1:]
    out = np.empty(s.size)
    out[0] = w = 0.0
    for i in range(0, x.size, _LINDLEY_BLOCK):
        c = w + np.cumsum(x[i:i + _LINDLEY_BLOCK])
        part = c - np.minimum(np.minimum.accumulate(c), 0.0)
        out[i + 1:i + 1 + part.size] = part
        w = float(part[-1])
    return out


def _reflect(x: np.ndarray, b0: float, top: float) -> np.ndarray:
    """Backlog after each step of b_{k+1} = min(top, max(0, b_k + x_k)) from b0, exact and vectorised.

    One-sided reflection at the floor until the walk would pass ``top`` (there it is clipped to top), then
    at the ceiling until it would pass 0, and so on: one vectorised pass per boundary alternation. When
    alternations come every few steps, a plain loop over the next _SHORT_RUN steps is cheaper than the
    passes, so that stretch is stepped directly (same recursion).
    """
    n = x.size
    out = np.empty(n)
    if top <= 0.0:
        out[:] = 0.0
        return out
    i, b, at_top, w = 0, float(b0), b0 >= top, 1024
    while i < n:
        if w < _SHORT_PHASE:
            end = min(i + _SHORT_RUN, n)
            vals = x[i:end].tolist()
            for m, v in enumerate(vals):
                b += v
                b = top if b > top else (0.0 if b < 0.0 else b)
                vals[m] = b
            out[i:end] = vals
            i, at_top, w = end, b >= top, 1024
            continue
        seg = x[i:i + w]
        p = b + np.cumsum(seg)
        if at_top:
            path = p - np.maximum(np.maximum.accumulate(p) - top, 0.0)
            hits = path < 0.0
        else:
            path = p - np.minimum(np.minimum.accumulate(p), 0.0)
            hits = path > top
        h = int(np.argmax(hits))
        if not hits[h]:
            out[i:i + seg.size] = path
            b = float(path[-1])
            i += seg.size
            w *= 2
            continue
        out[i:i + h] = path[:h]
        b = 0.0 if at_top else top
        out[i + h] = b
        at_top = not at_top
        i += h + 1
        w = 2 * (h + 1)
    return np.clip(out, 0.0, top, out=out)


def _check_inputs(capacity_bps: np.ndarray, offered_bps: np.ndarray, step_s: float) -> tuple[np.ndarray, np.ndarray]:
    c = np.asarray(capacity_bps, dtype=float)
    o = np.asarray(offered_bps, dtype=float)
    if c.ndim != 1 or c.size == 0 or c.shape != o.shape:
        raise TracegenError(f"capacity_bps and offered_bps must be non-empty 1-D of one length, got {c.shape} and "
                            f"{o.shape}", field="offered_bps")
    for name, v in (("capacity_bps", c), ("offered_bps", o)):
        bad = ~(np.isfinite(v) & (v >= 0))
        if bad.any():
            raise TracegenError(f"must be finite and >= 0, got {v[bad][0]} at step {int(np.argmax(bad))}",
                                field=name)
    if not (isinstance(step_s, (int, float)) and math.isfinite(step_s) and step_s > 0):
        raise TracegenError(f"must be > 0, got {step_s}", field="step_s")
    return c, o


def _codel_law(t0: float, t1: float, interval: float, first_above: float, dropping: bool, count: int,
               drop_next: float) -> tuple[int, float, bool, int, float]:
    """CoDel's control law (Nichols & Jacobson 2012) over a step [t0, t1) whose sojourn is above target:
    (packets to drop, first_above, dropping, count, drop_next). Drops start one interval after the
    sojourn first went above target, then come interval / sqrt(count) apart; a new dropping state
    re-enters at count - 2 when the last one ended less than an interval ago."""
    n_drop = 0
    if first_above < 0.0:
        first_above = t0 + interval
    ok_from = t0 if t0 > first_above else first_above
    if ok_from < t1:
        if not dropping:
            count = count - 2 if (count > 2 and ok_from - drop_next < interval) else 1
            dropping = True
            n_drop = 1
            drop_next = ok_from + interval / math.sqrt(count)
        while drop_next < t1:
            n_drop += 1
            count += 1
            drop_next += interval / math.sqrt(count)
    return n_drop, first_above, dropping, count, drop_next


class _Aqm:
    """RED or CoDel on the grid: vectorised while idle, a per-step loop while acting."""

    def __init__(self, bn: Bottleneck, c_bps: np.ndarray, in_b: np.ndarray, cap_b: np.ndarray, top: float,
                 step_s: float) -> None:
        self.bn, self.c, self.inb, self.capb, self.top, self.step = bn, c_bps, in_b, cap_b, top, step_s
        self.x = in_b - cap_b
        n = c_bps.size
        self.b_end = np.empty(n)
        self.aqm = np.zeros(n)
        self.red = bn.policy == "red"
        self.avg_out = np.empty(n) if self.red else None
        if self.red:
            packets = float(np.mean(c_bps)) * step_s / 8.0 / bn.packet_bytes
            self.w = float(-np.expm1(packets * np.log1p(-bn.red_weight))) if bn.red_weight < 1 else 1.0
            self.min_th = bn.red_min_th_frac * top
            self.max_th = bn.red_max_th_frac * top
        self.avg = 0.0
        # CoDel state (times in s); first_above < 0 means "not above target"
        self.target_s = bn.codel_target_ms / 1000.0
        self.interval_s = bn.codel_interval_ms / 1000.0
        self.first_above, self.dropping, self.count, self.drop_next = -1.0, False, 0, -math.inf

    def run(self, force_loop: bool = False) -> None:
        n, k, b, w = self.c.size, 0, 0.0, _FAST_WINDOW
        while k < n:
            if not force_loop:
                h, engaged = self._fast(k, b, w)
                if h > k:
                    b = float(self.b_end[h - 1])
                k = h
                if not engaged:
                    w *= 2
                    continue
                w = _FAST_WINDOW
            k, b = self._loop(k, b, force_loop)

    def _fast(self, k: int, b: float, w: int) -> tuple[int, bool]:
        """Drop-tail from step k while the AQM stays idle: (first step it engages or the window's end, engaged)."""
        end = min(k + w, self.c.size)
        path = _reflect(self.x[k:end], b, self.top)
        b_start = np.concatenate([[b], path[:-1]])
        if self.red:
            avg, _ = lfilter([self.w], [1.0, -(1.0 - self.w)], b_start, zi=[(1.0 - self.w) * self.avg])
            engaged = avg >= self.min_th
        else:
            engaged = (b_start >= self.bn.packet_bytes) & (b_start * 8.0 >= self.target_s * self.c[k:end])
        hit = bool(engaged.any())
        h = int(np.argmax(engaged)) if hit else end - k
        self.b_end[k:k + h] = path[:h]
        if self.red and h > 0:
            self.avg_out[k:k + h] = avg[:h]
            self.avg = float(avg[h - 1])
        return k + h, hit

    def _loop(self, k: int, b: float, force_loop: bool) -> tuple[int, float]:
        """Per-step AQM from step k until it has been idle for _CALM_STEPS steps (or the end)."""
        n, top, step = self.c.size, self.top, self.step
        calm = 0
        while k < n:
            end = min(k + _LOOP_CHUNK, n)
            inb, capb, c = self.inb[k:end].tolist(), self.capb[k:end].tolist(), self.c[k:end].tolist()
            ends, drops, avgs = [0.0] * (end - k), [0.0] * (end - k), [0.0] * (end - k)
            if self.red:
                w, avg, lo, hi, max_p = self.w, self.avg, self.min_th, self.max_th, self.bn.red_max_p
                for i in range(end - k):
                    avg = (1.0 - w) * avg + w * b
                    if avg < lo:
                        p = 0.0
                        calm += 1
                    else:
                        p = max_p * (avg - lo) / (hi - lo) if avg < hi else 1.0
                        calm = 0
                    d = p * inb[i]
                    b = b + inb[i] - d - capb[i]
                    b = top if b > top else (0.0 if b < 0.0 else b)
                    ends[i], drops[i], avgs[i] = b, d, avg
                    if calm >= _CALM_STEPS and not force_loop:
                        end = k + i + 1
                        break
                self.avg = avg
            else:
                pkt, target, interval = self.bn.packet_bytes, self.target_s, self.interval_s
                first_above, dropping, count, drop_next = self.first_above, self.dropping, self.count, self.drop_next
                for i in range(end - k):
                    t0 = (k + i) * step
                    t1 = t0 + step
                    n_drop = 0
                    if b < pkt or b * 8.0 < target * c[i]:
                        first_above, dropping = -1.0, False
                        calm += 1
                    else:
                        calm = 0
                        n_drop, first_above, dropping, count, drop_next = _codel_law(
                            t0, t1, interval, first_above, dropping, count, drop_next)
                    room = b + inb[i] - capb[i]
                    d = n_drop * pkt
                    if d > room:
                        d = room if room > 0.0 else 0.0
                    b = room - d
                    b = top if b > top else (0.0 if b < 0.0 else b)
                    ends[i], drops[i] = b, d
                    if calm >= _CALM_STEPS and not force_loop:
                        end = k + i + 1
                        break
                self.first_above, self.dropping, self.count, self.drop_next = first_above, dropping, count, drop_next
            m = end - k
            self.b_end[k:end] = ends[:m]
            self.aqm[k:end] = drops[:m]
            if self.red:
                self.avg_out[k:end] = avgs[:m]
            k = end
            if calm >= _CALM_STEPS and not force_loop:
                break
        return k, b


def queue(capacity_bps: np.ndarray, offered_bps: np.ndarray, step_s: float, bn: Bottleneck,
          rng: np.random.Generator | None = None) -> QueueResult:
    """Run the fluid queue (see the module docstring). The fluid policies are deterministic: ``rng`` is
    accepted for a uniform synthesis interface and not drawn from.

    ``queue_ms`` on a zero-capacity step with a backlog is the buffer's worth at the mean capacity
    (``MAX_QUEUE_MS`` if the mean capacity is 0 too).
    """
    return _queue(capacity_bps, offered_bps, step_s, bn)


def _queue(capacity_bps: np.ndarray, offered_bps: np.ndarray, step_s: float, bn: Bottleneck,
           force_loop: bool = False) -> QueueResult:
    if not isinstance(bn, Bottleneck):
        raise TracegenError(f"must be a Bottleneck, got {type(bn).__name__}", field=_SECTION)
    c, o = _check_inputs(capacity_bps, offered_bps, step_s)
    top = bn.buffer_bytes_for(c)
    in_b = o * (step_s / 8.0)
    cap_b = c * (step_s / 8.0)
    avg = None
    if bn.policy == "drop-tail":
        b_end = _reflect(in_b - cap_b, 0.0, top)
        aqm = np.zeros(c.size)
    else:
        engine = _Aqm(bn, c, in_b, cap_b, top, step_s)
        engine.run(force_loop)
        b_end, aqm, avg = engine.b_end, engine.aqm, engine.avg_out
    # rounding residue (e.g. offered == capacity up to 1 ulp) is not a queue: snap it to empty
    b_end = np.where(b_end < _SNAP_REL * max(1.0, float(in_b.max()), float(cap_b.max())), 0.0, b_end)
    b_start = np.concatenate([[0.0], b_end[:-1]])
    overflow = np.maximum(b_start + in_b - aqm - cap_b - top, 0.0)
    dropped = aqm + overflow
    delivered = np.clip((b_start + in_b - dropped - b_end) * (8.0 / step_s), 0.0, c)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(in_b > 0, dropped / in_b, 0.0)
        delay = np.where(c > 0, b_end * 8000.0 / c, 0.0)
    mean_c = float(np.mean(c))
    stalled = (c <= 0) & (b_end > 0)
    if stalled.any():
        delay[stalled] = top * 8000.0 / mean_c if mean_c > 0 else MAX_QUEUE_MS
    return QueueResult(queue_ms=delay, drop_share=np.clip(share, 0.0, 1.0), delivered_bps=delivered,
                       backlog_bytes=b_end, dropped_bytes=dropped, buffer_bytes=top, avg_queue_bytes=avg)


# --- the responsive standing queue ---------------------------------------------------------------------------

BACKOFF = 0.5  # multiplicative decrease of loss-based senders: halve (RFC 5681, ssthresh = FlightSize/2)


def hold_level_bytes(bn: Bottleneck, capacity_bps: np.ndarray, loss: np.ndarray, buffer_bytes: float) -> np.ndarray:
    """The backlog at which responsive flows settle on this bottleneck (its operating point), per step.

    Drop-tail signals only when full: the buffer. CoDel keeps the sojourn time at its target: target x
    capacity (at most the buffer). RED settles where its drop probability equals the loss rate the flows
    need, ``loss`` (Floyd & Jacobson 1993: p_b = max_p (avg - min_th)/(max_th - min_th)), so avg = min_th +
    (loss/max_p)(max_th - min_th); a loss above max_p puts it at max_th (where RED's p_b jumps to 1).
    """
    c = np.asarray(capacity_bps, dtype=float)
    if bn.policy == "drop-tail":
        return np.full(c.size, float(buffer_bytes))
    if bn.policy == "codel":
        return np.minimum(c * (bn.codel_target_ms / 8000.0), buffer_bytes)
    lo, hi = bn.red_min_th_frac * buffer_bytes, bn.red_max_th_frac * buffer_bytes
    loss = np.asarray(loss, dtype=float)
    frac = loss * (1.0 / bn.red_max_p) if bn.red_max_p > 0 else (loss > 0).astype(float)
    np.clip(frac, 0.0, 1.0, out=frac)
    frac *= hi - lo
    frac += lo
    return frac


def _track(level: np.ndarray, up: np.ndarray, down: np.ndarray, b0: float) -> np.ndarray:
    """Backlog after each step of b_{k+1} = median(b_k - down_k, level_k, b_k + up_k) from b0, exact.

    The backlog climbs by at most ``up`` towards the level, falls by at most ``down`` towards it, and sits
    on it once there. Between "jumps" (steps where the level rises by more than ``up`` or falls by more
    than ``down``) a backlog below the level is min(level_k, b_s + sum up) and one above it is
    max(level_k, b_s - sum down): once on the level it follows it, because the level moves less than the
    backlog may. So a Python loop runs once per jump (a few per flow), and the steps between are filled
    by a handful of vectorised passes. Step 0 is always treated as a jump.
    """
    n = level.size
    if n == 0:
        return np.empty(0)
    dl = np.empty(n)
    dl[0] = 0.0
    np.subtract(level[1:], level[:-1], out=dl[1:])
    jump = (dl > up) | (dl < -down)
    jump[0] = True
    at = np.flatnonzero(jump)
    acc_up = np.zeros(n + 1)
    np.cumsum(up, out=acc_up[1:])
    acc_down = np.zeros(n + 1)
    np.cumsum(down, out=acc_down[1:])
    nxt = np.append(at[1:], n)
    lv, uv, dv = level[at].tolist(), up[at].tolist(), down[at].tolist()
    a1, d1 = acc_up[at + 1].tolist(), acc_down[at + 1].tolist()
    le, ae, de = level[nxt - 1].tolist(), acc_up[nxt].tolist(), acc_down[nxt].tolist()
    gap = (nxt - at - 1).tolist()
    b_jump = [0.0] * len(lv)
    base = [0.0] * len(lv)
    below = [True] * len(lv)
    b = float(b0)
    for i in range(len(lv)):
        lo, L, hi = b - dv[i], lv[i], b + uv[i]
        b = lo if L < lo else (hi if L > hi else L)
        b_jump[i] = b
        if gap[i]:
            if b <= L:
                base[i] = b - a1[i]
                e = base[i] + ae[i]
                b = le[i] if e > le[i] else e
            else:
                below[i] = False
                base[i] = b + d1[i]
                e = base[i] - de[i]
                b = le[i] if e < le[i] else e
    if at.size == n:
        out = np.empty(n)
    else:
        seg = np.cumsum(jump, dtype=np.int32)
        seg -= 1
        bs = np.asarray(base)[seg]
        climb = np.add(bs, acc_up[1:])
        np.minimum(climb, level, out=climb)
        if all(below):
            out = climb
        else:
            np.subtract(bs, acc_down[1:], out=bs)
            np.maximum(bs, level, out=bs)
            out = np.where(np.asarray(below)[seg], climb, bs)
    out[at] = b_jump
    return out


def _red_step_weight(bn: Bottleneck, c_bps: np.ndarray | float, step_s: float) -> float:
    """RED's EWMA weight per step: 1 - (1 - w_q)^P, P packets per step at the mean capacity."""
    packets = float(np.mean(c_bps)) * step_s / 8.0 / bn.packet_bytes
    return float(-np.expm1(packets * np.log1p(-bn.red_weight))) if bn.red_weight < 1 else 1.0


class LinkChunk(NamedTuple):
    """Per-step inputs of the standing queue for one chunk of steps (arrays of the chunk's length)."""

    capacity_bps: np.ndarray
    responsive_bps: np.ndarray        # carried by the responsive cross flows
    share_bps: np.ndarray             # the responsive traffic's share: responsive cross flows + foreground
    hold_loss: np.ndarray             # loss the responsive flows need on the level
    overload_bps: np.ndarray | None   # unresponsive load above the capacity (None: none in this chunk)


class _Standing:
    """The fluid queue with a responsive standing queue (``standing_queue``), chunk by chunk: the inputs of
    each chunk come from ``provider(k, end)``; vectorised (``_track``) between overloaded steps, a per-step
    loop while an AQM's drop law acts on overload. Chunks keep every temporary small."""

    def __init__(self, bn: Bottleneck, n: int, step_s: float, top: float, mean_c: float, probe: float,
                 backoff: float, provider, details: bool) -> None:
        self.bn, self.n, self.step, self.top, self.probe, self.backoff = bn, n, step_s, top, probe, backoff
        self.provider, self.details = provider, details
        self.per = step_s / 8.0
        self.stall_ms = top * 8000.0 / mean_c if mean_c > 0 else MAX_QUEUE_MS
        self.red = bn.policy == "red"
        self.codel = bn.policy == "codel"
        self.queue_ms, self.drop_share = np.empty(n), np.empty(n)
        names = ("backlog_bytes", "offered_bps", "delivered_bps", "dropped_bytes", "level_bytes")
        self.out = {name: np.empty(n) for name in names} if details else {}
        if details:
            self.out["hold"] = np.empty(n, dtype=bool)
            if self.red:
                self.out["avg_queue_bytes"] = np.empty(n)
        if self.red:
            self.w = _red_step_weight(bn, mean_c, step_s)
            self.min_th = bn.red_min_th_frac * top
            self.max_th = bn.red_max_th_frac * top
            self.loss_zi = [0.0]
        self.avg_chunk = np.empty(_CHUNK) if self.red else None   # RED's averaged queue in the current chunk
        self.avg = 0.0
        self.target_s = bn.codel_target_ms / 1000.0
        self.interval_s = bn.codel_interval_ms / 1000.0
        self.first_above, self.dropping, self.count, self.drop_next = -1.0, False, 0, -math.inf
        self.over, self.calm, self.looping = False, 0, False

    def _params(self, ch: LinkChunk) -> tuple[np.ndarray | None, np.ndarray, np.ndarray, np.ndarray]:
        """(x bytes or None, level, up, down) of a chunk; an overloaded step serves no responsive traffic."""
        c = ch.capacity_bps
        served = ch.responsive_bps > 0
        x = ch.overload_bps * self.per if ch.overload_bps is not None else None
        hot = None
        if x is not None:
            hot = x > 0
            if hot.any():
                served &= ~hot
            else:
                x, hot = None, None
        if self.bn.policy == "drop-tail":
            level = served * self.top
        else:
            loss = ch.hold_loss
            if self.red:  # RED's averaged queue follows the loss the flows need through RED's own averaging
                loss, self.loss_zi = lfilter([self.w], [1.0, -(1.0 - self.w)], loss, zi=self.loss_zi)
            level = hold_level_bytes(self.bn, c, loss, self.top)
            level *= served
        up = ch.responsive_bps * (self.probe * self.per)
        down = np.minimum(ch.share_bps, c)
        down *= self.backoff * self.per
        if hot is not None:
            up[hot] = 0.0
            down[hot] = 0.0
        return x, level, up, down

    def run(self, force_loop: bool = False) -> None:
        n, b = self.n, 0.0
        for k in range(0, n, _CHUNK):
            end = min(k + _CHUNK, n)
            ch = self.provider(k, end)
            x, level, up, down = self._params(ch)
            m = end - k
            b_end, aqm = np.empty(m), np.zeros(m)
            b0 = b
            if self.bn.policy == "drop-tail" and not force_loop:
                if x is None:
                    path = _track(level, up, down, b)
                else:  # an overloaded step is b -> min(buffer, b + x): level = buffer, up = x, down large
                    hot = x > 0
                    path = _track(np.where(hot, self.top, level), np.where(hot, x, up),
                                  np.where(hot, self.top + x, down), b)
                np.clip(path, 0.0, self.top, out=b_end)
                b = float(b_end[-1])
            else:
                hot_at = np.flatnonzero(x > 0) if x is not None else np.zeros(0, dtype=np.int64)
                i = 0
                while i < m:
                    if self.looping or force_loop:
                        i, b = self._loop(k, i, m, b, x, level, up, down, ch.capacity_bps, b_end, aqm, force_loop)
                        continue
                    j = int(np.searchsorted(hot_at, i))
                    h = int(hot_at[j]) if j < hot_at.size else m
                    if h > i:
                        b = self._fast(i, h, b, level, up, down, b_end)
                    i = h
                    if i < m:
                        self.looping = True
            self._post(k, end, ch, x, level, up, down, b_end, aqm, b0, force_loop)

    def _fast(self, i: int, h: int, b: float, level: np.ndarray, up: np.ndarray, down: np.ndarray,
              b_end: np.ndarray) -> float:
        """Chunk steps i..h-1 hold no overload and no AQM drop law acts: the tracker alone."""
        path = np.clip(_track(level[i:h], up[i:h], down[i:h], b), 0.0, self.top)
        b_end[i:h] = path
        if self.red:
            b_start = np.empty(path.size)
            b_start[0] = b
            b_start[1:] = path[:-1]
            avg, _ = lfilter([self.w], [1.0, -(1.0 - self.w)], b_start, zi=[(1.0 - self.w) * self.avg])
            self.avg_chunk[i:h] = avg
            self.avg = float(avg[-1])
        else:
            self.first_above, self.dropping = -1.0, False
        self.calm += h - i
        return float(path[-1])

    def _loop(self, k: int, i0: int, m: int, b: float, xa, level, upa, downa, ca, b_end, aqm,
              force_loop: bool) -> tuple[int, float]:
        """Per step from chunk step i0 until the drop law has been off for _CALM_STEPS steps (or the chunk ends).

        The drop law acts from an overloaded step until the backlog is back within a packet of the level.
        """
        top, step, pkt = self.top, self.step, self.bn.packet_bytes
        over, calm = self.over, self.calm
        red, codel = self.red, self.codel
        cnt = m - i0
        x = xa[i0:m].tolist() if xa is not None else [0.0] * cnt
        c = ca[i0:m].tolist()
        capb = (ca[i0:m] * self.per).tolist()
        lv, up, dn = level[i0:m].tolist(), upa[i0:m].tolist(), downa[i0:m].tolist()
        ends, drops, avgs = [0.0] * cnt, [0.0] * cnt, [0.0] * cnt
        if red:
            w, avg, lo, hi, max_p = self.w, self.avg, self.min_th, self.max_th, self.bn.red_max_p
        elif codel:
            target, interval = self.target_s, self.interval_s
            first_above, dropping, count, drop_next = self.first_above, self.dropping, self.count, self.drop_next
        done = cnt
        for i in range(cnt):
            if x[i] > 0.0:
                over = True
            elif over and b <= lv[i] + pkt:
                over = False
            calm = 0 if over else calm + 1
            d = 0.0
            if red:
                avg = (1.0 - w) * avg + w * b
                if over and avg >= lo:
                    p = max_p * (avg - lo) / (hi - lo) if avg < hi else 1.0
                    d = p * (capb[i] + x[i])
                avgs[i] = avg
            elif codel:
                t0 = (k + i0 + i) * step
                t1 = t0 + step
                if not over or b < pkt or b * 8.0 < target * c[i]:
                    first_above, dropping = -1.0, False
                else:
                    n_drop, first_above, dropping, count, drop_next = _codel_law(
                        t0, t1, interval, first_above, dropping, count, drop_next)
                    room = b + x[i]
                    d = n_drop * pkt
                    if d > room:
                        d = room if room > 0.0 else 0.0
            y = b + x[i] - d
            lo_, L, hi_ = y - dn[i], lv[i], y + up[i]
            y = lo_ if L < lo_ else (hi_ if L > hi_ else L)
            b = top if y > top else (0.0 if y < 0.0 else y)
            ends[i], drops[i] = b, d
            if calm >= _CALM_STEPS and not force_loop:
                done = i + 1
                self.looping = False
                break
        if red:
            self.avg = avg
            self.avg_chunk[i0:i0 + done] = avgs[:done]
        elif codel:
            self.first_above, self.dropping, self.count, self.drop_next = first_above, dropping, count, drop_next
        self.over, self.calm = over, calm
        b_end[i0:i0 + done] = ends[:done]
        aqm[i0:i0 + done] = drops[:done]
        return i0 + done, b

    def _post(self, k: int, end: int, ch: LinkChunk, x, level, up, down, b_end, aqm, b0: float,
              force_loop: bool) -> None:
        """The chunk's outputs from its backlog path."""
        per, top, cc = self.per, self.top, ch.capacity_bps
        bs = np.empty(end - k)
        bs[0] = b0
        bs[1:] = b_end[:-1]
        hold = ch.responsive_bps > 0
        hold &= b_end == level
        hd = ch.hold_loss * hold
        if x is None and not force_loop:
            # no overload: no AQM drop law, no overflow, the link delivers its capacity
            self.drop_share[k:end] = hd
            if self.details:
                self.out["offered_bps"][k:end] = (b_end - bs) / per + cc
                self.out["dropped_bytes"][k:end] = 0.0
                self.out["delivered_bps"][k:end] = cc
        else:
            xa = x if x is not None else np.zeros(end - k)
            y = bs + xa - aqm
            adjust = np.clip(level - y, -down, up)   # the responsive senders' probe (> 0) or back-off (< 0)
            y += adjust
            dropped = aqm + np.maximum(y - top, 0.0)
            in_b = cc * per + xa + adjust
            with np.errstate(divide="ignore", invalid="ignore"):
                q = np.where(in_b > 0, dropped / in_b, 0.0)
            np.clip(q, 0.0, 1.0, out=q)
            self.drop_share[k:end] = np.where(q > 0, 1.0 - (1.0 - q) * (1.0 - hd), hd)
            if self.details:
                self.out["offered_bps"][k:end] = in_b / per
                self.out["dropped_bytes"][k:end] = dropped
                self.out["delivered_bps"][k:end] = np.clip(cc + np.minimum(y, 0.0) / per, 0.0, cc)
        d = self.queue_ms[k:end]
        pos = cc > 0
        np.divide(b_end, cc, out=d, where=pos)
        d *= 8000.0
        if not pos.all():
            stalled = ~pos
            d[stalled] = np.where(b_end[stalled] > 0, self.stall_ms, 0.0)
        if self.details:
            self.out["backlog_bytes"][k:end] = b_end
            self.out["level_bytes"][k:end] = level
            self.out["hold"][k:end] = hold
            if self.red:
                self.out["avg_queue_bytes"][k:end] = self.avg_chunk[:end - k]

    def result(self) -> QueueResult:
        o = self.out
        return QueueResult(queue_ms=self.queue_ms, drop_share=self.drop_share, buffer_bytes=self.top,
                           delivered_bps=o.get("delivered_bps"), backlog_bytes=o.get("backlog_bytes"),
                           dropped_bytes=o.get("dropped_bytes"), avg_queue_bytes=o.get("avg_queue_bytes"),
                           offered_bps=o.get("offered_bps"), level_bytes=o.get("level_bytes"), hold=o.get("hold"))


def run_standing(bn: Bottleneck, n: int, step_s: float, mean_capacity_bps: float, probe: float, provider, *,
                 backoff: float = BACKOFF, details: bool = False, force_loop: bool = False) -> QueueResult:
    """Run the standing-queue model on inputs delivered chunk by chunk: ``provider(k, end)`` returns the
    LinkChunk of steps k..end-1 and is called once per chunk, in order. Without ``details`` only
    ``queue_ms`` and ``drop_share`` are filled (the other per-step fields are None)."""
    top = bn.buffer_bytes_for(np.array([mean_capacity_bps]))
    engine = _Standing(bn, n, step_s, top, mean_capacity_bps, probe, backoff, provider, details)
    engine.run(force_loop)
    return engine.result()


def standing_queue(capacity_bps: np.ndarray, step_s: float, bn: Bottleneck, *, responsive_bps: np.ndarray,
                   share_bps: np.ndarray, overload_bps: np.ndarray | None, hold_loss: np.ndarray, probe: float,
                   backoff: float = BACKOFF) -> QueueResult:
    """The fluid queue with loss-based responsive traffic (the model is described in ``tracegen.synth.link``).

    Per step, all in bytes: unresponsive load above the capacity (``overload_bps``; None: none) adds to
    the backlog; then, while responsive cross flows are served (``responsive_bps`` > 0), the responsive
    traffic moves the backlog towards the bottleneck's operating point (``hold_level_bytes``): up by at
    most ``probe`` x their rate, down by at most ``backoff`` x the responsive traffic's share
    (``share_bps``: the cross flows and the foreground). With no responsive cross flow served the level is
    0, so a backlog drains at that back-off rate. An overloaded step serves no responsive traffic (nothing
    probes or backs off). The buffer caps the backlog (overflow is dropped). RED's and CoDel's drop laws
    act on the backlog overload builds (from an overloaded step until the backlog is back within a packet
    of the level); on the level their action is the equilibrium loss ``hold_loss``, reported in
    ``drop_share`` for steps that end there and made good by the responsive senders (it does not change
    the backlog). RED's level follows ``hold_loss`` through RED's own per-step averaging weight, as its
    averaged queue would. All per-step fields of the result are filled.
    """
    return _standing(capacity_bps, step_s, bn, responsive_bps, share_bps, hold_loss, overload_bps, probe, backoff)


def _standing(capacity_bps, step_s, bn, responsive_bps, share_bps, hold_loss, overload_bps, probe,
              backoff=BACKOFF, force_loop: bool = False) -> QueueResult:
    if not isinstance(bn, Bottleneck):
        raise TracegenError(f"must be a Bottleneck, got {type(bn).__name__}", field=_SECTION)
    c, _ = _check_inputs(capacity_bps, capacity_bps, step_s)
    arrays = []
    for name, v in (("responsive_bps", responsive_bps), ("share_bps", share_bps), ("hold_loss", hold_loss),
                    ("overload_bps", overload_bps)):
        if v is None and name == "overload_bps":
            arrays.append(None)
            continue
        a = np.asarray(v, dtype=float)
        if a.shape != c.shape or not np.all(np.isfinite(a) & (a >= 0)):
            raise TracegenError(f"must be finite, >= 0 and of the capacity's length {c.size}", field=name)
        arrays.append(a)
    for name, v in (("probe", probe), ("backoff", backoff)):
        if isinstance(v, bool) or not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
            raise TracegenError(f"must be finite and >= 0, got {v!r}", field=name)
    if backoff > 1:
        raise TracegenError(f"must be at most 1, got {backoff!r}", field="backoff")
    resp, share, loss, over = arrays
    loss = np.minimum(loss, 1.0)

    def provider(k: int, end: int) -> LinkChunk:
        return LinkChunk(c[k:end], resp[k:end], share[k:end], loss[k:end], over[k:end] if over is not None else None)

    return run_standing(bn, c.size, float(step_s), float(np.mean(c)), float(probe), provider, backoff=float(backoff),
                        details=True, force_loop=force_loop)


__all__ = ["Bottleneck", "QueueResult", "POLICIES", "MAX_QUEUE_MS", "BACKOFF", "LinkChunk", "lindley_waits", "queue",
           "standing_queue", "run_standing", "hold_level_bytes"]
