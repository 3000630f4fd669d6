"""Widening a corpus where it is thin: synthesise windows aimed at chosen cells, with importance weights.

For every goal (a full or partial cell key and a number of windows to add) the model is sampled in
batches of traces; the windows of each trace that land in the cell (recomputed features, cells.py) are
kept as traces of one window each, the rest thrown away. To land there more often the batches are
drawn from a tilted law (synth/tilt.py), and every kept window carries its trace's likelihood ratio p/q
as its weight, so nothing is faked: weighted, the kept windows estimate the untilted model.

How the tilt is aimed. The first batch uses a tilt read off the model: states whose level (and median
RTT and mean loss, where the cell names them) fall in the cell's bins get weight 1, every other state
``1/MISMATCH_PENALTY`` per dimension it misses; a cell of low variability stretches dwell times (fewer
level changes per window), one of high variability shortens them; a cell with outages raises the
outage rate and length, one without lowers the outage rate. Later batches refine the state weights by
the cross-entropy method (Rubinstein and Kroese, "The Cross-Entropy Method", 2004): the weighted state
occupancy of the windows that landed, over the model's own state shares, becomes the new weights.

Estimates. With N windows drawn for a goal (every batch, tilted or not) and w the weight of each kept
window, ``p_hat = sum(w) / N`` estimates the probability that an untilted window lands in the cell (an
unbiased estimate for each batch, so for their pool too), with a standard error from the per-trace sums
(windows of one trace are not independent; the ratio estimator's delta-method variance). The
conditional mean of any window feature under the untilted model is ``sum(w f) / sum(w)`` over the kept
windows (``WidenResult.weighted_mean``).

A goal the budget cannot reach is reported as ``short`` (some windows) or ``unreachable`` (none); a
dimension the model does not produce at all (no RTT in the model, say) makes a cell that names a known
bin of it ``unreachable`` before anything is drawn.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import TracegenError
from ..synth import check_run, model_digest, synth_one
from ..synth.tilt import Tilt
from ..trace import Trace
from .cells import CellScheme, cell_table

MISMATCH_PENALTY = 8.0
WEIGHT_CLIP = (1e-2, 1e2)      # bounds on a state weight: keeps a tilt from making any state all but impossible
GOAL_STRIDE = 1_000_000        # trace index = goal number * stride + draw number: goals do not share draws
VARIABILITY_DWELL = {0: 2.0, 2: 0.5}  # dwell scale for the lowest / highest variability bins (default edges)


@dataclass(frozen=True)
class CellGoal:
    """Add ``windows`` windows in the cell ``key`` (full or partial key of the scheme)."""

    key: str
    windows: int


@dataclass
class GoalReport:
    """What widening did for one goal."""

    key: str
    wanted: int
    added: int = 0
    traces_drawn: int = 0
    windows_drawn: int = 0
    status: str = "reached"
    reason: str = ""
    p_hat: float | None = None
    p_se: float | None = None
    tilts: list[dict[str, Any]] = field(default_factory=list)

    def to_data(self) -> dict[str, Any]:
        rate = self.added / self.windows_drawn if self.windows_drawn else None
        return {"cell": self.key, "wanted": self.wanted, "added": self.added, "traces_drawn": self.traces_drawn,
                "windows_drawn": self.windows_drawn, "acceptance": rate, "status": self.status,
                "reason": self.reason, "untilted_probability": self.p_hat, "untilted_probability_se": self.p_se,
                "tilts": self.tilts}


@dataclass(frozen=True)
class WidenResult:
    """The added windows (``traces``, each with its weight p/q), a report per goal, and the audits of the
    corpus before and after when a corpus was given."""

    traces: list[Trace]
    goals: list[GoalReport]
    step_s: float
    notes: tuple[str, ...] = ()
    before: Any = None
    after: Any = None

    def weighted_mean(self, feature: str, key: str | None = None) -> float:
        """Untilted mean of a window feature over the windows of one goal's cell (or all added)."""
        from ..compare.features import WINDOW_FEATURES, prepare, window_features

        if feature not in WINDOW_FEATURES:
            raise TracegenError(f"no window feature '{feature}'", field="feature",
                                hint=f"features: {', '.join(WINDOW_FEATURES)}")
        chosen = [t for t in self.traces if key is None or t.tags.get("widen") == key]
        if not chosen:
            return math.nan
        table = window_features(prepare(chosen, self.step_s), len(chosen[0]) * self.step_s)
        w = np.array([chosen[i].weight for i in table.trace])
        f = table.values[:, table.features.index(feature)]
        ok = np.isfinite(f)
        return float(np.sum(w[ok] * f[ok]) / np.sum(w[ok]))

    def to_data(self) -> dict[str, Any]:
        out: dict[str, Any] = {"step_s": self.step_s, "added": len(self.traces),
                               "goals": [g.to_data() for g in self.goals], "notes": list(self.notes)}
        if self.before is not None:
            out["before"] = self.before.data
        if self.after is not None:
            out["after"] = self.after.data
        return out

    def summary_text(self) -> str:
        width = max([4] + [len(g.key) for g in self.goals])
        lines = [f"{'cell':{width}} {'wanted':>7} {'added':>6} {'drawn':>7} {'accept':>7} {'P(untilted)':>12}  status"]
        for g in self.goals:
            d = g.to_data()
            acc = "-" if d["acceptance"] is None else f"{d['acceptance']:.1%}"
            p = "-" if g.p_hat is None else f"{g.p_hat:.2e}"
            lines.append(f"{g.key:{width}} {g.wanted:7d} {g.added:6d} {g.windows_drawn:7d} {acc:>7} {p:>12}  {g.status}"
                         + (f" ({g.reason})" if g.reason else ""))
        if self.before is not None and self.after is not None:
            b, a = len(self.before.flagged()), len(self.after.flagged())
            lines.append(f"cells empty or thin: {b} before, {a} after")
        return "\n".join(lines)


