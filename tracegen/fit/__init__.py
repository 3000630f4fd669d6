"""Fitting a path model to traces: ``tracegen.fit(traces, ...) -> PathModel``.

First the slow part (slow.py): a per-trace offset and an Ornstein–Uhlenbeck drift over minutes, fitted
by maximum likelihood on one-minute block means and kept when it beats "none" by BIC; its smoothed
estimate is taken out of the log-bandwidth, so the level states below model what is left. With it
comes the slope of the outage-entry rate on the slow level (holes.py): outages bunch where the level is
low.

Then, for each candidate number of level states K:
1. a Gaussian HMM on log-bandwidth (joint with log-RTT on request) by Baum–Welch, best of several seeded
   restarts (levels.py); outage samples are an explicit state, not part of the HMM;
2. Viterbi decoding into dwell segments; per state a sojourn-time family (dwell.py), jump
   probabilities between different states (zero diagonal), and an AR(p) model of the log-bandwidth
   residual around the state's mean with p chosen by AIC and its variance matched to every visit's
   samples, short visits included (ar.py);
3. the complete-data log-likelihood of the whole semi-Markov model given the decoded path (dwell times,
   jumps, AR residuals) and its BIC: the classification (integrated completed) likelihood of Biernacki,
   Celeux and Govaert (2000). K is chosen by that full-model BIC by default, because the HMM's own BIC
   counts autocorrelated residuals as evidence for extra states. The HMM BIC is reported beside it.
Then loss (Gilbert–Elliott, loss.py) and events (handovers and outages, events.py) are fitted once.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np

from .. import __version__
from ..errors import TracegenError, check_seed
from ..progress import bar
from ..trace import OUTAGE_FLOOR_BPS, Trace
from .ar import ARFit, ar_loglik, select_ar, with_stationary_variance
from .dwell import DwellFit, fit_dwell
from .events import fit_events
from .levels import HmmFit, Segments, fit_hmm, jump_matrix, segments, state_paths
from .loss import fit_gilbert_elliott, loss_by_state
from .holes import fit_outage_slope
from .prepare import OUTAGE, Prepared, level_log_bandwidth, prepare
from .slow import DEFAULT_BLOCK_S, SlowFit, fit_slow, remove_slow, smoothed

if TYPE_CHECKING:
    from ..model import PathModel

CRITERIA = ("full-bic", "hmm-bic")
DEFAULT_STATES = tuple(range(2, 9))
_MIN_RTT_VAR = 1e-6  # floor of the conditional log-RTT variance (a constant RTT has none)


@dataclass(frozen=True)
class Candidate:
    """Everything fitted for one number of level states."""

    hmm: HmmFit
    paths: list[np.ndarray]
    segments: Segments
    dwell: tuple[DwellFit, ...]
    ar: tuple[ARFit | None, ...]
    jumps: np.ndarray
    full_loglik: float
    full_bic: float
    n_params: int


def _dwell_data(seg: Segments, mine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Durations and right-censoring flags for one state's dwell fit.

    A segment whose start is hidden (cut by a trace's start or a gap) has a length-biased, truncated
    duration, so it is left out; one whose end is hidden counts as "lasted at least this long". Only when
    a state has no segment with a visible start are all its segments used as if complete (biased short,
    said in the report)."""
    usable = mine & ~seg.left_cut
    if not np.any(usable & ~seg.right_cut):
        return seg.length[mine], np.zeros(int(mine.sum()), bool)
    return seg.length[usable], seg.right_cut[usable]


