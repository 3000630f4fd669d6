"""The core sampler: new traces from a fitted PathModel, optionally tilted toward rare conditions.

Grid. Sample k covers [k step, (k+1) step). Everything is built on a *base grid* no coarser than the
model step h = ``model.step_s``: the output grid itself when step <= h, else step / r with
r = ceil(step / h); a coarser output sample then averages its r base samples for the rate columns
(bandwidth, loss) and takes the first one for the point columns (RTT, jitter, state), as the Trace
schema reads rates and points. Any step >= ``MIN_STEP_S`` works, a multiple of h or not.

1. State path (hidden semi-Markov). The trace starts in steady state: the first state is drawn from
   the state shares (the share of time in each state) and its first dwell is the time left in a dwell
   seen at a random moment (``DwellFit.sample_residual_s``, density S(x) / mean); with ``start_state``
   the first state is given and its dwell is a fresh one. Then dwell and next state from the
   ``model.jumps`` row, alternately. A dwell is a draw X of the state's family (``DwellFit.sample_s``) rounded up to
   whole steps of the fit, k = ceil(X / h) (``DwellFit.sample_steps``): the fit reads a dwell exactly
   so (dwell.py), so at the model step the runs of a state follow the fitted discretised law, and
   segments start on whole steps from the trace's start or from a switch. Dwells are drawn in bulk per
   state; the jump chain is walked in one short Python loop over *segments* (a few hundred per hour of
   trace, against 360 000 samples at 10 ms), the only sequential part. A segment covers the base
   samples whose start lies in it (the state of a sample is the state at its start); a segment cut
   short by a switch may hold none. Coverage holes (fit/holes.py): with a slow part whose outage
   slope is not 0, the slow level u + s(t) is drawn first, and the outage entry of each jump row is
   weighted by w(u + s(t)) at the jump's time t, the row renormalised, w such that the chain's entry
   rate is proportional to exp(slope (u + s(t))) (fit.holes.rate_weight_map). A jump then
   depends on its time, so the chain is walked segment by segment in Python (``_holes_walk``), its
   uniforms and a dwell for every state drawn in bulk beforehand.
2. Level. Per segment, ticks of h seconds from the segment's start; log bandwidth of a tick is the
   state mean + an AR residual with the state's ARFit, *restarted at every segment* from its stationary
   distribution (the fit never glues segments either): p pre-sample values ~ N(0, Toeplitz(gamma)).
   All segments of a state are filtered at once by one ``scipy.signal.lfilter`` over their
   concatenation; each segment's start is then corrected by superposition (the filter is linear): the
   zero-input response of (its own pre-sample values - the p values the concatenated run had before
   it) is added, which gives exactly the restarted process. A state without an ARFit gets i.i.d.
   N(0, cov[0][0]). A model with a slow part (fit/slow.py) adds, per trace, one offset (a fitted
   trace's, drawn by its hours, plus jitter) and a stationary Ornstein–Uhlenbeck drift, drawn as an
   exact AR(1) on a grid h apart from the trace's start (one lfilter); a tick takes the grid value at
   its start. Finer base samples hold the tick's value. Outage state:
   bandwidth exactly 0.
3. RTT, per tick and held like the level (the model says nothing below h). Joint models: log RTT from
   the state's 2x2 covariance given the tick's log-bandwidth residual (conditional Gaussian: slope
   cov01/cov00, sd sqrt(cov11 - cov01^2/cov00)). Otherwise i.i.d. log-normal from ``state.rtt_log_ms``
   (mean, sd), the residual correlation omitted; NaN where the state has none.
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
included, so events add outage time on top of it. Events the fit detected in the bandwidth itself (no
cell labels) are therefore not drawn unless a HandoverPlan asks for events (events.py).

Randomness: each call consumes only ``rng``. ``sample_traces`` gives trace i the Generator
``SeedSequence(seed, spawn_key=(i, 0))`` (the sampler part of ``tracegen.synth.trace_rng``), so trace i
is the same whatever the count, order or worker split.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg
from scipy.signal import lfilter, lfiltic

from ..errors import TracegenError, check_seed
from ..jitter import interarrival_jitter
from .events import EventDraw, HandoverPlan, draw_events
from .tilt import Tilt, TiltPlan, dwell_log_ratio, residual_log_ratio

MIN_STEP_S = 0.01
MAX_TRACE_SAMPLES = 10**8  # one trace is drawn whole in memory (some 5 GB at this size): longer runs use more traces
STREAM_PART = 0  # spawn_key=(index, STREAM_PART): the sampler's stream in tracegen.synth.trace_rng
_EPS = 1e-9
_REL = 1e-12
_ZIR_CAP = 1 << 16   # longest precomputed zero-input response (ticks); longer ones are computed on demand


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


def _ceil(x: np.ndarray | float) -> np.ndarray:
    """ceil that forgives the rounding of a product or quotient landing a hair above a whole number."""
    x = np.asarray(x, dtype=np.float64)
    return np.ceil(x - _EPS - _REL * np.abs(x))


def _floor(x: np.ndarray | float) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    return np.floor(x + _EPS + _REL * np.abs(x))


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


def _zir(a: np.ndarray, zi_map: np.ndarray, length: int) -> np.ndarray:
    """(p, length): row j is the AR's zero-input response to the pre-sample value y_-(j+1) = 1."""
    p = zi_map.shape[0]
    return lfilter([1.0], a, np.zeros((p, length)), axis=1, zi=zi_map)[0]