# --------------------------------------------------------------------------------------------------
# aiming


def _state_values(model: Any) -> dict[str, np.ndarray]:
    """Per state: level (bit/s), median RTT (ms, NaN when unknown) and mean loss (NaN when unknown)."""
    level, rtt, loss = [], [], []
    for s in model.states:
        level.append(0.0 if s.kind == "outage" else s.level_bps)
        if len(s.mean) == 2:
            rtt.append(math.exp(s.mean[1]))
        elif s.rtt_log_ms is not None:
            rtt.append(math.exp(s.rtt_log_ms[0]))
        else:
            rtt.append(math.nan)
        loss.append(math.nan if s.loss_mean is None else s.loss_mean)
    return {"level": np.array(level), "rtt": np.array(rtt), "loss": np.array(loss)}


def _model_makes(model: Any, dim: str) -> bool:
    if dim == "rtt":
        return any(len(s.mean) == 2 or s.rtt_log_ms is not None for s in model.states)
    if dim == "loss":
        return model.loss is not None or any(s.loss_mean is not None for s in model.states)
    return True


def prior_tilt(model: Any, scheme: CellScheme, partial: Mapping[str, int]) -> Tilt:
    """The first batch's tilt toward a cell (module docstring)."""
    values = _state_values(model)
    misses = np.zeros(len(model.states))
    for name in ("level", "rtt", "loss"):
        if name in partial and partial[name] >= 0:
            dim = scheme.dims[scheme.names.index(name)]
            code = dim.codes(values[name])
            misses += (code != partial[name]) & (code >= 0)
    weights = MISMATCH_PENALTY ** -misses
    outage_states = [i for i, s in enumerate(model.states) if s.kind == "outage"]
    options: dict[str, Any] = {}
    if "outage" in partial and partial["outage"] >= 0:
        wants_outage = partial["outage"] > 0
        for i in outage_states:
            weights[i] = 1.0 if wants_outage else 1.0 / MISMATCH_PENALTY
        if model.events is not None and (model.events.outage_rate_per_hour or 0) > 0:
            options["outage_rate_factor"] = 4.0 if wants_outage else 0.25
    if "variability" in partial and partial["variability"] >= 0:
        n_bins = len(scheme.dims[scheme.names.index("variability")].labels)
        code = partial["variability"]
        scale = VARIABILITY_DWELL.get(0 if code == 0 else (2 if code == n_bins - 1 else 1))
        if scale is not None:
            options["dwell_scale"] = tuple([scale] * len(model.states))
    weights = np.clip(weights / weights.max(), *WEIGHT_CLIP)
    return Tilt(state_weights=tuple(float(w) for w in weights), **options)


def _refined(tilt: Tilt, model: Any, occupancy: np.ndarray) -> Tilt:
    """Cross-entropy update of the state weights from the weighted occupancy of the kept windows."""
    shares = np.array([max(s.share, 1e-6) for s in model.states])
    target = occupancy / occupancy.sum()
    new = np.maximum(target / shares, 1e-12)
    new = np.sqrt(new * np.asarray(tilt.state_weights))  # halfway (geometric) to damp batch-to-batch noise
    new = np.clip(new / new.max(), *WEIGHT_CLIP)
    return Tilt(state_weights=tuple(float(w) for w in new), dwell_scale=tilt.dwell_scale,
                handover_rate_factor=tilt.handover_rate_factor, outage_rate_factor=tilt.outage_rate_factor,
                failure_factor=tilt.failure_factor, outage_length_factor=tilt.outage_length_factor)