def _candidate(prep: Prepared, hmm: HmmFit, with_outage: bool, max_ar_order: int) -> Candidate:
    level_states = hmm.decode(prep)
    paths = state_paths(prep, level_states, with_outage)
    seg = segments(paths)
    shift = 1 if with_outage else 0
    n_total = hmm.n_states + shift
    dwell, ars = [], []
    rows_of = _stack_positions(prep)
    loglik = 0.0
    n_params = 0
    for s in range(n_total):
        mine = seg.state == s
        if not mine.any():
            raise TracegenError(f"state {s} of {n_total} is never visited after decoding", field="states")
        k, cens = _dwell_data(seg, mine)
        d = fit_dwell(k, prep.step_s, censored=cens)
        dwell.append(d)
        loglik += float(np.sum(d.logpmf(k[~cens]))) + float(np.sum(d.logsf(k[cens])))
        n_params += 1 if d.family == "geometric" else 2
        if s < shift:
            ars.append(None)
            continue
        j = s - shift
        resid = []
        rtt_terms = []
        for tr, start, length in zip(seg.trace[mine], seg.start[mine], seg.length[mine]):
            x = prep.features[rows_of[tr][start:start + length]]
            resid.append(x[:, 0] - hmm.means[j, 0])
            if x.shape[1] > 1:
                rtt_terms.append(x)
        fit = with_stationary_variance(select_ar(resid, max_order=max_ar_order)[0], resid)
        ars.append(fit)
        head = np.concatenate([r[: fit.order] for r in resid]) if fit.order else np.zeros(0)
        var0 = fit.stationary_variance
        loglik += ar_loglik(resid, fit) - 0.5 * float(np.sum(np.log(2 * np.pi * var0) + head**2 / var0))
        d_feat = hmm.means.shape[1]
        n_params += d_feat + d_feat * (d_feat + 1) // 2 + fit.order
        if rtt_terms:  # log-RTT given the log-bandwidth residual: the conditional Gaussian of the state
            x = np.concatenate(rtt_terms)
            c = hmm.covars[j]
            slope = c[0, 1] / c[0, 0]
            var = max(c[1, 1] - c[0, 1] ** 2 / c[0, 0], _MIN_RTT_VAR)  # an RTT that never moves: no log(0)
            r = x[:, 1] - hmm.means[j, 1] - slope * (x[:, 0] - hmm.means[j, 0])
            loglik += -0.5 * float(np.sum(np.log(2 * np.pi * var) + r**2 / var))
    jumps = jump_matrix(seg, n_total)
    if len(seg.transitions):
        p = jumps[seg.transitions[:, 0], seg.transitions[:, 1]]
        loglik += float(np.sum(np.log(np.clip(p, 1e-300, None))))
    n_params += n_total * (n_total - 2) if n_total > 2 else 0
    bic = -2.0 * loglik + n_params * np.log(max(prep.n_known, 2))
    return Candidate(hmm, paths, seg, tuple(dwell), tuple(ars), jumps, loglik, float(bic), n_params)


def _stack_positions(prep: Prepared) -> list[np.ndarray]:
    """Per trace, the row of each sample in ``prep.features`` (-1 for samples outside level runs)."""
    out, offset = [], 0
    for kind, index in zip(prep.kinds, prep.run_index):
        pos = np.full(kind.size, -1, dtype=np.int64)
        for a, b in index:
            pos[a:b] = np.arange(offset, offset + b - a)
            offset += b - a
        out.append(pos)
    return out


def _state_range(states: int | Iterable[int]) -> tuple[int, ...]:
    if isinstance(states, (int, np.integer)):
        out = (int(states),)
    else:
        out = tuple(sorted({int(s) for s in states}))
    if not out or out[0] < 1:
        raise TracegenError(f"state counts must be >= 1, got {list(out)}", field="states",
                            hint="e.g. --states 2..8 or --states 3")
    return out


def fit_state_count(job: tuple[Any, ...]) -> tuple[int, Any, Any, TracegenError | None]:
    """A worker's task: the HMM (best of its restarts) and the full candidate model for one state count;
    a user's error (too many states for the data) comes back as a value."""
    prep, k, restarts, seed, max_iter, tol, with_outage, max_ar_order = job
    try:
        hmm = fit_hmm(prep, k, restarts=restarts, seed=seed, max_iter=max_iter, tol=tol)
        return k, hmm, _candidate(prep, hmm, with_outage, max_ar_order), None
    except TracegenError as exc:
        return k, None, None, exc


