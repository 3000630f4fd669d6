"""The core sampler: new traces from a fitted PathModel, optionally tilted toward rare conditions.

Grid. Sample k covers [k step, (k+1) step). Everything is built on a *base grid* no coarser than the
model step h = ``model.step_s``: the output grid itself when step <= h, else step / r with
r = ceil(step / h); a coarser output sample then averages its r base samples for the rate columns
(bandwidth, loss) and takes the first one for the point columns (RTT, jitter, state), as the Trace
schema reads rates and points.

1. State path (hidden semi-Markov, in seconds). The first state is drawn from the state shares (or is
   ``start_state``) with a fresh dwell (not the equilibrium residual, so the first segment is a little
   shorter on average than under a stationary start); then dwell ``DwellFit.sample_s`` and next state
   from the ``model.jumps`` row, alternately. Dwells are drawn in bulk per state; the jump chain is
   walked in a short Python loop over *segments* (one step per dwell of >= 1 s, so a few hundred per
   hour of trace, against 360 000 samples at 10 ms), which is the only sequential part. A segment
   covers the base samples whose start lies in it (the state of a sample is the state at its start);
   a segment shorter than a base sample may hold none.
2. Level. Per segment, ticks of h seconds from the segment's start; log bandwidth of a tick is the
   state mean + an AR residual with the state's ARFit, *restarted at every segment* from its stationary
   distribution (the fit never glues segments either): p pre-sample values ~ N(0, Toeplitz(gamma)) give
   the filter state, and all segments of a state are filtered at once by ``scipy.signal.lfilter`` on a
   padded 2-D array (segments grouped by length class so padding at most doubles the work). A state
   without an ARFit gets i.i.d. N(0, cov[0][0]). Finer base samples hold the tick's value. Outage
   state: bandwidth exactly 0.
3. RTT, per tick and held like the level (the model says nothing below h). Joint models: log RTT from
   the state's 2x2 covariance given the tick's log-bandwidth residual (conditional Gaussian). Otherwise
   i.i.d. log-normal from ``state.rtt_log_ms`` (mean, sd), the residual correlation omitted; NaN where
   the state has none.
4. Loss. ``model.loss`` (Gilbert-Elliott) steps once per h on the trace's global grid from its
   stationary state (``GilbertElliott.sample``). With a state ``loss_mean`` the chain modulates it: a
   state loses b_s in bad ticks and a_s in good ones, b_s = min(1, c loss_bad), a_s = (loss_mean -
   pi_bad b_s) / (1 - pi_bad), c = loss_mean / stationary_loss, so bursts keep the chain's timing and
   each state keeps its mean. Without ``loss_mean`` the chain's loss_good/loss_bad are used; without a
   chain, ``loss_mean`` (NaN if that is missing too). Outage samples and interruptions: loss 1.
5. Jitter: RFC 3550 A.8 (``tracegen.jitter.interarrival_jitter``) over the tick RTT series in time
   order, RTT variation standing in for transit-time variation; held like RTT, NaN where RTT is NaN.
6. Events: ``events.draw_events`` draws handovers and standalone outages (times, breaks, RTT spikes,
   loss bursts, the state after a handover, tilt ratios); here they are laid on the base grid: a break
   sets bandwidth 0, loss 1 and RTT/jitter NaN for the base samples starting inside it; a switch
   restarts the state path at its time with a fresh dwell. A mark sits on the sample containing the
   event time; in one sample the earliest event wins.

Note that the fitted outage state already holds the outages the fit saw, handover interruptions
included, so events add outage time on top of it.

Randomness: each call consumes only ``rng``. ``sample_traces`` gives trace i the Generator
``SeedSequence(seed, spawn_key=(i, 0))`` (the sampler part of ``tracegen.synth.trace_rng``), so trace i
is the same whatever the count, order or worker split.
"""

from __future__ import annotations

import math
from bisect import bisect_right
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg, special
from scipy.signal import lfilter, lfiltic

from ..errors import TracegenError
from ..jitter import interarrival_jitter
from .events import EventDraw, HandoverPlan, draw_events
from .tilt import Tilt, TiltPlan, dwell_log_ratio