def _describe(tilt: Tilt) -> dict[str, Any]:
    out: dict[str, Any] = {"state_weights": [round(w, 6) for w in tilt.state_weights or ()]}
    if tilt.dwell_scale != 1.0:
        out["dwell_scale"] = tilt.dwell_scale if isinstance(tilt.dwell_scale, float) else list(tilt.dwell_scale)
    if tilt.outage_rate_factor != 1.0:
        out["outage_rate_factor"] = tilt.outage_rate_factor
    return out


# --------------------------------------------------------------------------------------------------
# drawing


def _window_trace(tr: Trace, first: int, m: int, key: str, scale_s: float, batch: int, tilt: Tilt,
                  ordinal: int) -> Trace:
    """One kept window as a trace of its own; provenance ``index`` numbers the added windows of the run,
    ``draw_index`` is the synthetic trace it was cut from."""
    cols = {name: np.asarray(tr[name])[first:first + m] for name in tr.columns if name != "t_s"}
    t = np.asarray(tr["t_s"])[first:first + m]
    start = float(t[0])
    prov = dict(tr.provenance)
    prov["draw_index"] = prov.get("index")
    prov["index"] = ordinal
    prov["widen"] = {"cell": key, "window_start_s": start, "scale_s": scale_s, "batch": batch, "tilt": _describe(tilt)}
    return Trace.from_columns(t - start, origin="synthetic", source=f"{tr.source}@{start:g}s",
                              tags={**tr.tags, "widen": key}, group=tr.group, provenance=prov, weight=tr.weight,
                              **cols)


def _unreachable_reason(model: Any, scheme: CellScheme, partial: Mapping[str, int]) -> str:
    for name, code in partial.items():
        if code >= 0 and not _model_makes(model, name):
            return f"the model has no {name}, so no window can be in a known {name} bin"
    return ""