def fit(traces: Sequence[Trace] | Iterable[Trace], *, states: int | Iterable[int] = DEFAULT_STATES,
        step_s: float | None = None, with_rtt: bool = False, restarts: int = 3, seed: int = 0,
        max_iter: int = 100, tol: float = 1e-3, criterion: str = "full-bic", max_ar_order: int = 5,
        floor_bps: float = OUTAGE_FLOOR_BPS, slow_block_s: float | None = DEFAULT_BLOCK_S,
        outage_slope: bool = True, selection: Sequence[str] = (), progress: bool | None = None,
        workers: int | None = 1, cluster: str | None = None) -> "PathModel":
    """Fit a path model to measured traces (see the module docstring for the method).

    ``states`` is the number of level states or a range to choose from (outages add a state of their own);
    ``slow_block_s`` is the block length of the slow part (per-trace offset and drift over minutes, slow.py),
    fitted first and taken out of the data the level states see; None leaves it out. ``outage_slope``
    ties the outage-entry rate to the slow level (coverage holes, holes.py; kept only when BIC says so).
    ``selection`` only goes into the report; ``tol`` is the EM's log-likelihood tolerance. ``workers``
    local processes or a Dask ``cluster`` (tracegen.parallel) fit the state counts side by side, each
    with its own restarts and seeds as in one process. Same traces and seed give the same model bytes.
    """
    from ..parallel import runner

    from ..model import PathModel, StateModel

    traces = list(traces)
    check_seed(seed)
    if criterion not in CRITERIA:
        raise TracegenError(f"unknown criterion '{criterion}'", field="criterion", hint=f"use {' or '.join(CRITERIA)}")
    for name, value in (("restarts", restarts), ("max_iter", max_iter)):
        if value < 1:
            raise TracegenError(f"must be at least 1, got {value}", field=name)
    counts = _state_range(states)
    prep = prepare(traces, step_s=step_s, with_rtt=with_rtt, floor_bps=floor_bps)
    slow: SlowFit | None = None
    if slow_block_s is not None:
        slow = fit_slow(prep, slow_block_s)
        if slow is not None:
            values = smoothed(prep, slow)
            if outage_slope:
                slow = replace(slow, outage_slope=fit_outage_slope(prep, values, slow.block_s))
            prep = remove_slow(prep, slow, values)
    with_outage = any(bool(np.any(k == OUTAGE)) for k in prep.kinds)
    if len(prep.features) == 0:
        raise TracegenError("the selection has no sample with known, non-zero bandwidth", field="selection")
    candidates: dict[int, Candidate] = {}
    table: list[dict[str, Any]] = []
    skipped: list[dict[str, Any]] = []
    jobs = [(prep, k, restarts, seed, max_iter, tol, with_outage, max_ar_order) for k in counts]
    with runner(workers if len(counts) > 1 else 1, cluster) as run, \
            bar(run.map(fit_state_count, jobs), label=f"fitting {len(counts)} state counts", length=len(counts),
                enabled=progress) as items:
        for k, hmm, cand, exc in items:
            if exc is not None:
                if len(counts) == 1:
                    raise exc
                skipped.append({"states": k, "reason": str(exc)})  # e.g. too many states for the data
                continue
            candidates[k] = cand
            table.append({"states": k, "hmm_loglik": hmm.loglik, "hmm_bic": hmm.bic,
                          "full_loglik": cand.full_loglik, "full_bic": cand.full_bic, "parameters": cand.n_params,
                          "iterations": hmm.n_iter, "converged": hmm.converged,
                          "restart_logliks": list(hmm.restart_logliks)})
    if not candidates:
        reasons = "; ".join(f"{row['states']}: {row['reason']}" for row in skipped)
        raise TracegenError(f"no state count in {list(counts)} could be fitted to {len(prep.features)} level "
                            f"samples ({reasons})", field="states", hint="ask for fewer states or select more data")
    key = "full_bic" if criterion == "full-bic" else "hmm_bic"
    chosen = min(table, key=lambda row: row[key])["states"]
    cand = candidates[chosen]
    shift = 1 if with_outage else 0
    known = np.concatenate([p[p >= 0] for p in cand.paths])
    share = np.bincount(known, minlength=chosen + shift) / known.size
    bw = np.exp(np.concatenate(level_log_bandwidth(prep)))   # as the level states see it: the slow part out
    rtt = np.concatenate([np.asarray(t["rtt_ms"]) for t in prep.traces])
    path = np.concatenate(cand.paths)
    loss_means = loss_by_state([np.asarray(t["loss"]) for t in prep.traces], cand.paths, chosen + shift)
    built = []
    for s in range(chosen + shift):
        in_state = path == s
        level = float(np.median(bw[in_state])) if s >= shift else 0.0
        r = rtt[in_state & np.isfinite(rtt)]
        rtt_log = None
        if not with_rtt and r.size >= 2 and np.std(np.log(r)) > 0:
            rtt_log = (float(np.mean(np.log(r))), float(np.std(np.log(r), ddof=1)))
        lm = loss_means[s]
        if s < shift:
            built.append(StateModel("outage", 0.0, float(share[s]), cand.dwell[s], rtt_log_ms=rtt_log,
                                    loss_mean=lm))
        else:
            j = s - shift
            built.append(StateModel("level", level, float(share[s]), cand.dwell[s],
                                    tuple(float(v) for v in cand.hmm.means[j]),
                                    tuple(tuple(float(v) for v in row) for row in cand.hmm.covars[j]),
                                    cand.ar[s], rtt_log, lm))
    loss = fit_gilbert_elliott([np.asarray(t["loss"]) for t in prep.traces])
    events = fit_events([_columns(t, p) for t, p in zip(prep.traces, cand.paths)],
                        outage_state=0 if with_outage else None, n_states=chosen + shift)
    report: dict[str, Any] = {
        "selection": list(selection), "trace_ids": [t.id for t in traces], "traces": len(traces),
        "samples": prep.n_samples, "known_samples": prep.n_known, "level_samples": int(len(prep.features)),
        "hours": prep.n_known * prep.step_s / 3600.0, "criterion": criterion, "level_states": chosen,
        "outage_state": with_outage, "selection_table": table, "restarts": restarts, "max_iter": max_iter,
        "seed": seed, "loglik": cand.hmm.loglik, "full_loglik": cand.full_loglik,
        "state_counts_tried": list(counts), "state_counts_skipped": skipped,
        "warnings": [] if cand.hmm.converged else [f"EM did not converge in {max_iter} iterations for "
                                                   f"{chosen} states; raise --max-iter"],
    }
    features = ("log_bandwidth_bps", "log_rtt_ms") if with_rtt else ("log_bandwidth_bps",)
    report["slow"] = None if slow is None else slow.to_dict()
    report["slow_block_s"] = slow_block_s
    report["outage_slope"] = outage_slope
    return PathModel(prep.step_s, floor_bps, features, tuple(built),
                     tuple(tuple(float(v) for v in row) for row in cand.jumps), loss, events, report, __version__,
                     slow)


def _columns(tr: Trace, path: np.ndarray) -> dict[str, Any]:
    cols = {"t_s": np.asarray(tr["t_s"]), "bandwidth_bps": np.asarray(tr["bandwidth_bps"]),
            "rtt_ms": np.asarray(tr["rtt_ms"]), "state": path}
    if "cell" in tr.data:
        cols["cell"] = tr["cell"]
    return cols


__all__ = ["fit", "CRITERIA", "DEFAULT_STATES"]