MIN_STEP_S = 0.01
STREAM_PART = 0  # spawn_key=(index, STREAM_PART): the sampler's stream in tracegen.synth.trace_rng
_EPS = 1e-9


@dataclass(frozen=True, eq=False)
class SampledTrace:
    """One sampled trace as numpy columns; ``log_likelihood_ratio`` is log p/q under the tilt (0 without)."""

    t_s: np.ndarray
    bandwidth_bps: np.ndarray
    rtt_ms: np.ndarray
    loss: np.ndarray
    jitter_ms: np.ndarray
    state: np.ndarray
    event: np.ndarray
    log_likelihood_ratio: float = 0.0

    def __len__(self) -> int:
        return len(self.t_s)


# --------------------------------------------------------------------------------------------------
# Per-model precomputation


def _ar_autocov(coefs: np.ndarray, sigma2: float) -> np.ndarray:
    """gamma_0..gamma_p of a stationary AR(p): solve gamma_k - sum_j phi_j gamma_|k-j| = sigma2 [k = 0]."""
    p = coefs.size
    a = np.eye(p + 1)
    for k in range(p + 1):
        for j in range(1, p + 1):
            a[k, abs(k - j)] -= coefs[j - 1]
    rhs = np.zeros(p + 1)
    rhs[0] = sigma2
    return np.linalg.solve(a, rhs)


@dataclass(frozen=True)
class _Level:
    kind: str                 # "outage", "ar", "iid"
    mean_log: float = 0.0
    a: np.ndarray | None = None       # lfilter denominator [1, -phi]
    sigma: float = 0.0                # innovation sd (ar) or marginal sd (iid)
    chol: np.ndarray | None = None    # Cholesky factor of the p x p stationary covariance
    zi_map: np.ndarray | None = None  # (p, p): pre-sample values (y_-1..y_-p) -> lfilter zi


def _cum_rows(q: np.ndarray) -> list[list[float]]:
    """Cumulative rows for bisect; the last positive entry is inf so u in [0, 1) never falls off."""
    out = []
    for i, row in enumerate(np.atleast_2d(q)):
        c = np.cumsum(row)
        pos = np.flatnonzero(row > 0)
        if pos.size == 0:  # a one-state model: stay
            c = np.full(row.size, np.inf)
            c[: i] = 0.0
        else:
            c[pos[-1]:] = np.inf
        out.append(c.tolist())
    return out


@dataclass(frozen=True)
class _Plan:
    tilt: TiltPlan
    start_cum: list[float]
    jump_cum: list[list[float]]
    post_cum: np.ndarray | None
    mean_dwell_s: float
    levels: tuple[_Level, ...]
    rtt_mu: np.ndarray
    rtt_beta: np.ndarray
    rtt_sd: np.ndarray
    has_rtt: np.ndarray
    loss_tab: np.ndarray           # (n, 2): loss in GE good / bad ticks (equal columns without a chain)
    outage: np.ndarray             # (n,) bool


