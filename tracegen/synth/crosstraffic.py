"""Cross traffic on a shared bottleneck: Poisson flow arrivals with Pareto sizes, and Pareto on/off sources.

Fluid model on the trace's time grid. Unresponsive load (constant-rate flows and on/off sources) takes
its rate off the top of the capacity; what is left is shared equally by the active responsive flows and
the foreground (the trace's own flow): each gets ``left / (n_responsive + 1)`` (max-min fairness without
demand limits, i.e. processor sharing). Responsive flows are tracked exactly: all of them get the same
rate, so one "attained service" clock serves every flow, and a flow leaves when that clock has advanced
by its size. Who is active decides the share and the share decides who leaves, so this is an event
loop over flows (two events a flow, plain float arithmetic on the cumulative left-over capacity);
flows are few relative to steps. Everything per step is vectorised, and produced in chunks of CHUNK
steps (``Flows.chunk``) so that long series need no full-length temporaries. The system starts empty at
t = 0 (no flows in progress); on/off sources start in their stationary state.

How the responsive flows load a bottleneck queue beyond their fair share (``responsive_probe``,
``responsive_rtt_ms``) is modelled in ``tracegen.synth.link``.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass

import numpy as np

from ..errors import TracegenError

_SECTION = "cross_traffic"
CHUNK = 16384  # steps per chunk when per-step series are produced piecewise (small temporaries stay cached)


def _fail(name: str, message: str) -> TracegenError:
    return TracegenError(message, field=f"{_SECTION}.{name}")


def _positive(name: str, value: float) -> None:
    if not (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and value > 0):
        raise _fail(name, f"must be > 0, got {value!r}")


@dataclass(frozen=True)
class CrossTraffic:
    """Competing traffic: Poisson flows (``flow_rate_per_s`` > 0) and/or on/off sources (``onoff_sources`` > 0).

    Flow sizes are Pareto with mean ``size_bytes_mean`` and tail index ``pareto_alpha``; a share
    ``responsive_share`` of flows is responsive (fair share of what is left), the rest send at
    ``unresponsive_rate_bps`` until their bytes are sent. On/off sources send ``onoff_rate_bps`` while on;
    on and off periods are Pareto with means ``on_mean_s``, ``off_mean_s`` and tail index ``onoff_alpha``.

    At a bottleneck (``tracegen.synth.link``) responsive flows are loss-based: below the bottleneck's
    operating point they offer ``responsive_probe`` times their share on top of it (1: slow start's
    doubling; 0: they take exactly their share and never build a queue), and their loss there follows
    the Reno response function at round-trip time ``responsive_rtt_ms``.
    """

    flow_rate_per_s: float = 0.0
    size_bytes_mean: float = 1_000_000.0
    pareto_alpha: float = 1.5
    responsive_share: float = 1.0
    unresponsive_rate_bps: float = 1_000_000.0
    onoff_sources: int = 0
    on_mean_s: float = 1.0
    off_mean_s: float = 2.0
    onoff_rate_bps: float = 500_000.0
    onoff_alpha: float = 1.4
    responsive_probe: float = 1.0
    responsive_rtt_ms: float = 50.0

    def __post_init__(self) -> None:
        self.validate()

    def validate(self) -> None:
        """Raise TracegenError naming the first field that is out of range."""
        r = self.flow_rate_per_s
        if not (isinstance(r, (int, float)) and not isinstance(r, bool) and math.isfinite(r) and r >= 0):
            raise _fail("flow_rate_per_s", f"must be >= 0 (0: no flows), got {r!r}")
        n = self.onoff_sources
        if not (isinstance(n, (int, np.integer)) and not isinstance(n, bool) and n >= 0):
            raise _fail("onoff_sources", f"must be a whole number >= 0, got {n!r}")
        for name in ("size_bytes_mean", "unresponsive_rate_bps", "on_mean_s", "off_mean_s", "onoff_rate_bps"):
            _positive(name, getattr(self, name))
        for name in ("pareto_alpha", "onoff_alpha"):
            a = getattr(self, name)
            if not (isinstance(a, (int, float)) and not isinstance(a, bool) and math.isfinite(a) and a > 1):
                raise _fail(name, f"must be > 1 (the mean is infinite otherwise), got {a!r}")
        e = self.responsive_probe
        if not (isinstance(e, (int, float)) and not isinstance(e, bool) and math.isfinite(e) and e >= 0):
            raise _fail("responsive_probe", f"must be >= 0 (0: responsive flows take exactly their share), got {e!r}")
        _positive("responsive_rtt_ms", self.responsive_rtt_ms)
        s = self.responsive_share
        if not (isinstance(s, (int, float)) and not isinstance(s, bool) and 0.0 <= s <= 1.0):
            raise _fail("responsive_share", f"must be in [0, 1], got {s!r}")
        if r == 0 and n == 0:
            raise TracegenError("has no source: flow_rate_per_s is 0 and onoff_sources is 0", field=_SECTION,
                                hint="set flow_rate_per_s > 0 or onoff_sources > 0")


@dataclass(frozen=True)
class CrossResult:
    """Per-step cross traffic (arrays of the capacity's length)."""

    cross_bps: np.ndarray       # cross traffic carried (responsive + unresponsive, at most the capacity)
    available_bps: np.ndarray   # the foreground's share
    offered_bps: np.ndarray     # cross load offered: responsive carried + all unresponsive demand
    n_active: np.ndarray        # time-averaged number of active cross flows (responsive + unresponsive)
    n_responsive: np.ndarray    # time-averaged number of active responsive flows
    unresponsive_bps: np.ndarray  # unresponsive demand (flows + on/off sources), may exceed the capacity
    responsive_bps: np.ndarray    # carried by the responsive flows (their fair share), cross_bps minus unresponsive


# --- random building blocks -------------------------------------------------------------------------------

def pareto_samples(mean: float, alpha: float, size: int, rng: np.random.Generator) -> np.ndarray:
    """Pareto (type I) draws with the given mean: scale x_m = mean·(alpha − 1)/alpha."""
    x_m = mean * (alpha - 1.0) / alpha
    return x_m * (1.0 + rng.pareto(alpha, size))


def _pareto_residual(mean: float, alpha: float, size: int, rng: np.random.Generator) -> np.ndarray:
    """Draws from the equilibrium residual-life law of a Pareto period (stationary start of a renewal process).

    F_e(x) = x/mean for x < x_m, else 1 − (x_m/x)^(alpha−1)/alpha; inverted in closed form.
    """
    x_m = mean * (alpha - 1.0) / alpha
    u = rng.random(size)
    knee = (alpha - 1.0) / alpha
    with np.errstate(divide="ignore"):
        tail = x_m * (alpha * (1.0 - u)) ** (-1.0 / (alpha - 1.0))
    return np.where(u < knee, u * mean, tail)


def poisson_arrivals_s(rate_per_s: float, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Sorted arrival times of a Poisson process of ``rate_per_s`` on [0, duration_s)."""
    n = rng.poisson(rate_per_s * duration_s)
    return np.sort(rng.uniform(0.0, duration_s, n))


# --- binning ----------------------------------------------------------------------------------------------

def _bin_jumps(at_s: np.ndarray, jump: np.ndarray, n_steps: int, step_s: float) -> np.ndarray:
    """Per-step time average of sum_i jump_i·1[t >= at_i] (exact, via two bincounts)."""
    keep = at_s < n_steps * step_s
    e, d = at_s[keep], jump[keep]
    j = np.minimum(np.floor(e / step_s).astype(np.int64), n_steps - 1)
    full = np.cumsum(np.bincount(j + 1, weights=d, minlength=n_steps + 1)[:n_steps])
    part = np.bincount(j, weights=d * ((j + 1) * step_s - e), minlength=n_steps)
    return full + part / step_s


def _bin_intervals(start_s: np.ndarray, end_s: np.ndarray, weight: float, n_steps: int,
                   step_s: float) -> np.ndarray:
    """Per-step time average of weight·sum_i 1[start_i <= t < end_i] (exact)."""
    start = np.maximum(np.asarray(start_s, dtype=float), 0.0)
    e = np.concatenate([start, np.asarray(end_s, dtype=float)])
    d = np.concatenate([np.ones(start.size), -np.ones(start.size)])
    if e.size < n_steps // 4:  # few edges: as a step function (sort + one pass over the steps)
        order = np.argsort(e, kind="stable")
        times = np.concatenate([[0.0], e[order]])
        values = np.concatenate([[0.0], np.cumsum(d[order])])
        return weight * _bin_step_function(times, values, n_steps, step_s)
    return weight * _bin_jumps(e, d, n_steps, step_s)


class _StepFn:
    """Per-step time averages of step functions equal to values[r][i] on [times[i], times[i+1]) (times[0] = 0),
    for any range of steps (so long series can be produced chunk by chunk). ``values`` is one row per
    function, all with the same jump times.

    Steps without a jump take their segment's value; steps holding a jump are integrated.
    """

    def __init__(self, times_s: np.ndarray, values: np.ndarray, n_steps: int, step_s: float) -> None:
        self.times = np.asarray(times_s, dtype=float)
        self.values = np.atleast_2d(np.asarray(values, dtype=float))
        self.n, self.step = n_steps, step_s
        if self.times.size > 1:
            first = np.minimum(np.ceil(self.times / step_s).astype(np.int64), n_steps)
            first[0] = 0
            self.first = np.maximum.accumulate(first)
            hold = np.unique(np.minimum(np.floor(self.times[1:] / step_s).astype(np.int64), n_steps))
            self.hold = hold[hold < n_steps]
            self.cum = np.concatenate([np.zeros((self.values.shape[0], 1)),
                                       np.cumsum(self.values[:, :-1] * np.diff(self.times), axis=1)], axis=1)

    def mean(self, k: int, end: int) -> list[np.ndarray]:
        """Averages over steps k..end-1, one array per function."""
        if self.times.size == 1:
            return [np.full(end - k, v[0]) for v in self.values]
        lo = int(np.searchsorted(self.first, k, side="right")) - 1
        hi = int(np.searchsorted(self.first, end, side="left"))
        bounds = np.clip(self.first[lo:hi], k, end)
        lengths = np.diff(np.append(bounds, end))
        if hi - lo == 1:
            outs = [np.full(end - k, v[lo]) for v in self.values]
        else:
            idx = np.repeat(np.arange(lo, hi), lengths)
            outs = [v[idx] for v in self.values]
        h = self.hold[np.searchsorted(self.hold, k):np.searchsorted(self.hold, end)]
        if h.size:
            step = self.step
            edges = np.concatenate([h * step, (h + 1) * step])
            j = np.searchsorted(self.times, edges, side="right") - 1
            dt = edges - self.times[j]
            for out, v, cum in zip(outs, self.values, self.cum):
                f = cum[j] + v[j] * dt
                out[h - k] = (f[h.size:] - f[:h.size]) / step
        return outs


def _bin_step_function(times_s: np.ndarray, values: np.ndarray, n_steps: int, step_s: float) -> np.ndarray:
    """Per-step time average of the function equal to values[i] on [times[i], times[i+1]) (times[0] = 0)."""
    return _StepFn(times_s, values, n_steps, step_s).mean(0, n_steps)[0]


# --- on/off sources ---------------------------------------------------------------------------------------

_ONOFF_CHUNK_PERIODS = 1 << 20  # periods drawn at a time (bounds memory; sources are processed in row blocks)


def _onoff_rate(n_sources: int, on_mean_s: float, off_mean_s: float, alpha: float, rate_bps: float,
                n_steps: int, step_s: float, rng: np.random.Generator) -> np.ndarray:
    total = n_steps * step_s
    rate = np.zeros(n_steps)
    if n_sources == 0:
        return rate
    p_on = on_mean_s / (on_mean_s + off_mean_s)
    start_on = rng.random(n_sources) < p_on
    first = np.where(start_on, _pareto_residual(on_mean_s, alpha, n_sources, rng),
                     _pareto_residual(off_mean_s, alpha, n_sources, rng))
    pairs0 = int(math.ceil(1.2 * total / (on_mean_s + off_mean_s))) + 4
    rows = max(1, _ONOFF_CHUNK_PERIODS // (2 * pairs0))
    for r0 in range(0, n_sources, rows):  # blocks of sources, each block vectorised
        s_on = start_on[r0:r0 + rows, None]
        # periods[:, 0]: residual of the starting state; then the other state and the start state in turn
        chunks = [first[r0:r0 + rows, None]]
        covered = chunks[0][:, 0].copy()
        pairs = pairs0
        while covered.min() < total:
            on = pareto_samples(on_mean_s, alpha, (s_on.shape[0], pairs), rng)
            off = pareto_samples(off_mean_s, alpha, (s_on.shape[0], pairs), rng)
            block = np.empty((s_on.shape[0], 2 * pairs))
            block[:, 0::2] = np.where(s_on, off, on)
            block[:, 1::2] = np.where(s_on, on, off)
            chunks.append(block)
            covered += block.sum(axis=1)
            pairs = max(4, pairs // 4)
        periods = np.concatenate(chunks, axis=1)
        ends = np.cumsum(periods, axis=1)
        begins = ends - periods
        is_on = np.empty(periods.shape, dtype=bool)
        is_on[:, 0::2] = s_on
        is_on[:, 1::2] = ~s_on
        sel = is_on & (begins < total)
        rate += _bin_intervals(begins[sel], ends[sel], rate_bps, n_steps, step_s)
    return rate


def _n_steps(duration_s: float, step_s: float) -> int:
    for name, v in (("duration_s", duration_s), ("step_s", step_s)):
        if not (math.isfinite(v) and v > 0):
            raise TracegenError(f"must be > 0, got {v}", field=name)
    n = int(round(duration_s / step_s))
    if n < 1:
        raise TracegenError(f"step {step_s} s is longer than the duration {duration_s} s", field="step_s")
    return n


def superposed_onoff(n_sources: int, on_mean_s: float, off_mean_s: float, alpha: float, rate_bps: float,
                     duration_s: float, step_s: float, rng: np.random.Generator) -> np.ndarray:
    """Aggregate rate (bit/s, per step of ``step_s``, round(duration/step) steps) of Pareto on/off sources.

    Each source alternates on (``rate_bps``) and off periods, Pareto with the given means and tail index
    ``alpha``, and starts in its stationary state (state on with probability on/(on+off), first period from
    the residual-life law), so the series has no warm-up transient.
    """
    if not (isinstance(n_sources, (int, np.integer)) and not isinstance(n_sources, bool) and n_sources >= 0):
        raise TracegenError(f"must be a whole number >= 0, got {n_sources!r}", field="n_sources")
    for name, v in (("on_mean_s", on_mean_s), ("off_mean_s", off_mean_s), ("rate_bps", rate_bps)):
        if not (math.isfinite(v) and v > 0):
            raise TracegenError(f"must be > 0, got {v}", field=name)
    if not (math.isfinite(alpha) and alpha > 1):
        raise TracegenError(f"must be > 1 (the mean is infinite otherwise), got {alpha}", field="alpha")
    return _onoff_rate(int(n_sources), on_mean_s, off_mean_s, alpha, rate_bps, _n_steps(duration_s, step_s),
                       step_s, rng)


# --- responsive flows: processor sharing ------------------------------------------------------------------

class _Served:
    """S(t), the integral of a per-step rate from 0 to t (bits), from its cumulative sum at step boundaries."""

    def __init__(self, rate_bps: np.ndarray, step_s: float) -> None:
        self.rate, self.step, self.n = rate_bps, step_s, rate_bps.size
        self.cum = np.empty(self.n + 1)
        self.cum[0] = 0.0
        np.cumsum(rate_bps, out=self.cum[1:])
        self.cum *= step_s
        self.end = float(self.cum[-1])

    def at(self, t: np.ndarray) -> np.ndarray:
        """S at times t (each clipped to the step it falls in)."""
        k = np.minimum((t // self.step).astype(np.int64), self.n - 1)
        return np.minimum(self.cum[k] + self.rate[k] * (t - k * self.step), self.cum[k + 1])

    def time_of(self, a: np.ndarray) -> np.ndarray:
        """The first time S reaches each a (a <= S(end))."""
        idx = np.searchsorted(self.cum, a, side="left")
        k = np.maximum(idx - 1, 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            t = k * self.step + (a - self.cum[k]) / self.rate[k]
        return np.where(idx == 0, 0.0, t)


def _processor_sharing(arrive_s: np.ndarray, size_bits: np.ndarray, left_bps: np.ndarray,
                       step_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact processor sharing of ``left_bps`` (piecewise constant per step) among the active flows and
    the foreground. Returns (event times, starting with 0; number of active flows from each event on).

    Loop over events (one arrival and one departure a flow): each flow's departure depends on how many
    others are active meanwhile, which depends on their departures, so it is sequential. The loop runs on
    the "served" axis, the cumulative left-over capacity S(t) (bits): between events every active flow
    and the foreground attain dS/(n+1), so the loop is plain float arithmetic; arrival times are mapped
    onto the axis and departures back to time with one vectorised pass each. A departure that reaches its
    size on a stretch where nothing is left (S flat) leaves at the start of that stretch.
    """
    n_steps = len(left_bps)
    total = n_steps * step_s
    sv = _Served(np.asarray(left_bps, dtype=float), step_s)
    end_cum = sv.end
    s_arr = sv.at(arrive_s).tolist() if arrive_s.size else []

    arrive, size = arrive_s.tolist(), size_bits.tolist()
    n_flows = len(arrive)
    heap: list[tuple[float, int]] = []
    push, pop = heapq.heappush, heapq.heappop
    clock = 0.0      # attained service of every active flow (bits)
    served = 0.0     # S at the last event
    n, i = 0, 0
    ev: list[float] = []      # arrival: its time (>= 0); departure: -1 - its S value
    app = ev.append
    inf = math.inf
    while True:
        s_a = s_arr[i] if i < n_flows else inf
        s_d = served + (heap[0][0] - clock) * (n + 1) if heap else inf
        if s_a < s_d or (s_a == s_d and s_a != inf and arrive[i] <= float(sv.time_of(np.array([s_d]))[0])):
            clock += (s_a - served) / (n + 1)
            served = s_a
            push(heap, (clock + size[i], i))
            n += 1
            app(arrive[i])
            i += 1
        else:
            if s_d >= end_cum:
                break
            clock = pop(heap)[0]
            served = s_d
            n -= 1
            app(-1.0 - s_d)
    times = np.asarray(ev, dtype=float)
    is_dep = times < 0.0
    if is_dep.any():
        times[is_dep] = np.minimum(sv.time_of(-1.0 - times[is_dep]), total)
        times = np.maximum.accumulate(times)  # rounding must not reorder events
    counts = np.cumsum(np.where(is_dep, -1.0, 1.0))
    return np.concatenate([[0.0], times]), np.concatenate([[0.0], counts])


def check_capacity(capacity_bps: np.ndarray, step_s: float) -> np.ndarray:
    """A capacity series (finite, >= 0, 1-D, non-empty) and its step (> 0), as float; else TracegenError."""
    capacity = np.asarray(capacity_bps, dtype=float)
    if capacity.ndim != 1 or capacity.size == 0:
        raise TracegenError(f"must be a non-empty 1-D array, got shape {capacity.shape}", field="capacity_bps")
    bad = ~(np.isfinite(capacity) & (capacity >= 0))
    if bad.any():
        raise TracegenError(f"must be finite and >= 0, got {capacity[bad][0]} at step {int(np.argmax(bad))}",
                            field="capacity_bps", hint="unknown capacity (NaN) has to be filled before synthesis")
    if isinstance(step_s, bool) or not (isinstance(step_s, (int, float)) and math.isfinite(step_s) and step_s > 0):
        raise TracegenError(f"must be > 0, got {step_s!r}", field="step_s")
    return capacity


class Flows:
    """Responsive flows shared by processor sharing, ready to be binned chunk by chunk (``chunk``)."""

    def __init__(self, capacity: np.ndarray, step_s: float, arrive_s: np.ndarray, size_bits: np.ndarray,
                 unresponsive_bps: np.ndarray | None, n_unresponsive: np.ndarray | float) -> None:
        self.capacity, self.step, self.n = capacity, step_s, capacity.size
        self.unresp = unresponsive_bps
        self.n_unresp = n_unresponsive
        self.left = capacity if unresponsive_bps is None else capacity - np.minimum(unresponsive_bps, capacity)
        times, counts = _processor_sharing(arrive_s, size_bits, self.left, step_s)
        self.fns = _StepFn(times, np.stack([counts, 1.0 / (counts + 1.0)]), self.n, step_s)

    def chunk(self, k: int, end: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
        """(n_responsive, available_bps, responsive_bps, left_bps, unresponsive_bps or None) for steps k..end-1."""
        left = self.left[k:end]
        n_resp, available = self.fns.mean(k, end)
        available *= left
        responsive = left - available
        unresp = self.unresp[k:end] if self.unresp is not None else None
        return n_resp, available, responsive, left, unresp

    def result(self) -> CrossResult:
        """All steps as a CrossResult."""
        n = self.n
        out = {name: np.empty(n) for name in ("cross_bps", "available_bps", "offered_bps", "n_active",
                                               "n_responsive", "responsive_bps")}
        for k in range(0, n, CHUNK):
            end = min(k + CHUNK, n)
            n_resp, available, responsive, left, unresp = self.chunk(k, end)
            out["available_bps"][k:end] = available
            out["responsive_bps"][k:end] = responsive
            out["n_responsive"][k:end] = n_resp
            if unresp is None:
                out["cross_bps"][k:end] = responsive
                out["offered_bps"][k:end] = responsive
                out["n_active"][k:end] = n_resp
            else:
                out["cross_bps"][k:end] = (self.capacity[k:end] - left) + responsive
                out["offered_bps"][k:end] = responsive + unresp
                n_u = self.n_unresp[k:end] if isinstance(self.n_unresp, np.ndarray) else self.n_unresp
                out["n_active"][k:end] = n_resp + n_u
        unresp = self.unresp if self.unresp is not None else np.zeros(n)
        return CrossResult(unresponsive_bps=unresp, **out)


def fair_share(capacity_bps: np.ndarray, step_s: float, arrive_s: np.ndarray, size_bytes: np.ndarray,
               unresponsive_bps: np.ndarray | float = 0.0, n_unresponsive: np.ndarray | float = 0.0) -> CrossResult:
    """Share the capacity among given responsive flows and the foreground, after the unresponsive load.

    Unresponsive demand ``unresponsive_bps`` (per step) is carried first, up to the capacity; the
    responsive flows (arrival times ``arrive_s``, sorted, and sizes ``size_bytes``) and the foreground
    split the rest equally, exactly (processor sharing on the piecewise-constant left-over rate).
    ``n_unresponsive`` only feeds the ``n_active`` count.
    """
    return _fair_flows(capacity_bps, step_s, arrive_s, size_bytes, unresponsive_bps, n_unresponsive).result()


def _fair_flows(capacity_bps, step_s, arrive_s, size_bytes, unresponsive_bps=0.0, n_unresponsive=0.0) -> Flows:
    capacity = check_capacity(capacity_bps, step_s)
    arrive = np.asarray(arrive_s, dtype=float)
    size_bits = 8.0 * np.asarray(size_bytes, dtype=float)
    if arrive.shape != size_bits.shape or arrive.ndim != 1:
        raise TracegenError(f"arrive_s and size_bytes must be 1-D of one length, got {arrive.shape} and "
                            f"{size_bits.shape}", field="size_bytes")
    if arrive.size and (np.any(np.diff(arrive) < 0) or arrive[0] < 0):
        raise TracegenError("must be sorted and >= 0", field="arrive_s")
    if arrive.size and not np.all(size_bits > 0):
        raise TracegenError(f"must be > 0, got {size_bits[size_bits <= 0][0] / 8}", field="size_bytes")
    unresp = np.asarray(unresponsive_bps, dtype=float)
    if unresp.ndim == 0 and unresp == 0:
        unresp = None
    else:
        unresp = np.array(np.broadcast_to(unresp, capacity.shape))
        bad = ~(np.isfinite(unresp) & (unresp >= 0))
        if bad.any():
            raise TracegenError(f"must be finite and >= 0, got {unresp[bad][0]}", field="unresponsive_bps")
    return Flows(capacity, float(step_s), arrive, size_bits, unresp, n_unresponsive)


def generate(ct: CrossTraffic, capacity_bps: np.ndarray, step_s: float, rng: np.random.Generator) -> CrossResult:
    """Cross traffic on the grid of ``capacity_bps`` (one value per step of ``step_s``); see the module docstring.

    Draws, in this order: flow arrivals (Poisson), sizes (Pareto), which flows are responsive, on/off
    periods.
    """
    return flows(ct, capacity_bps, step_s, rng).result()


def flows(ct: CrossTraffic, capacity_bps: np.ndarray, step_s: float, rng: np.random.Generator) -> Flows:
    """``generate`` before binning: the shared flows, to be binned chunk by chunk (``Flows.chunk``)."""
    if not isinstance(ct, CrossTraffic):
        raise TracegenError(f"must be a CrossTraffic, got {type(ct).__name__}", field=_SECTION)
    capacity = check_capacity(capacity_bps, step_s)
    n_steps = capacity.size
    total = n_steps * step_s
    arrive = poisson_arrivals_s(ct.flow_rate_per_s, total, rng) if ct.flow_rate_per_s > 0 else np.empty(0)
    sizes = pareto_samples(ct.size_bytes_mean, ct.pareto_alpha, arrive.size, rng)
    responsive = rng.random(arrive.size) < ct.responsive_share
    u_start = arrive[~responsive]
    if u_start.size == 0 and ct.onoff_sources == 0:
        return Flows(capacity, float(step_s), arrive, 8.0 * sizes, None, 0.0)
    onoff = _onoff_rate(int(ct.onoff_sources), ct.on_mean_s, ct.off_mean_s, ct.onoff_alpha, ct.onoff_rate_bps,
                        n_steps, step_s, rng)
    u_end = u_start + 8.0 * sizes[~responsive] / ct.unresponsive_rate_bps
    n_unresp = _bin_intervals(u_start, u_end, 1.0, n_steps, step_s)
    return Flows(capacity, float(step_s), arrive[responsive], 8.0 * sizes[responsive],
                 ct.unresponsive_rate_bps * n_unresp + onoff, n_unresp)


def hurst_aggregated_variance(x: np.ndarray, block_sizes: np.ndarray | None = None) -> float:
    """Hurst exponent by the aggregated-variance method: H = 1 + β/2, β the least-squares slope of
    log Var(X^(m)) against log m, X^(m) the means of non-overlapping blocks of m samples.

    Default block sizes: 20 log-spaced values from 10 to len(x)/50 (at least 50 blocks each: fewer blocks
    make the variance at large m, and so the slope, noisy).
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or not np.all(np.isfinite(x)):
        raise TracegenError("must be a finite 1-D series", field="x")
    n = x.size
    if block_sizes is None:
        if n < 1000:
            raise TracegenError(f"needs at least 1000 samples for the default block sizes, got {n}", field="x")
        m = np.unique(np.round(np.logspace(1.0, np.log10(n / 50.0), 20)).astype(np.int64))
    else:
        m = np.unique(np.asarray(block_sizes, dtype=np.int64))
        if m.size < 2 or m[0] < 1 or m[-1] > n // 2:
            raise TracegenError(f"needs two or more distinct sizes in [1, {n // 2}], got {list(m)}",
                                field="block_sizes")
    var = np.empty(m.size)
    for i, size in enumerate(m.tolist()):  # one pass per block size (~20), each vectorised
        k = n // size
        var[i] = x[: k * size].reshape(k, size).mean(axis=1).var(ddof=1)
    if np.any(var <= 0):
        raise TracegenError("has zero variance at some block size (a constant series has no Hurst exponent)",
                            field="x")
    beta = np.polyfit(np.log(m), np.log(var), 1)[0]
    return float(1.0 + beta / 2.0)


__all__ = ["CrossTraffic", "CrossResult", "Flows", "generate", "flows", "fair_share", "superposed_onoff",
           "hurst_aggregated_variance", "pareto_samples", "poisson_arrivals_s"]