@dataclass(frozen=True)
class _Level:
    kind: str                 # "outage", "ar", "iid"
    mean_log: float = 0.0
    a: np.ndarray | None = None       # lfilter denominator [1, -phi]
    sigma: float = 0.0                # innovation sd (ar) or marginal sd (iid)
    chol: np.ndarray | None = None    # Cholesky factor of the p x p stationary covariance
    zi_map: np.ndarray | None = None  # (p, p): pre-sample values (y_-1..y_-p) -> lfilter zi
    zir: np.ndarray | None = None     # (p, L): zero-input responses, _zir(a, zi_map, L)
    zir_complete: bool = True         # the responses are below 1e-17 after L ticks (else extend on demand)


def _ar_level(mean_log: float, coefs: np.ndarray, sigma2: float) -> _Level:
    p = coefs.size
    gamma = _ar_autocov(coefs, sigma2)
    a = np.concatenate(([1.0], -coefs))
    chol = np.linalg.cholesky(linalg.toeplitz(gamma[:p]))
    zi_map = np.array([lfiltic([1.0], a, np.eye(p)[j]) for j in range(p)])
    # length until the slowest mode has decayed below 1e-17 (t^(p-1) growth of repeated roots: margin)
    rho = float(np.max(np.abs(np.roots(a)))) if p else 0.0
    want = _ZIR_CAP if rho >= 1.0 else int(min(_ZIR_CAP, math.ceil(-40.0 / math.log(max(rho, 1e-300))) * 2 + 64))
    g = _zir(a, zi_map, max(want, 1))
    complete = bool(np.max(np.abs(g[:, -min(64, g.shape[1]):])) < 1e-17)
    return _Level("ar", mean_log, a, math.sqrt(sigma2), chol, zi_map, g, complete)


def _cum_rows(q: np.ndarray) -> np.ndarray:
    """Cumulative rows for searchsorted; the last positive entry is inf so u in [0, 1) never falls off."""
    out = []
    for i, row in enumerate(np.atleast_2d(q)):
        c = np.cumsum(row)
        pos = np.flatnonzero(row > 0)
        if pos.size == 0:  # a one-state model: stay
            c = np.full(row.size, np.inf)
            c[: i] = 0.0
        else:
            c[pos[-1]:] = np.inf
        out.append(c)
    return np.array(out)


@dataclass(frozen=True)
class _Plan:
    tilt: TiltPlan
    start_cum: np.ndarray
    jump_cum: np.ndarray           # (n, n)
    mean_dwell_s: float
    quantum_s: np.ndarray          # (n,) the step each state's dwell is rounded up to
    levels: tuple[_Level, ...]
    mean_log: np.ndarray           # (n,) state mean of log bandwidth, -inf for an outage
    rtt_mu: np.ndarray
    rtt_beta: np.ndarray
    rtt_sd: np.ndarray
    has_rtt: np.ndarray
    loss_tab: np.ndarray           # (n, 2): loss in GE good / bad ticks (equal columns without a chain)
    outage: np.ndarray             # (n,) bool
    holes: "_Holes | None" = None  # outage entries tied to the slow level (fit/holes.py), None without