def widen(model: Any, goals: Sequence[CellGoal], *, scheme: CellScheme | None = None, step_s: float | None = None,
          duration_s: float | None = None, seed: int = 0, budget: int = 2000, batch: int = 50, name: str | None = None,
          corpus: Sequence[Trace] | None = None, against: Sequence[Trace] | None = None, mix: Any = None,
          progress: Any = None) -> WidenResult:
    """Synthesise windows for each goal (module docstring). ``budget`` caps the traces drawn per goal.

    Each draw is one window long by default (``duration_s``): the sampler starts in the model's steady
    state, so a one-window trace is an exact draw of a window, and a short path keeps the likelihood
    ratios tame (a tilt's log ratio grows with every state choice on the path).

    With ``corpus`` the result carries its audit before (``corpus``) and after (``corpus`` plus the added
    windows), both against ``against`` and/or ``mix``."""
    from ..model import PathModel, load

    if not isinstance(model, PathModel):
        model = load(model)
    scheme = scheme or CellScheme()
    step = float(step_s if step_s is not None else model.step_s)
    m = int(round(scheme.scale_s / step))
    duration_s = m * step if duration_s is None else float(duration_s)
    for what, value, low in (("budget", budget, 1), ("batch", batch, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise TracegenError(f"must be a whole number >= {low}, got {value!r}", field=what)
    if duration_s < m * step:
        raise TracegenError(f"traces of {duration_s:g} s hold no {scheme.scale_s:g} s window", field="duration_s",
                            hint="draw traces at least one window long (several windows draw faster)")
    check_run(model, 1, duration_s, step, seed)
    parsed = []
    for g in goals:
        if not isinstance(g, CellGoal):
            raise TracegenError(f"expected a CellGoal, got {type(g).__name__}", field="goals")
        if isinstance(g.windows, bool) or not isinstance(g.windows, (int, np.integer)) or g.windows < 1:
            raise TracegenError(f"must be a whole number >= 1, got {g.windows!r}", field=f"goals.{g.key}")
        parsed.append(scheme.parse_key(g.key, where=f"goals.{g.key}"))
    label = name or "widen"
    digest = model_digest(model)
    added: list[Trace] = []
    reports = []
    for gi, (goal, partial) in enumerate(zip(goals, parsed)):  # a loop over goals and batches
        rep = GoalReport(goal.key, int(goal.windows))
        reports.append(rep)
        reason = _unreachable_reason(model, scheme, partial)
        if reason:
            rep.status, rep.reason = "unreachable", reason
            if progress is not None:
                progress(rep)
            continue
        tilt = prior_tilt(model, scheme, partial)
        sums: list[float] = []      # per trace drawn: sum of the weights of its kept windows
        counts: list[int] = []      # per trace drawn: windows it had
        occupancy = np.zeros(len(model.states))
        b = 0
        while rep.added < rep.wanted and rep.traces_drawn < budget:
            check_run(model, 1, duration_s, step, seed, tilt=tilt)
            size = min(batch, budget - rep.traces_drawn)
            start = gi * GOAL_STRIDE + rep.traces_drawn
            drawn = [synth_one(model, start + j, duration_s, step, seed, tilt=tilt, name=label, digest=digest,
                               tags={"model": label}) for j in range(size)]
            rep.tilts.append({"batch": b, "traces": size, **_describe(tilt)})
            table = cell_table(drawn, scheme, step)
            hit = scheme.matches(table.codes, partial)
            per_trace = np.bincount(table.trace, minlength=size)
            w = np.array([drawn[i].weight for i in table.trace])
            kept = np.zeros(size)
            np.add.at(kept, table.trace[hit], w[hit])
            sums.extend(kept.tolist())
            counts.extend(per_trace.tolist())
            rep.windows_drawn += int(per_trace.sum())
            rep.traces_drawn += size
            rows = np.flatnonzero(hit)
            for r in rows[: max(0, rep.wanted - rep.added)]:  # a loop over kept windows: slicing only
                tr = drawn[table.trace[r]]
                first = int(round(table.start_s[r] / step))
                added.append(_window_trace(tr, first, m, goal.key, scheme.scale_s, b, tilt, len(added)))
                states = np.asarray(tr["state"])[first:first + m]
                occupancy += w[r] * np.bincount(states[states >= 0], minlength=len(model.states))[:len(model.states)]
                rep.added += 1
            if occupancy.sum() > 0:
                tilt = _refined(tilt, model, occupancy)
            b += 1
        y, n = np.array(sums), np.array(counts, dtype=np.float64)
        if n.sum() > 0:
            p = float(y.sum() / n.sum())
            rep.p_hat = p
            rep.p_se = float(np.sqrt(np.sum((y - p * n) ** 2)) / n.sum())
        if rep.added == 0:
            rep.status = "unreachable"
            rep.reason = (f"none of {rep.windows_drawn:,} windows drawn ({rep.traces_drawn} traces, tilted toward it) "
                          "landed in it; the model may not produce it")
        elif rep.added < rep.wanted:
            rep.status, rep.reason = "short", f"the budget of {budget} traces ran out"
        if progress is not None:
            progress(rep)
    notes = []
    before = after = None
    if corpus is not None:
        from .audit import audit

        corpus = list(corpus)
        before = audit(corpus, against=against, mix=mix, scheme=scheme, step_s=step, duplicates=False,
                       labels={"selection": "before widening"})
        after = audit(corpus + added, against=against, mix=mix, scheme=scheme, step_s=step, duplicates=False,
                      labels={"selection": "after widening"})
    return WidenResult(added, reports, step, tuple(notes), before, after)


def goals_from_audit(result: Any, *, max_windows: int | None = None, rounds: int = 50) -> list[CellGoal]:
    """Goals that bring every empty or thin cell of an audit up to its expected count *after* widening.

    Adding windows raises the total, and with it every cell's expected count, so a cell that was not
    thin before can be after. The goals are the fixed point of: with N' the total after widening, a
    cell is aimed at when ``share * N' >= min_expected`` and its count is below ``thin_ratio * share *
    N'`` (or it was aimed at already), and gets ``ceil(share * N') - count`` windows; N' = N + all added.
    It converges when the cells aimed at hold less than the whole target (they always do unless the
    corpus has none of the cells with a share)."""
    d = result.data
    thin, min_expected = float(d["thin_ratio"]), float(d["min_expected"])
    rows = {}
    for part in d.get("comparisons", {}).values():
        for r in part["cells"]:
            if (r["target_share"] or 0) > 0:
                rows.setdefault(r["cell"], r)
    n = float(d["selection"]["windows"])
    keys = sorted(rows)
    count = np.array([rows[k]["windows"] for k in keys], dtype=np.float64)
    share = np.array([rows[k]["target_share"] for k in keys], dtype=np.float64)
    aimed = np.zeros(len(keys), dtype=bool)
    add = np.zeros(len(keys))
    for _ in range(rounds):  # a loop of fixed-point rounds, each vectorised over cells
        total = n + add.sum()
        expected = share * total
        aimed |= (expected >= min_expected) & (count < thin * expected)
        new = np.where(aimed, np.maximum(np.ceil(expected - count - 1e-9), 0.0), 0.0)
        if max_windows is not None:
            new = np.minimum(new, float(max_windows))
        if np.array_equal(new, add):
            break
        add = new
    return [CellGoal(k, int(a)) for k, a in zip(keys, add) if a >= 1]


__all__ = ["CellGoal", "GoalReport", "WidenResult", "widen", "prior_tilt", "goals_from_audit"]