def _build_plan(model: Any, tilt: Tilt | None) -> _Plan:
    tp = TiltPlan.build(model, tilt)
    n = model.n_states
    states = model.states
    # mean dwell under q along the tilted embedded chain: sizes the first batch of dwell draws
    means = np.array([f.mean_s for f in tp.dwell_q])
    try:
        w, v = np.linalg.eig(tp.jump_q.T)
        nu = np.abs(np.real(v[:, np.argmin(np.abs(w - 1.0))]))
        mean_dwell = float(nu @ means / nu.sum()) if n > 1 else float(means[0])
    except np.linalg.LinAlgError:  # pragma: no cover - a 9x9 eigenproblem does not fail in practice
        mean_dwell = float(means.min())
    if not (math.isfinite(mean_dwell) and mean_dwell > 0):
        mean_dwell = float(means.min())
    levels = []
    rtt_mu, rtt_beta, rtt_sd = np.zeros(n), np.zeros(n), np.zeros(n)
    has_rtt = np.zeros(n, dtype=bool)
    for i, s in enumerate(states):
        if s.rtt_log_ms is not None:
            rtt_mu[i], rtt_sd[i], has_rtt[i] = s.rtt_log_ms[0], s.rtt_log_ms[1], True
        if s.kind == "outage":
            levels.append(_Level("outage"))
            continue
        if model.with_rtt:
            c = np.array(s.cov, dtype=np.float64)
            rtt_mu[i] = s.mean[1]
            rtt_beta[i] = c[0, 1] / c[0, 0]
            rtt_sd[i] = math.sqrt(max(c[1, 1] - c[0, 1] ** 2 / c[0, 0], 0.0))
            has_rtt[i] = True
        ar = s.ar
        if ar is None:
            levels.append(_Level("iid", s.mean[0], sigma=math.sqrt(s.cov[0][0])))
        elif ar.order == 0:
            levels.append(_Level("iid", s.mean[0], sigma=math.sqrt(ar.sigma2)))
        else:
            phi = np.asarray(ar.coefs, dtype=np.float64)
            gamma = _ar_autocov(phi, ar.sigma2)
            a = np.concatenate(([1.0], -phi))
            chol = np.linalg.cholesky(linalg.toeplitz(gamma[: phi.size]))
            zi_map = np.array([lfiltic([1.0], a, np.eye(phi.size)[j]) for j in range(phi.size)])
            levels.append(_Level("ar", s.mean[0], a, math.sqrt(ar.sigma2), chol, zi_map))
    outage = np.array([s.kind == "outage" for s in states])
    loss_tab = np.full((n, 2), np.nan)
    ge = model.loss
    for i, s in enumerate(states):
        lm = s.loss_mean
        if ge is None:
            loss_tab[i] = np.nan if lm is None else lm
        elif lm is None:
            loss_tab[i] = (ge.loss_good, ge.loss_bad)
        else:
            pi, stat = ge.stationary_bad, ge.stationary_loss
            if stat <= 0 or pi <= 0:
                loss_tab[i] = lm
            elif pi >= 1:
                loss_tab[i] = (0.0, lm)
            else:
                bad = min(1.0, lm / stat * ge.loss_bad)
                loss_tab[i] = (min(max((lm - pi * bad) / (1.0 - pi), 0.0), 1.0), bad)
    loss_tab[outage] = 1.0
    post_cum = None
    if tp.post_q is not None:
        post_cum = np.array(_cum_rows(tp.post_q[None, :])[0])
    return _Plan(tp, _cum_rows(tp.start_q[None, :])[0], _cum_rows(tp.jump_q), post_cum, mean_dwell,
                 tuple(levels), rtt_mu, rtt_beta, rtt_sd, has_rtt, loss_tab, outage)


_LAST: tuple[Any, Any, _Plan] | None = None


def _plan(model: Any, tilt: Tilt | None) -> _Plan:
    """The plan of (model, tilt); the last one is kept (holding both, so the identity check is safe)."""
    global _LAST
    last = _LAST
    if last is not None and last[0] is model and last[1] is tilt:
        return last[2]
    plan = _build_plan(model, tilt)
    _LAST = (model, tilt, plan)
    return plan


# --------------------------------------------------------------------------------------------------
# State path