@dataclass(frozen=True)
class _Holes:
    """What the state path needs to weight the outage column of each jump row by w(s(t)) (fit/holes.py)."""

    s_nodes: np.ndarray            # slow level u + s(t) ...
    log_w: np.ndarray              # ... and log w there, interpolated between nodes
    outage_index: int
    p_out: np.ndarray              # (n,) the model's outage column
    q_out: np.ndarray              # (n,) the same under the tilt
    rest_cum: np.ndarray           # (n, n) cumulative rows of q without the outage column, renormalised

    def weights(self, slow_level: np.ndarray) -> np.ndarray:
        return np.exp(np.interp(slow_level, self.s_nodes, self.log_w))


def _build_holes(model: Any, jump_q: np.ndarray, outage: np.ndarray) -> _Holes | None:
    from ..fit.holes import rate_weight_map

    slow = getattr(model, "slow", None)
    if slow is None or slow.outage_slope == 0.0 or not outage.any():
        return None
    o = int(np.flatnonzero(outage)[0])
    p = np.array(model.jumps, dtype=np.float64)
    if not np.any(p[:, o] > 0):
        return None
    dwell = np.array([st.dwell.mean_s + st.dwell.step_s / 2 for st in model.states])   # as the walk rounds them
    s_nodes, log_w = rate_weight_map(slow.outage_slope, np.asarray(slow.offsets), np.asarray(slow.offset_weights),
                                     slow.offset_jitter_var + slow.drift_var, p, o, dwell)
    if s_nodes.size == 0:
        return None
    rest = jump_q.copy()
    rest[:, o] = 0.0
    total = rest.sum(axis=1, keepdims=True)
    rest = np.divide(rest, total, out=np.zeros_like(rest), where=total > 0)
    return _Holes(s_nodes, log_w, o, p[:, o].copy(), jump_q[:, o].copy(), _cum_rows(rest))


def _build_plan(model: Any, tilt: Tilt | None) -> _Plan:
    tp = TiltPlan.build(model, tilt)
    n = model.n_states
    states = model.states
    quantum = np.array([f.step_s for f in tp.dwell_q], dtype=np.float64)
    # mean dwell under q along the tilted embedded chain: sizes the first batch of dwell draws
    means = np.array([f.mean_s for f in tp.dwell_q]) + quantum / 2
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
            levels.append(_ar_level(s.mean[0], np.asarray(ar.coefs, dtype=np.float64), ar.sigma2))
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
    mean_log = np.array([-np.inf if lv.kind == "outage" else lv.mean_log for lv in levels])
    return _Plan(tp, _cum_rows(tp.start_q[None, :])[0], _cum_rows(tp.jump_q), mean_dwell, quantum,
                 tuple(levels), mean_log, rtt_mu, rtt_beta, rtt_sd, has_rtt, loss_tab, outage,
                 _build_holes(model, tp.jump_q, outage))


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


def _run_chain(nxt: np.ndarray) -> np.ndarray:
    """The states s_t = nxt[t, s_(t-1)] of a chain given its transition table (T, n) (row 0 constant).

    Sequential in t, so done in blocks of B ~ sqrt(T) rows: first each block's map from its entry state
    to its exit state (B numpy steps over all blocks at once), then the entry states block by block (a
    short Python loop over blocks), then the states inside all blocks (B more numpy steps).
    """
    total, n = nxt.shape
    size = max(1, math.isqrt(total))
    blocks = -(-total // size)
    pad = blocks * size - total
    if pad:  # identity rows: the chain stays where it is
        nxt = np.concatenate((nxt, np.broadcast_to(np.arange(n), (pad, n))))
    tab = nxt.reshape(blocks, size, n)
    exit_of = np.broadcast_to(np.arange(n), (blocks, n))
    for j in range(size):  # a loop over the rows of a block
        exit_of = np.take_along_axis(tab[:, j, :], exit_of, axis=1)
    entry = np.empty(blocks, dtype=np.int64)
    s = 0
    for i, row in enumerate(exit_of.tolist()):  # a loop over blocks
        entry[i] = s
        s = row[s]
    out = np.empty((blocks, size), dtype=np.int64)
    rows = np.arange(blocks)
    s_vec = entry
    for j in range(size):  # a loop over the rows of a block
        s_vec = tab[rows, j, s_vec]
        out[:, j] = s_vec
    return out.reshape(-1)[:total]


def _state_path(plan: _Plan, model: Any, rng: np.random.Generator, end_s: float, start_state: int | None,
                switches: list[tuple[float, int]], holes_w: "_HoleWeights | None" = None
                ) -> tuple[np.ndarray, np.ndarray, float]:
    """Segments covering [0, end_s): (starts_s, states, log p/q of the choices and dwells).

    The path is a walk from the first state, restarted with a fresh dwell at each switch (time, state);
    all the walks ("pieces") advance together, one batch of segments per round. With coverage holes
    (``plan.holes`` and the trace's outage weights ``holes_w``) each jump depends on its time, so the
    pieces are walked segment by segment instead (:func:`_holes_walk`).
    """
    llr = 0.0
    tp = plan.tilt
    stationary = start_state is None
    if stationary:
        first = int(np.searchsorted(plan.start_cum, rng.random(), side="right"))
        llr += float(tp.start_log_ratio[first])
    else:
        first = int(start_state)
    pieces = [(0.0, first)] + [(float(t), int(k)) for t, k in sorted(switches) if 0.0 < t < end_s]
    t0 = np.array([p[0] for p in pieces])
    k0 = np.array([p[1] for p in pieces], dtype=np.int64)
    t1 = np.append(t0[1:], end_s)
    keep = t1 > t0
    t0, k0, need = t0[keep], k0[keep], (t1 - t0)[keep]

    if plan.holes is not None and holes_w is not None:
        piece, start, state, prev, x = _holes_walk(plan, rng, t0, k0, need, stationary, holes_w)
        return _path_llr(plan, model, piece, start, state, prev, x, stationary, llr, holes_w)

    n_states = model.n_states
    cum = plan.jump_cum
    quantum = plan.quantum_s
    q_min = float(quantum.min())
    covered = np.zeros(t0.size)
    last = k0.copy()
    fresh = np.ones(t0.size, dtype=bool)
    active = np.arange(t0.size)
    out_piece, out_start, out_state, out_prev, out_x = [], [], [], [], []
    while active.size:  # a loop over rounds: nearly always one
        rem = need[active] - covered[active]
        m = np.minimum(np.ceil(rem / q_min) + 1, np.ceil(rem / plan.mean_dwell_s * 1.1) + 3).astype(np.int64)
        total = int(m.sum())
        offs = np.cumsum(m) - m
        u = rng.random(total)
        # next state from every state for each draw; the first row of a piece is fixed (its start
        # state, or a jump from where it stopped)
        nxt = np.empty((total, n_states), dtype=np.int64)
        for k in range(n_states):  # a loop over states
            nxt[:, k] = np.searchsorted(cum[k], u, side="right")
        nxt[offs] = np.where(fresh[active], k0[active], nxt[offs, last[active]])[:, None]
        st = _run_chain(nxt)
        x = np.empty(total)
        for k in np.unique(st).tolist():  # dwells in bulk, per state
            idx = np.flatnonzero(st == k)
            x[idx] = tp.dwell_q[k].sample_s(rng, idx.size)
        if stationary and fresh[0] and active[0] == 0:  # the trace's first dwell: a residual one
            x[0] = float(tp.dwell_q[int(st[0])].sample_residual_s(rng))
        qs = quantum[st]
        d = np.maximum(_ceil(x / qs), 1.0) * qs
        prev = np.empty(total, dtype=np.int64)
        prev[1:] = st[:-1]
        prev[offs] = np.where(fresh[active], -1, last[active])
        piece = np.repeat(active, m)
        ends = np.cumsum(d)
        base = np.repeat(ends[offs] - d[offs], m)
        local = ends - d - base                      # start within this round's run of the piece
        use = local < np.repeat(rem, m)
        out_piece.append(piece[use])
        out_start.append(t0[piece[use]] + covered[piece[use]] + local[use])
        out_state.append(st[use])
        out_prev.append(prev[use])
        out_x.append(x[use])
        run = ends[offs + m - 1] - base[offs]          # time covered by this round, per piece
        short = run < rem
        covered[active] += run
        last[active] = st[offs + m - 1]
        fresh[active] = False
        active = active[short]
    return _path_llr(plan, model, np.concatenate(out_piece), np.concatenate(out_start), np.concatenate(out_state),
                     np.concatenate(out_prev), np.concatenate(out_x), stationary, llr, None)


def _path_llr(plan: _Plan, model: Any, piece: np.ndarray, start: np.ndarray, state: np.ndarray, prev: np.ndarray,
              x: np.ndarray, stationary: bool, llr: float, holes_w: "_HoleWeights | None"
              ) -> tuple[np.ndarray, np.ndarray, float]:
    """The segments in time order and log p/q of their jumps and dwells (0 without a tilt)."""
    tp = plan.tilt
    order = np.lexsort((start, piece))
    starts = start[order]
    states = state[order]
    if not tp.identity:
        prev = prev[order]
        x = x[order]
        jumped = prev >= 0
        llr += float(tp.jump_log_ratio[prev[jumped], states[jumped]].sum())
        if holes_w is not None and jumped.any():  # the renormalisations of the outage weighting differ
            w = holes_w.at(starts[jumped])
            o_p, o_q = plan.holes.p_out[prev[jumped]], plan.holes.q_out[prev[jumped]]
            llr += float(np.sum(np.log1p(o_q * (w - 1.0)) - np.log1p(o_p * (w - 1.0))))
        resid = np.zeros(states.size, dtype=bool)
        resid[0] = stationary  # sorted by (piece, start): the trace's first segment comes first
        for k in np.flatnonzero(tp.dwell_scale != 1.0).tolist():
            sel = (states == k) & ~resid
            c = float(tp.dwell_scale[k])
            if sel.any():
                llr += float(dwell_log_ratio(model.states[k].dwell, c, x[sel]).sum())
            if stationary and states[0] == k:
                llr += float(residual_log_ratio(model.states[k].dwell, c, x[:1])[0])
    return starts, states, llr


@dataclass(frozen=True)
class _HoleWeights:
    """One trace's outage weights w(u + s(t)) on a grid ``step_s`` apart from its start."""

    grid: np.ndarray
    step_s: float

    def at(self, t: np.ndarray) -> np.ndarray:
        return self.grid[_cell(np.asarray(t, dtype=np.float64) / self.step_s, self.grid.size)]


def _cell(steps: np.ndarray, size: int) -> np.ndarray:
    """The cell of a grid of ``size`` cells holding each position given in grid steps from its start
    (rounding forgiven as in ``_floor``); positions past the end fall in the last cell."""
    return np.minimum(_floor(steps).astype(np.int64), size - 1)


def _holes_walk(plan: _Plan, rng: np.random.Generator, t0: np.ndarray, k0: np.ndarray, need: np.ndarray,
                stationary: bool, holes_w: _HoleWeights
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The pieces walked one segment at a time: a jump from state k at time t enters the outage with
    probability q w / (1 - q + q w) (q = the row's outage entry, w = the weight at t), decided by one
    uniform, else goes to a state of the row without its outage column, by another. Uniforms and a dwell
    for every state are drawn in bulk per batch of rows, so the loop only looks them up (a loop over
    segments, a few hundred per hour of trace). Returns piece, start, state, origin (-1 at a piece's
    start) and dwell draw per segment."""
    from bisect import bisect_right

    holes = plan.holes
    tp = plan.tilt
    n = plan.quantum_s.size
    o = holes.outage_index
    q_out = holes.q_out.tolist()
    rest = [row.tolist() for row in holes.rest_cum]
    quantum = plan.quantum_s.tolist()
    grid = holes_w.grid.tolist()
    last_cell = len(grid) - 1
    grid_step = holes_w.step_s
    out_piece: list[int] = []
    out_start: list[float] = []
    out_state: list[int] = []
    out_prev: list[int] = []
    out_x: list[float] = []
    for p in range(t0.size):  # a loop over pieces: the trace's start and its switches
        t, end, state, prev = float(t0[p]), float(t0[p] + need[p]), int(k0[p]), -1
        if stationary and p == 0:
            x = float(tp.dwell_q[state].sample_residual_s(rng))
        else:
            x = float(tp.dwell_q[state].sample_s(rng, 1)[0])
        rows = int(need[p] / plan.mean_dwell_s * 1.2) + 16
        while True:  # a loop over batches: nearly always one
            u = rng.random(rows).tolist()
            v = rng.random(rows).tolist()
            dwell = np.column_stack([tp.dwell_q[k].sample_s(rng, rows) for k in range(n)]).tolist()
            for i in range(rows):  # a loop over segments
                out_piece.append(p)
                out_start.append(t)
                out_state.append(state)
                out_prev.append(prev)
                out_x.append(x)
                q = quantum[state]
                r = x / q
                t += max(math.ceil(r - _EPS - _REL * abs(r)), 1) * q   # _ceil, as the batched walk rounds
                if t >= end:
                    break
                prev = state
                a = q_out[state]
                if a > 0.0:
                    c = t / grid_step   # the cell as _cell finds it, so the llr reads the same weight
                    w = grid[min(math.floor(c + _EPS + _REL * abs(c)), last_cell)]
                    go = v[i] < a * w / (1.0 - a + a * w)
                else:
                    go = False
                state = o if go else bisect_right(rest[state], u[i])
                x = dwell[i][state]
            else:
                continue
            break
    return (np.array(out_piece, dtype=np.int64), np.array(out_start), np.array(out_state, dtype=np.int64),
            np.array(out_prev, dtype=np.int64), np.array(out_x))


# --------------------------------------------------------------------------------------------------
# Levels, RTT, loss on the base grid


def _ar_residuals(level: _Level, rng: np.random.Generator, lengths: np.ndarray) -> np.ndarray:
    """Concatenated stationary AR residual segments of the given tick lengths (> 0), each restarted."""
    total = int(lengths.sum())
    e = rng.standard_normal(total)
    e *= level.sigma
    if level.kind == "iid":
        return e
    p = level.chol.shape[0]
    m = lengths.size
    w = rng.standard_normal((m, p)) @ level.chol.T          # each segment's pre-sample (y_-1 .. y_-p)
    y = lfilter([1.0], level.a, e)                           # all segments glued, from rest
    starts = np.cumsum(lengths) - lengths
    lag = starts[:, None] - np.arange(1, p + 1)[None, :]
    seen = np.where(lag >= 0, y[np.maximum(lag, 0)], 0.0)    # what the glued run had before each segment
    delta = w - seen
    g = level.zir
    longest = int(lengths.max())
    if g.shape[1] < longest and not level.zir_complete:
        g = _zir(level.a, level.zi_map, longest)
    span = np.minimum(lengths, g.shape[1])                   # beyond it the response is below 1e-17
    covered = int(span.sum())
    off = np.arange(covered) - np.repeat(np.cumsum(span) - span, span)
    corr = np.repeat(delta[:, 0], span) * g[0, off]
    for k in range(1, p):  # a loop over lags (p <= 5)
        corr += np.repeat(delta[:, k], span) * g[k, off]
    if covered == total:
        y += corr
    else:
        y[np.repeat(starts, span) + off] += corr
    return y


def _merge_sorted(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The sorted union of two sorted integer arrays (timsort merges the two runs in linear time)."""
    c = np.sort(np.concatenate((a, b)), kind="stable")
    keep = np.ones(c.size, dtype=bool)
    keep[1:] = c[1:] != c[:-1]
    return c[keep]


def _span(t0: np.ndarray, t1: np.ndarray, b: float, nb: int) -> tuple[np.ndarray, np.ndarray]:
    """Base samples [i0, i1) whose start lies in [t0, t1)."""
    i0 = np.minimum(_ceil(np.asarray(t0) / b), nb).astype(np.int64)
    i1 = np.minimum(_ceil(np.asarray(t1) / b), nb).astype(np.int64)
    return i0, i1


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
        for a, z in zip(i0.tolist(), i1.tolist()):  # a loop over events
            if z > a:
                bw[a:z] = 0.0
                loss[a:z] = 1.0
                if rtt is not None:
                    rtt[a:z] = np.nan
                    jit[a:z] = np.nan


def _tick_counts(n_samples: np.ndarray, ratio: float) -> tuple[np.ndarray, np.ndarray]:
    """Ticks of h = ratio base samples over runs of ``n_samples``: (ticks per run, base samples per tick)."""
    ticks = np.maximum(_ceil(n_samples / ratio), 1).astype(np.int64)
    ticks[n_samples == 0] = 0
    if ratio == 1.0:
        return ticks, np.ones(int(ticks.sum()), dtype=np.int64)
    total = int(ticks.sum())
    first = np.repeat(np.cumsum(ticks) - ticks, ticks)
    j = np.arange(total) - first
    size = np.repeat(n_samples, ticks)
    lo = np.minimum(_ceil(j * ratio), size)
    hi = np.minimum(_ceil((j + 1) * ratio), size)
    return ticks, (hi - lo).astype(np.int64)


def check_trace_size(duration_s: float, step_s: float) -> None:
    """A TracegenError when one trace of ``duration_s`` at ``step_s`` exceeds ``MAX_TRACE_SAMPLES`` samples."""
    if duration_s / step_s > MAX_TRACE_SAMPLES:
        raise TracegenError(f"{duration_s:g} s at {step_s:g} s steps is {duration_s / step_s:.3g} samples per trace, "
                            f"more than {MAX_TRACE_SAMPLES:.0e}", field="duration_s",
                            hint="make more, shorter traces, or use a longer step")


def _check_args(model: Any, duration_s: float, step_s: float, start_state: int | None,
                handover: HandoverPlan | None) -> None:
    for name, v in (("duration_s", duration_s), ("step_s", step_s)):
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not math.isfinite(v):
            raise TracegenError(f"must be a finite number of seconds, got {v!r}", field=name)
    if duration_s <= 0:
        raise TracegenError(f"must be > 0, got {duration_s}", field="duration_s", hint="give a positive duration")
    if step_s < MIN_STEP_S * (1 - 1e-9):
        raise TracegenError(f"must be at least {MIN_STEP_S} s (10 ms), got {step_s}", field="step_s",
                            hint="use a step of 10 ms or more; any value from there up works")
    check_trace_size(duration_s, step_s)
    if start_state is not None:
        if isinstance(start_state, bool) or not isinstance(start_state, (int, np.integer)) \
                or not 0 <= start_state < model.n_states:
            raise TracegenError(f"must be a state index 0..{model.n_states - 1}, got {start_state!r}",
                                field="start_state", hint="see `tracegen model show` for the states")
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
    step_s = float(step_s)
    n = max(1, int(_ceil(duration_s / step_s)))
    r = 1 if step_s <= h * (1 + _EPS) else int(_ceil(step_s / h))
    b = step_s / r
    nb = n * r
    ratio = h / b
    if abs(ratio - round(ratio)) < 1e-9 * ratio:
        ratio = float(round(ratio))

    slow = getattr(model, "slow", None)
    atom = slow.pick(rng) if slow is not None else 0
    ev = draw_events(model, handover, plan.tilt, rng, float(duration_s))
    holes_w = None
    if slow is not None:  # u + s(t) on a grid h apart from the trace's start, drawn before the path
        n_grid = int(_ceil(n * step_s / h)) + 1
        slow_grid = slow.sample(rng, n_grid, h, atom)
        if plan.holes is not None:
            holes_w = _HoleWeights(plan.holes.weights(slow_grid), h)
    starts, seg_state, llr = _state_path(plan, model, rng, n * step_s, start_state, ev.switches, holes_w)
    llr += ev.llr

    # segments on the base grid: a segment holds the base samples whose start lies in it
    k0 = np.minimum(_ceil(starts / b).astype(np.int64), nb)
    k0[0] = 0
    seg_n = np.diff(np.append(k0, nb))
    ticks, tick_n = _tick_counts(seg_n, ratio)
    tick_state = np.repeat(seg_state, ticks)
    n_ticks = tick_state.size

    # residuals state by state (segments of one state filtered together), then put in time order
    order = np.argsort(seg_state, kind="stable")
    lens_o = ticks[order]
    first_tick = np.cumsum(ticks) - ticks
    perm = np.repeat(first_tick[order] - (np.cumsum(lens_o) - lens_o), lens_o) + np.arange(n_ticks)
    buf = np.zeros(n_ticks)
    bounds = np.concatenate(([0], np.cumsum(np.bincount(seg_state, minlength=len(plan.levels)))))
    at = 0
    for s, level in enumerate(plan.levels):  # a loop over states
        lens = lens_o[bounds[s]:bounds[s + 1]]
        width = int(lens.sum())
        if level.kind != "outage" and width:
            buf[at:at + width] = _ar_residuals(level, rng, lens[lens > 0])
        at += width
    resid = np.empty(n_ticks)
    resid[perm] = buf
    level_log = plan.mean_log[tick_state] + resid
    tick_at = np.cumsum(tick_n) - tick_n                       # first base sample of each tick
    if slow is not None:  # per-trace offset and drift (fit/slow.py): the grid value at each tick's start
        level_log += slow_grid[_cell(tick_at * (b / h), n_grid)]
    with np.errstate(over="ignore"):
        bw_tick = np.exp(level_log)
    if not np.all(np.isfinite(bw_tick)):
        state = int(tick_state[np.flatnonzero(~np.isfinite(bw_tick))[0]])
        raise TracegenError(f"the model drew a bandwidth beyond any float in state {state} (log level "
                            f"{plan.mean_log[state]:.4g})", field="bandwidth_bps",
                            hint="the model file's levels or variances are far out of range: refit it")

    if plan.has_rtt.any():
        z = rng.standard_normal(n_ticks)
        rtt_tick = np.where(plan.has_rtt[tick_state],
                            np.exp(plan.rtt_mu[tick_state] + plan.rtt_beta[tick_state] * resid
                                   + plan.rtt_sd[tick_state] * z), np.nan)
        jit_tick = interarrival_jitter(rtt_tick)
    else:
        rtt_tick = jit_tick = None

    # Every base column is constant between tick boundaries and chain-step boundaries ("cells"), so one
    # table of cells x (t, bandwidth, RTT, loss, jitter, state) is repeated into one block of base
    # columns (a single allocation, big enough for huge pages); the state row holds int64 bits.
    if model.loss is not None:
        g_n = _tick_counts(np.array([nb]), ratio)[1]
        ge, _ = model.loss.sample(rng, g_n.size)
        if np.array_equal(g_n, tick_n):
            at, ti, gi = tick_at, slice(None), ge
        else:
            ge_at = np.cumsum(g_n) - g_n
            at = _merge_sorted(tick_at, ge_at)
            ti = np.searchsorted(tick_at, at, side="right") - 1
            gi = ge[np.searchsorted(ge_at, at, side="right") - 1]
        cell_state = tick_state[ti]
        cell_loss = plan.loss_tab[cell_state, gi]
    else:
        at, ti = tick_at, slice(None)
        cell_state = tick_state
        cell_loss = plan.loss_tab[cell_state, 0]
    table = np.empty((6, at.size))
    table[0] = 0.0
    table[1] = bw_tick[ti]
    table[2] = np.nan if rtt_tick is None else rtt_tick[ti]
    table[3] = cell_loss
    table[4] = np.nan if jit_tick is None else jit_tick[ti]
    table[5].view(np.int64)[:] = cell_state
    base = np.repeat(table, np.diff(np.append(at, nb)), axis=1) if at.size != nb else table
    _, bw, rtt, loss, jit = base[:5]
    _apply_events(ev, b, nb, bw, loss, rtt if rtt_tick is not None else None, jit)
    if r > 1:
        block = np.empty((6, n))
        np.mean(bw.reshape(n, r), axis=1, out=block[1])
        np.mean(loss.reshape(n, r), axis=1, out=block[3])
        block[2], block[4], block[5] = rtt[::r], jit[::r], base[5, ::r]
    else:
        block = base
    t_s, bw_o, rtt_o, loss_o, jit_o = block[:5]
    state_o = block[5].view(np.int64)
    t_s[:] = np.arange(n)
    t_s *= step_s
    event = np.empty(n, dtype=object)
    if ev.marks:
        order = sorted(range(len(ev.marks)), key=lambda j: ev.marks[j])  # by time, then kind
        times = np.array([ev.marks[j][0] for j in order])
        at = _floor(times / step_s).astype(np.int64)
        inside = (at >= 0) & (at < n)
        at_u, first = np.unique(at[inside], return_index=True)   # in one sample the earliest event wins
        kinds = np.array([ev.marks[j][1] for j in order], dtype=object)[inside]
        event[at_u] = kinds[first]
    return SampledTrace(t_s, bw_o, rtt_o, loss_o, jit_o, state_o, event, float(llr))


def trace_generator(seed: int, index: int) -> np.random.Generator:
    """The sampler's Generator for trace ``index`` of a run with ``seed``: SeedSequence(seed, spawn_key=(index, 0))."""
    check_seed(seed)
    if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or index < 0:
        raise TracegenError(f"must be an integer >= 0, got {index!r}", field="index")
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index), STREAM_PART)))


def sample_traces(model: Any, count: int, duration_s: float, step_s: float, seed: int, *, start: int = 0,
                  **kw: Any) -> list[SampledTrace]:
    """Traces ``start .. start+count-1``, trace i from ``trace_generator(seed, i)``; ``kw`` go to sample_trace."""
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise TracegenError(f"must be an integer >= 1, got {count!r}", field="count")
    if isinstance(start, bool) or not isinstance(start, (int, np.integer)) or start < 0:
        raise TracegenError(f"must be an integer >= 0, got {start!r}", field="start")
    return [sample_trace(model, duration_s, step_s, trace_generator(seed, i), **kw)
            for i in range(start, start + count)]


__all__ = ["SampledTrace", "sample_trace", "sample_traces", "trace_generator", "MIN_STEP_S"]