def _walk(plan: _Plan, model: Any, rng: np.random.Generator, t0: float, t1: float,
          first: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Segments covering [t0, t1) from state ``first``: (starts_s, states, log p/q of jumps and dwells)."""
    need = t1 - t0
    batch = int(need / plan.mean_dwell_s * 1.25) + 8
    cum = plan.jump_cum
    states_parts: list[np.ndarray] = []
    dwell_parts: list[np.ndarray] = []
    total = 0.0
    s = first
    fresh = True
    while total < need:  # a loop over batches of segments
        u = rng.random(batch - 1 if fresh else batch).tolist()
        chain = [first] if fresh else []
        for x in u:  # the jump chain: one step per segment
            s = bisect_right(cum[s], x)
            chain.append(s)
        fresh = False
        st = np.array(chain, dtype=np.int64)
        dw = np.empty(st.size)
        for k in np.unique(st).tolist():  # dwells in bulk, per state
            idx = np.flatnonzero(st == k)
            dw[idx] = plan.tilt.dwell_q[k].sample_s(rng, idx.size)
        states_parts.append(st)
        dwell_parts.append(dw)
        total += float(dw.sum())
        batch = max(8, int((need - total) / plan.mean_dwell_s * 1.25) + 8)
    states = np.concatenate(states_parts)
    dwells = np.concatenate(dwell_parts)
    ends = np.cumsum(dwells)
    used = 1 + int(np.searchsorted(ends, need, side="left"))
    states, dwells = states[:used], dwells[:used]
    starts = t0 + np.concatenate(([0.0], ends[: used - 1]))
    llr = 0.0
    tp = plan.tilt
    if not tp.identity:
        if used > 1:
            llr += float(tp.jump_log_ratio[states[:-1], states[1:]].sum())
        for k in np.flatnonzero(tp.dwell_scale != 1.0).tolist():
            sel = states == k
            if sel.any():
                llr += float(dwell_log_ratio(model.states[k].dwell, float(tp.dwell_scale[k]), dwells[sel]).sum())
    return starts, states, llr


def _state_path(plan: _Plan, model: Any, rng: np.random.Generator, end_s: float, start_state: int | None,
                switches: list[tuple[float, int]]) -> tuple[np.ndarray, np.ndarray, float]:
    """The whole path: a walk from the first state, restarted at each switch (time, state)."""
    llr = 0.0
    if start_state is None:
        first = bisect_right(plan.start_cum, float(rng.random()))
        llr += float(plan.tilt.start_log_ratio[first])
    else:
        first = start_state
    pieces = [(0.0, first)] + [(t, k) for t, k in sorted(switches) if 0.0 < t < end_s]
    starts, states = [], []
    for i, (t0, k) in enumerate(pieces):  # a loop over events
        t1 = pieces[i + 1][0] if i + 1 < len(pieces) else end_s
        if t1 <= t0:
            continue
        st, ss, lr = _walk(plan, model, rng, t0, t1, k)
        starts.append(st)
        states.append(ss)
        llr += lr
    return np.concatenate(starts), np.concatenate(states), llr


# --------------------------------------------------------------------------------------------------
# Levels, RTT, loss on the base grid


def _ar_residuals(level: _Level, rng: np.random.Generator, lengths: np.ndarray) -> np.ndarray:
    """Concatenated stationary AR residual segments of the given tick lengths (each restarted)."""
    total = int(lengths.sum())
    if level.kind == "iid":
        return level.sigma * rng.standard_normal(total)
    p = level.chol.shape[0]
    e = level.sigma * rng.standard_normal(total)
    zi = (rng.standard_normal((lengths.size, p)) @ level.chol.T) @ level.zi_map
    out = np.empty(total)
    offsets = np.concatenate(([0], np.cumsum(lengths)))
    cls = np.ceil(np.log2(np.maximum(lengths, 1))).astype(np.int64)
    for c in np.unique(cls).tolist():  # a loop over length classes (<= ~20)
        rows = np.flatnonzero(cls == c)
        lens = lengths[rows]
        width = int(lens.max())
        mask = np.arange(width)[None, :] < lens[:, None]
        cols = np.arange(width)[None, :]
        src = np.where(mask, offsets[rows][:, None] + cols, 0)
        x = np.where(mask, e[src], 0.0)
        y, _ = lfilter([1.0], level.a, x, axis=1, zi=zi[rows])
        out[src[mask]] = y[mask]
    return out


def _span(t0: np.ndarray, t1: np.ndarray, b: float, nb: int) -> tuple[np.ndarray, np.ndarray]:
    """Base samples [i0, i1) whose start lies in [t0, t1)."""
    i0 = np.minimum(np.ceil(np.asarray(t0) / b - _EPS), nb).astype(np.int64)
    i1 = np.minimum(np.ceil(np.asarray(t1) / b - _EPS), nb).astype(np.int64)
    return i0, i1


def _cover(i0: np.ndarray, i1: np.ndarray, nb: int) -> np.ndarray:
    """Boolean mask of the union of the index ranges [i0, i1) (a difference array, no loop)."""
    d = np.zeros(nb + 1, dtype=np.int64)
    keep = i1 > i0
    np.add.at(d, i0[keep], 1)
    np.add.at(d, i1[keep], -1)
    return np.cumsum(d[:-1]) > 0


def _apply_events(ev: EventDraw, b: float, nb: int, bw: np.ndarray, loss: np.ndarray, rtt: np.ndarray | None,
                  jit: np.ndarray | None) -> None:
    """Breaks, RTT spikes and loss bursts on the base grid, in place (semantics: events.py)."""
    if len(ev.spikes) and rtt is not None:
        i0, i1 = _span(ev.spikes[:, 0], ev.spikes[:, 1], b, nb)
        for a, z, (s0, s1, peak) in zip(i0.tolist(), i1.tolist(), ev.spikes.tolist()):  # a loop over events
            if z > a:
                t = np.arange(a, z) * b
                rtt[a:z] += peak * np.clip((s1 - t) / (s1 - s0), 0.0, 1.0)
    if len(ev.bursts):
        i0, i1 = _span(ev.bursts[:, 0], ev.bursts[:, 1], b, nb)
        for a, z, level in zip(i0.tolist(), i1.tolist(), ev.bursts[:, 2].tolist()):  # a loop over events
            loss[a:z] = np.fmax(loss[a:z], level)
    if len(ev.breaks):
        i0, i1 = _span(ev.breaks[:, 0], ev.breaks[:, 1], b, nb)
        off = _cover(i0, i1, nb)
        bw[off] = 0.0
        loss[off] = 1.0
        if rtt is not None:
            rtt[off] = np.nan
            jit[off] = np.nan


def _tick_counts(n_samples: np.ndarray, ratio: float) -> tuple[np.ndarray, np.ndarray]:
    """Ticks of h = ratio base samples over runs of ``n_samples``: (ticks per run, base samples per tick)."""
    ticks = np.maximum(np.ceil(n_samples / ratio - _EPS), 1).astype(np.int64)
    ticks[n_samples == 0] = 0
    total = int(ticks.sum())
    first = np.repeat(np.cumsum(ticks) - ticks, ticks)
    j = np.arange(total) - first
    size = np.repeat(n_samples, ticks)
    lo = np.minimum(np.ceil(j * ratio - _EPS), size)
    hi = np.minimum(np.ceil((j + 1) * ratio - _EPS), size)
    return ticks, (hi - lo).astype(np.int64)


def _check_args(model: Any, duration_s: float, step_s: float, start_state: int | None,
                handover: HandoverPlan | None) -> None:
    for name, v in (("duration_s", duration_s), ("step_s", step_s)):
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not math.isfinite(v):
            raise TracegenError(f"must be a finite number of seconds, got {v!r}", field=name)
    if duration_s <= 0:
        raise TracegenError(f"must be > 0, got {duration_s}", field="duration_s")
    if step_s < MIN_STEP_S:
        raise TracegenError(f"must be at least {MIN_STEP_S} s, got {step_s}", field="step_s")
    if start_state is not None:
        if isinstance(start_state, bool) or not isinstance(start_state, (int, np.integer)) \
                or not 0 <= start_state < model.n_states:
            raise TracegenError(f"must be a state index 0..{model.n_states - 1}, got {start_state!r}",
                                field="start_state")
    if handover is not None and not isinstance(handover, HandoverPlan):
        raise TracegenError(f"must be a HandoverPlan, got {type(handover).__name__}", field="handover")


def sample_trace(model: Any, duration_s: float, step_s: float, rng: np.random.Generator, *,
                 tilt: Tilt | None = None, start_state: int | None = None,
                 handover: HandoverPlan | None = None) -> SampledTrace:
    """One trace of ``duration_s`` at ``step_s`` from ``model`` (semantics: module docstring).

    ``tilt`` samples from the tilted law and records log p/q; ``start_state`` fixes the first state;
    ``handover`` sets the handover knobs (events.py; None: the model's fitted events).
    """
    _check_args(model, duration_s, step_s, start_state, handover)
    plan = _plan(model, tilt)
    h = float(model.step_s)
    n = max(1, int(math.ceil(duration_s / step_s - _EPS)))
    r = 1 if step_s <= h * (1 + _EPS) else int(math.ceil(step_s / h - _EPS))
    b = step_s / r
    nb = n * r
    ratio = h / b
    if abs(ratio - round(ratio)) < 1e-9 * ratio:
        ratio = float(round(ratio))

    ev = draw_events(model, handover, plan.tilt, rng, float(duration_s))
    starts, seg_state, llr = _state_path(plan, model, rng, n * step_s, start_state, ev.switches)
    llr += ev.llr

    # segments on the base grid: a segment holds the base samples whose start lies in it
    k0 = np.minimum(np.ceil(starts / b - _EPS).astype(np.int64), nb)
    k0[0] = 0
    seg_n = np.diff(np.append(k0, nb))
    ticks, tick_n = _tick_counts(seg_n, ratio)
    tick_state = np.repeat(seg_state, ticks)
    n_ticks = tick_state.size

    resid = np.zeros(n_ticks)
    log_bw = np.full(n_ticks, -np.inf)
    for s, level in enumerate(plan.levels):  # a loop over states
        if level.kind == "outage":
            continue
        sel = seg_state == s
        if not np.any(sel & (ticks > 0)):
            continue
        pos = np.flatnonzero(tick_state == s)
        lens = ticks[sel]
        resid[pos] = _ar_residuals(level, rng, lens[lens > 0])
        log_bw[pos] = level.mean_log + resid[pos]
    bw_tick = np.exp(log_bw)

    if plan.has_rtt.any():
        z = rng.standard_normal(n_ticks)
        rtt_tick = np.where(plan.has_rtt[tick_state],
                            np.exp(plan.rtt_mu[tick_state] + plan.rtt_beta[tick_state] * resid
                                   + plan.rtt_sd[tick_state] * z), np.nan)
        jit_tick = interarrival_jitter(rtt_tick)
    else:
        rtt_tick = jit_tick = None

    bw = np.repeat(bw_tick, tick_n)
    state = np.repeat(seg_state, seg_n)
    if model.loss is not None:
        _, g_n = _tick_counts(np.array([nb]), ratio)
        ge, _ = model.loss.sample(rng, g_n.size)
        loss = plan.loss_tab.ravel()[state * 2 + np.repeat(ge.astype(np.int64), g_n)]
    else:
        loss = plan.loss_tab[state, 0]
    if rtt_tick is not None:
        rtt = np.repeat(rtt_tick, tick_n)
        jit = np.repeat(jit_tick, tick_n)
    else:
        rtt = np.full(nb, np.nan)
        jit = rtt

    _apply_events(ev, b, nb, bw, loss, rtt if rtt_tick is not None else None,
                  jit if rtt_tick is not None else None)

    if r > 1:
        bw = bw.reshape(n, r).mean(axis=1)
        loss = loss.reshape(n, r).mean(axis=1)
        rtt, jit, state = rtt[::r].copy(), jit[::r].copy(), state[::r].copy()
    elif rtt_tick is None:
        jit = rtt.copy()
    event = np.empty(n, dtype=object)
    for t, kind in sorted(ev.marks, reverse=True):  # a loop over events; the earliest is written last
        i = int(t / b) // r
        if i < n:
            event[i] = kind
    return SampledTrace(np.arange(n) * float(step_s), bw, rtt, loss, jit, state, event, float(llr))


def trace_generator(seed: int, index: int) -> np.random.Generator:
    """The sampler's Generator for trace ``index`` of a run with ``seed``: SeedSequence(seed, spawn_key=(index, 0))."""
    for name, v in (("seed", seed), ("index", index)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
            raise TracegenError(f"must be an integer >= 0, got {v!r}", field=name)
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index), STREAM_PART)))


def sample_traces(model: Any, count: int, duration_s: float, step_s: float, seed: int, *, start: int = 0,
                  **kw: Any) -> list[SampledTrace]:
    """Traces ``start .. start+count-1``, trace i from ``trace_generator(seed, i)``; ``kw`` go to sample_trace."""
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise TracegenError(f"must be an integer >= 1, got {count!r}", field="count")
    return [sample_trace(model, duration_s, step_s, trace_generator(seed, i), **kw)
            for i in range(start, start + count)]


__all__ = ["SampledTrace", "sample_trace", "sample_traces", "trace_generator", "MIN_STEP_S"]
