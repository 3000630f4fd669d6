"""How far a synthetic (or any training) set is from the field, beside the field's own noise floor.

``coverage(real, synthetic)`` puts both sets on one step (features.prepare), cuts them into tumbling
windows at each scale (default 10 s, 60 s, 300 s) plus one row per trace, and compares them:

* per feature: the two-sample KS statistic and Wasserstein-1 (on the real set's robust scale);
* the whole feature vector: the energy distance (Székely & Rizzo) with a permutation p-value, and the
  k-NN precision, recall, density and coverage (Kynkäänniemi et al. 2019; Naeem et al. 2020);
* over time: the pooled autocorrelation of log bandwidth (mean absolute difference over lags up to
  ``max_lag_s``), the run lengths above / below the real median level (KS), outage and handover rates.

The noise floor is the same distance between two disjoint halves A and B of the real set, split by
group (``Trace.group``, else the trace itself) so that windows of one session never sit on both sides,
over ``splits`` seeded splits. For the same splits the synthetic side is compared with B: a random
subset of whole synthetic traces with about as many windows as A stands in for A, so both distances
see the same sample sizes. A metric's gap ratio is median(distance(S, B)) / median(distance(A, B)):
about 1 when the synthetic set is as close to the field as the field is to itself. Per scale the
headline is the energy-distance ratio of the whole feature vector; per feature, the KS ratio (the
worst scale); overall, the worst scale. Readings: up to ``WITHIN_NOISE`` (1.5) "within noise", up to
``FAR`` (3) "wider than noise", beyond "far".

Where it misses: real windows that no synthetic window comes near (outside every synthetic point's
reach in the k-NN sense: ``PRDC.real_covered`` false) are holes, listed per trace and per tag value;
synthetic windows outside every real window's k-NN ball are unrealistic.
"""

from __future__ import annotations

import functools
import json
import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from .. import __version__
from ..errors import TracegenError, check_seed
from ..plainjson import plain
from ..trace import Trace
from . import distances as dist
from .features import (DEFAULT_SCALES_S, Prepared, WindowTable, dwell_runs, event_rates, pooled_acf, prepare,
                       trace_features, window_features)

FORMAT_NAME = "tracegen-coverage"
FORMAT_VERSION = 1
WITHIN_NOISE, FAR = 1.5, 3.0
MIN_ROW_SHARE = 0.5      # a feature enters the multivariate metrics when at least this share of rows has it
TRACE_SCALE = "trace"    # the key of the per-trace rows beside the window scales
PRDC_SPLIT_POINTS = 20_000  # rows per side for the k-NN metrics of the noise-floor splits (the full comparison uses all)


def reading(ratio: float | None) -> str:
    """Plain words for a gap ratio."""
    if ratio is None or not math.isfinite(ratio):
        return "far" if ratio == math.inf else "no noise floor"
    if ratio <= WITHIN_NOISE:
        return "within noise"
    return "wider than noise" if ratio <= FAR else "far"


def scale_key(scale_s: float) -> str:
    """``10`` for 10 s windows, ``trace`` for the per-trace rows."""
    return TRACE_SCALE if not math.isfinite(scale_s) else f"{scale_s:g}"


def _ratio(gap: float, floor: float) -> float | None:
    if not (math.isfinite(gap) and math.isfinite(floor)):
        return None
    if floor > 0:
        return gap / floor
    return 1.0 if gap <= 0 else math.inf


def _median(values: list[float]) -> float:
    v = np.asarray([x for x in values if x is not None and math.isfinite(x)], dtype=float)
    return float(np.median(v)) if v.size else float("nan")


@dataclass
class ScaleData:
    """What the report draws for one scale: feature values of both sets (real scale), and the projection."""

    key: str
    features: tuple[str, ...]
    real: np.ndarray
    synthetic: np.ndarray
    multivariate: tuple[str, ...] = ()
    real_hole: np.ndarray | None = None       # per real row: no synthetic window near it
    fake_outside: np.ndarray | None = None    # per synthetic row: outside every real k-NN ball
    real_rows: np.ndarray | None = None       # indices of the rows used in the multivariate metrics
    fake_rows: np.ndarray | None = None


@dataclass
class CoverageResult:
    """Every number of a coverage run (``data``, JSON-able, stable keys) and the arrays its plots need."""

    data: dict[str, Any]
    scales: dict[str, ScaleData] = field(default_factory=dict)
    acf: dict[str, np.ndarray] = field(default_factory=dict)      # "lags_s", "real", "synthetic"
    runs: dict[str, np.ndarray] = field(default_factory=dict)     # "real_above", "synthetic_above", ...

    @property
    def gap_ratio(self) -> float | None:
        return self.data["gap_ratio"]["overall"]

    def to_json(self) -> str:
        """Canonical JSON text (sorted keys)."""
        return json.dumps(plain(self.data, inf_as_text=True), indent=1, sort_keys=True, allow_nan=False) + "\n"

    def to_html(self) -> str:
        """A self-contained HTML report (plots embedded)."""
        from .report import render_html

        return render_html(self)

    def summary_text(self) -> str:
        from .report import summary_text

        return summary_text(self)


# --------------------------------------------------------------------------------------------------
# splits


def _groups(traces: Sequence[Trace]) -> np.ndarray:
    """One label per trace: its group, else its own id (a trace is then its own group)."""
    labels = [t.group or f"trace:{t.id}" for t in traces]
    _, inverse = np.unique(np.array(labels, dtype=object).astype(str), return_inverse=True)
    return inverse


def group_splits(traces: Sequence[Trace], splits: int, seed: int) -> list[np.ndarray]:
    """``splits`` boolean masks over the traces (True = half A); whole groups on one side, halves as even
    in groups as they can be. Empty when there are fewer than two groups."""
    g = _groups(traces)
    n_groups = int(g.max()) + 1 if g.size else 0
    if n_groups < 2:
        return []
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(1,)))
    out = []
    for _ in range(splits):
        order = rng.permutation(n_groups)
        in_a = np.zeros(n_groups, dtype=bool)
        in_a[order[: n_groups // 2]] = True
        out.append(in_a[g])
    return out


def _rows_of(table: WindowTable, trace_mask: np.ndarray) -> np.ndarray:
    return trace_mask[table.trace]


def _synthetic_stand_in(table: WindowTable, n_rows: int, rng: np.random.Generator) -> np.ndarray:
    """Rows of whole synthetic traces, in random order, until about ``n_rows`` rows (all if fewer)."""
    counts = np.bincount(table.trace, minlength=int(table.trace.max()) + 1 if len(table) else 0)
    order = rng.permutation(counts.size)
    cum = np.cumsum(counts[order])
    take = order[: int(np.searchsorted(cum, n_rows)) + 1]
    chosen = np.zeros(counts.size, dtype=bool)
    chosen[take] = True
    return chosen[table.trace]


# --------------------------------------------------------------------------------------------------
# one scale


@dataclass
class _Metrics:
    ks: np.ndarray
    w1: np.ndarray
    energy: float
    prdc: dist.PRDC | None


def _metrics(real: np.ndarray, other: np.ndarray, multi: np.ndarray, *, k: int, max_points: int,
             rng: np.random.Generator, prdc_points: int | None) -> _Metrics:
    """Distances of ``other`` (synthetic, or the real half A) from ``real`` (the real set, or half B)."""
    ks = dist.ks_per_feature(other, real)
    w1 = dist.wasserstein_per_feature(other, real)
    energy, pr = float("nan"), None
    if not multi.any():
        return _Metrics(ks, w1, energy, pr)
    rm, om = real[:, multi], other[:, multi]
    rm, om = rm[dist.complete_rows(rm)], om[dist.complete_rows(om)]
    if len(rm) >= 2 and len(om) >= 2:
        energy = dist.energy_distance(om, rm, max_points=max_points, rng=rng)
        if len(rm) > k and len(om) > k:
            pr = dist.prdc(rm, om, k=k, max_points=prdc_points, rng=rng)
    return _Metrics(ks, w1, energy, pr)


def _compare_scale(key: str, index: int, real: WindowTable, syn: WindowTable, splits: list[np.ndarray], *, k: int,
                   max_points: int, n_permutations: int, seed: int, notes: list[str],
                   real_traces: Sequence[Trace], syn_traces: Sequence[Trace]) -> tuple[dict[str, Any], ScaleData]:
    names = real.features
    center, scale = dist.robust_scale(real.values)
    r = dist.standardise(real.values, center, scale)
    s = dist.standardise(syn.values, center, scale)
    known_r = np.isfinite(r).mean(axis=0) if len(r) else np.zeros(len(names))
    known_s = np.isfinite(s).mean(axis=0) if len(s) else np.zeros(len(names))
    usable = (known_r > 0) & (known_s > 0)
    for f, kr, ks_ in zip(names, known_r, known_s):
        if kr == 0 and ks_ == 0:
            continue
        if kr == 0 or ks_ == 0:
            notes.append(f"{key}: feature {f} has no values in the {'real' if kr == 0 else 'synthetic'} set; "
                         "left out")
    multi = usable & (known_r >= MIN_ROW_SHARE) & (known_s >= MIN_ROW_SHARE)
    if not multi.any():
        notes.append(f"{key}: no feature is known in half the rows of both sets; multivariate metrics left out")
    for f, u, m in zip(names, usable, multi):
        if u and not m:
            notes.append(f"{key}: feature {f} is missing in over {1 - MIN_ROW_SHARE:.0%} of windows; compared on "
                         "its own, left out of the multivariate metrics")
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(2, index)))

    full = _metrics(r, s, multi, k=k, max_points=max_points, rng=rng, prdc_points=None)  # every row: holes
    p_value = None
    if n_permutations > 0 and math.isfinite(full.energy):
        rm, sm = r[:, multi], s[:, multi]
        p_value = dist.permutation_pvalue(
            rm[dist.complete_rows(rm)], sm[dist.complete_rows(sm)],
            functools.partial(dist.energy_distance, max_points=max_points, rng=np.random.default_rng(seed)),
            # a stream of its own: asking for more or fewer permutations leaves every other number as it is
            n_permutations=n_permutations, rng=np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(4, index))))

    floor_ks, floor_w1, floor_e, floor_cov, floor_rec = [], [], [], [], []
    gap_ks, gap_w1, gap_e, gap_cov, gap_rec = [], [], [], [], []
    for mask in splits:
        in_a = _rows_of(real, mask)
        a, b = r[in_a], r[~in_a]
        if len(a) < 2 or len(b) < 2:
            continue
        stand_in = s[_synthetic_stand_in(syn, len(a), rng)]
        fl = _metrics(b, a, multi, k=k, max_points=max_points, rng=rng, prdc_points=PRDC_SPLIT_POINTS)
        gp = _metrics(b, stand_in, multi, k=k, max_points=max_points, rng=rng, prdc_points=PRDC_SPLIT_POINTS)
        floor_ks.append(fl.ks)
        floor_w1.append(fl.w1)
        gap_ks.append(gp.ks)
        gap_w1.append(gp.w1)
        floor_e.append(fl.energy)
        gap_e.append(gp.energy)
        if fl.prdc is not None and gp.prdc is not None:
            floor_cov.append(1.0 - fl.prdc.coverage)
            gap_cov.append(1.0 - gp.prdc.coverage)
            floor_rec.append(1.0 - fl.prdc.recall)
            gap_rec.append(1.0 - gp.prdc.recall)
    have_floor = bool(floor_ks)

    def per_feature(full_v: np.ndarray, floors: list[np.ndarray], gaps: list[np.ndarray]) -> dict[str, Any]:
        out = {}
        with warnings.catch_warnings():  # a feature with no value in any split stays NaN: said by its reading
            warnings.simplefilter("ignore", RuntimeWarning)
            fl = np.nanmedian(np.array(floors), axis=0) if floors else np.full(len(names), np.nan)
            gp = np.nanmedian(np.array(gaps), axis=0) if gaps else np.full(len(names), np.nan)
        for i, f in enumerate(names):
            if not usable[i]:
                continue
            ratio = _ratio(float(gp[i]), float(fl[i])) if have_floor else None
            out[f] = {"distance": float(full_v[i]), "split_distance": float(gp[i]) if have_floor else None,
                      "noise_floor": float(fl[i]) if have_floor else None, "ratio": ratio, "reading": reading(ratio)}
        return out

    energy_floor, energy_gap = _median(floor_e), _median(gap_e)
    energy_ratio = _ratio(energy_gap, energy_floor) if have_floor else None
    spread = None
    if have_floor and energy_floor > 0:
        # how much the ratio moves from split to split: 10th and 90th percentile of the per-split
        # distances over the median floor, and the same for the real halves (whose median is 1)
        g, f = np.asarray(gap_e, float) / energy_floor, np.asarray(floor_e, float) / energy_floor
        spread = {"ratio": [float(np.nanpercentile(g, 10)), float(np.nanpercentile(g, 90))],
                  "floor": [float(np.nanpercentile(f, 10)), float(np.nanpercentile(f, 90))]}
    out: dict[str, Any] = {
        "windows": {"real": len(real), "synthetic": len(syn)},
        "features": [f for f, u in zip(names, usable) if u],
        "multivariate_features": [f for f, m in zip(names, multi) if m],
        "ks": per_feature(full.ks, floor_ks, gap_ks),
        "wasserstein": per_feature(full.w1, floor_w1, gap_w1),
        "energy": {"distance": full.energy, "p_value": p_value, "split_distance": energy_gap if have_floor else None,
                   "noise_floor": energy_floor if have_floor else None, "ratio": energy_ratio,
                   "spread": spread, "reading": reading(energy_ratio)},
        "splits_used": len(floor_ks),
    }
    data = ScaleData(key, names, real.values, syn.values, tuple(f for f, m in zip(names, multi) if m))
    if full.prdc is not None:
        p = full.prdc
        cov_ratio = _ratio(_median(gap_cov), _median(floor_cov)) if floor_cov else None
        rec_ratio = _ratio(_median(gap_rec), _median(floor_rec)) if floor_rec else None
        out["prdc"] = {"k": p.k, "precision": p.precision, "recall": p.recall, "density": p.density,
                       "coverage": p.coverage,
                       "noise_floor": {"coverage": 1.0 - _median(floor_cov) if floor_cov else None,
                                       "recall": 1.0 - _median(floor_rec) if floor_rec else None},
                       "uncovered_ratio": cov_ratio, "unrecalled_ratio": rec_ratio}
        rm_rows = np.flatnonzero(dist.complete_rows(r[:, multi]))
        sm_rows = np.flatnonzero(dist.complete_rows(s[:, multi]))
        data.real_rows, data.fake_rows = rm_rows, sm_rows
        if len(p.real_covered) == len(rm_rows) and len(p.fake_inside) == len(sm_rows):
            data.real_hole, data.fake_outside = ~p.real_covered, ~p.fake_inside
            out["holes"] = _holes(real, rm_rows[~p.real_covered], real_traces)
            out["unrealistic"] = _holes(syn, sm_rows[~p.fake_inside], syn_traces)
    return out, data


def _holes(table: WindowTable, rows: np.ndarray, traces: Sequence[Trace], top: int = 20) -> dict[str, Any]:
    """Where the missed windows are: how many, which traces (most first), which tag values."""
    total = np.bincount(table.trace, minlength=len(traces))
    missed = np.bincount(table.trace[rows], minlength=len(traces))
    order = np.argsort(-missed, kind="stable")
    per_trace = []
    for i in order[:top]:
        if missed[i] == 0:
            break
        starts = np.sort(table.start_s[rows][table.trace[rows] == i])
        per_trace.append({"id": traces[i].id, "source": traces[i].source, "windows": int(missed[i]),
                          "share": float(missed[i] / total[i]), "tags": dict(traces[i].tags),
                          "first_starts_s": [float(x) for x in starts[:10]]})
    by_tag: dict[str, dict[str, dict[str, float]]] = {}
    for i, tr in enumerate(traces):
        for key, value in tr.tags.items():
            cell = by_tag.setdefault(key, {}).setdefault(str(value), {"windows": 0, "missed": 0})
            cell["windows"] += int(total[i])
            cell["missed"] += int(missed[i])
    tags = {k: {v: {"windows": c["windows"], "missed": c["missed"],
                    "share": c["missed"] / c["windows"] if c["windows"] else None} for v, c in sorted(vals.items())}
            for k, vals in sorted(by_tag.items())}
    return {"count": int(rows.size), "share": float(rows.size / max(len(table), 1)), "traces": per_trace,
            "by_tag": tags}


# --------------------------------------------------------------------------------------------------
# over time


def _temporal(real: Prepared, syn: Prepared, splits: list[np.ndarray], max_lag_s: float, seed: int,
              result: CoverageResult) -> dict[str, Any]:
    lags, acf_r = pooled_acf(real, max_lag_s)
    _, acf_s = pooled_acf(syn, max_lag_s)
    result.acf = {"lags_s": lags, "real": acf_r, "synthetic": acf_s}
    threshold = _real_median_log_bw(real)
    above_r, below_r = dwell_runs(real, threshold)
    above_s, below_s = dwell_runs(syn, threshold)
    result.runs = {"real_above": above_r, "real_below": below_r, "synthetic_above": above_s,
                   "synthetic_below": below_s, "threshold_log_bw": np.array([threshold])}
    rates_r, rates_s = event_rates(real), event_rates(syn)

    def acf_d(x: np.ndarray, y: np.ndarray) -> float:
        ok = np.isfinite(x) & np.isfinite(y)
        return float(np.mean(np.abs(x[ok] - y[ok]))) if ok.any() else float("nan")

    def runs_d(x: tuple[np.ndarray, np.ndarray], y: tuple[np.ndarray, np.ndarray]) -> float:
        parts = [float(dist.ks_per_feature(a[:, None], b[:, None])[0]) for a, b in zip(x, y) if a.size and b.size]
        return float(np.mean(parts)) if parts else float("nan")

    floors: dict[str, list[float]] = {"acf": [], "dwell": [], "outages_per_hour": [], "handovers_per_hour": []}
    gaps: dict[str, list[float]] = {k: [] for k in floors}
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(3,)))
    for mask in splits:
        a = Prepared(tuple(t for t, m in zip(real.traces, mask) if m), real.step_s, ())
        b = Prepared(tuple(t for t, m in zip(real.traces, mask) if not m), real.step_s, ())
        n_a = len(a.traces)
        pick = rng.permutation(len(syn.traces))[: max(n_a, 1)]
        s = Prepared(tuple(syn.traces[i] for i in sorted(pick)), syn.step_s, ())
        acf_b = pooled_acf(b, max_lag_s)[1]
        floors["acf"].append(acf_d(pooled_acf(a, max_lag_s)[1], acf_b))
        gaps["acf"].append(acf_d(pooled_acf(s, max_lag_s)[1], acf_b))
        runs_b = dwell_runs(b, threshold)
        floors["dwell"].append(runs_d(dwell_runs(a, threshold), runs_b))
        gaps["dwell"].append(runs_d(dwell_runs(s, threshold), runs_b))
        ra, rb, rs = event_rates(a), event_rates(b), event_rates(s)
        for name in ("outages_per_hour", "handovers_per_hour"):
            floors[name].append(abs(ra[name] - rb[name]))
            gaps[name].append(abs(rs[name] - rb[name]))
    out: dict[str, Any] = {
        "acf": {"max_lag_s": max_lag_s, "distance": acf_d(acf_r, acf_s)},
        "dwell": {"threshold_log_bw": threshold, "distance": runs_d((above_r, below_r), (above_s, below_s)),
                  "mean_above_s": {"real": _mean(above_r), "synthetic": _mean(above_s)},
                  "mean_below_s": {"real": _mean(below_r), "synthetic": _mean(below_s)}},
        "outages_per_hour": {"real": rates_r["outages_per_hour"], "synthetic": rates_s["outages_per_hour"],
                             "distance": abs(rates_r["outages_per_hour"] - rates_s["outages_per_hour"])},
        "handovers_per_hour": {"real": rates_r["handovers_per_hour"], "synthetic": rates_s["handovers_per_hour"],
                               "distance": abs(rates_r["handovers_per_hour"] - rates_s["handovers_per_hour"])},
    }
    for name, part in out.items():
        fl, gp = _median(floors[name]), _median(gaps[name])
        ratio = _ratio(gp, fl) if splits and math.isfinite(fl) else None
        part.update({"split_distance": gp if splits else None, "noise_floor": fl if splits else None,
                     "ratio": ratio, "reading": reading(ratio)})
    return out


def _mean(x: np.ndarray) -> float | None:
    return float(np.mean(x)) if x.size else None


def _real_median_log_bw(prep: Prepared) -> float:
    from ..trace import OUTAGE_FLOOR_BPS

    parts = [np.asarray(t["bandwidth_bps"]) for t in prep.traces]
    bw = np.concatenate(parts) if parts else np.zeros(0)
    bw = bw[np.isfinite(bw) & (bw >= OUTAGE_FLOOR_BPS)]
    if not bw.size:
        raise TracegenError("the real set has no sample with known, non-zero bandwidth", field="real")
    return float(np.median(np.log(bw)))


# --------------------------------------------------------------------------------------------------
# the whole comparison


def _nice(step_s: float) -> float:
    """A step rounded to two significant digits (1.00645 s -> 1 s), so jittered loggers share a grid."""
    digits = 1 - int(math.floor(math.log10(step_s)))
    return float(round(step_s, digits))


def common_step(real: Sequence[Trace], synthetic: Sequence[Trace]) -> float | None:
    """The step both sets are compared on: the coarser of the two sets' median steps, rounded to two
    significant digits (a trace finer than that is averaged onto it, a coarser one held)."""
    medians = []
    for side in (real, synthetic):
        steps = [t.step_s for t in side if len(t) > 1 and math.isfinite(t.step_s) and t.step_s > 0]
        if steps:
            medians.append(float(np.median(steps)))
    return _nice(max(medians)) if medians else None


def coverage(real: Sequence[Trace], synthetic: Sequence[Trace], *, scales_s: Sequence[float] = DEFAULT_SCALES_S,
             step_s: float | None = None, splits: int = 10, seed: int = 0, k: int = 5, max_points: int = 2000,
             n_permutations: int = 100, max_lag_s: float = 120.0, labels: Mapping[str, str] | None = None,
             progress: bool | None = None, workers: int | None = 1, cluster: str | None = None) -> CoverageResult:
    """Compare ``synthetic`` with ``real`` at each window scale and over time, beside the real set's own
    noise floor (module docstring). ``labels`` (e.g. {"real": "access=lte", "synthetic": "folder"}) only
    go into the report. ``workers`` local processes or a Dask ``cluster`` (tracegen.parallel) compute
    the window features of chunks of traces. Same inputs and seed give the same numbers and bytes,
    wherever they run."""
    from ..parallel import runner

    check_seed(seed)
    with runner(workers, cluster) as run:
        return _coverage(real, synthetic, scales_s=scales_s, step_s=step_s, splits=splits, seed=seed, k=k,
                         max_points=max_points, n_permutations=n_permutations, max_lag_s=max_lag_s, labels=labels,
                         progress=progress, run=run)


def _coverage(real: Sequence[Trace], synthetic: Sequence[Trace], *, scales_s: Sequence[float], step_s: float | None,
              splits: int, seed: int, k: int, max_points: int, n_permutations: int, max_lag_s: float,
              labels: Mapping[str, str] | None, progress: bool | None, run: Any) -> CoverageResult:
    from ..progress import bar

    real, synthetic = list(real), list(synthetic)
    if not real:
        raise TracegenError("the real selection holds no traces", field="real", hint="check the selection")
    if not synthetic:
        raise TracegenError("the synthetic selection holds no traces", field="synthetic",
                            hint="check the selection or the folder")
    scales = sorted({float(s) for s in scales_s})
    if not scales or any(not (math.isfinite(s) and s > 0) for s in scales):
        raise TracegenError(f"window scales must be positive seconds, got {list(scales_s)}", field="scales_s")
    for name, value, least in (("splits", splits, 1), ("k", k, 1), ("max_points", max_points, 10)):
        if value < least:
            raise TracegenError(f"must be at least {least}, got {value}", field=name)
    if step_s is None:
        step_s = common_step(real, synthetic)
    prep_r, prep_s = prepare(real, step_s), prepare(synthetic, step_s)
    notes = [f"real: {n}" for n in prep_r.notes] + [f"synthetic: {n}" for n in prep_s.notes]
    split_masks = group_splits(prep_r.traces, splits, seed)
    if not split_masks:
        notes.append("the real set has fewer than two groups (sessions, routes or devices), so it cannot be "
                     "split for a noise floor: distances are reported without ratios")
    result = CoverageResult({})
    per_scale: dict[str, Any] = {}
    tables = [(s, scale_key(s)) for s in scales] + [(math.inf, TRACE_SCALE)]
    with bar(list(enumerate(tables)), label="comparing windows", enabled=progress) as items:
        for index, (s, key) in items:
            if math.isfinite(s):
                wr, ws = window_features(prep_r, s, run), window_features(prep_s, s, run)
            else:
                wr, ws = trace_features(prep_r, runner=run), trace_features(prep_s, runner=run)
            notes += [f"{key}: real: {n}" for n in wr.notes] + [f"{key}: synthetic: {n}" for n in ws.notes]
            if len(wr) < 2 or len(ws) < 2:
                notes.append(f"{key}: fewer than two windows in the {'real' if len(wr) < 2 else 'synthetic'} set "
                             f"(traces shorter than {key} s?); scale left out")
                continue
            part, data = _compare_scale(key, index, wr, ws, split_masks, k=k, max_points=max_points,
                                        n_permutations=n_permutations, seed=seed, notes=notes,
                                        real_traces=prep_r.traces, syn_traces=prep_s.traces)
            per_scale[key] = part
            result.scales[key] = data
    window_keys = [scale_key(s) for s in scales if scale_key(s) in per_scale]
    if not window_keys:
        raise TracegenError(f"no window scale of {scales} fits the traces (each needs two windows per set)",
                            field="scales_s", hint="use shorter windows, e.g. --scales 10,60")
    temporal = _temporal(prep_r, prep_s, split_masks, max_lag_s, seed, result)

    by_scale = {key: per_scale[key]["energy"]["ratio"] for key in window_keys}
    spread_by_scale = {key: per_scale[key]["energy"]["spread"] for key in window_keys}
    finite = [v for v in by_scale.values() if v is not None]
    overall = max(finite) if finite else None
    by_feature: dict[str, Any] = {}
    worst: list[dict[str, Any]] = []
    for key, part in per_scale.items():
        for f, m in part["ks"].items():
            if m["ratio"] is None:
                continue
            worst.append({"feature": f, "scale": key, "ratio": m["ratio"], "reading": m["reading"]})
            if f not in by_feature or (by_feature[f]["ratio"] or 0) < m["ratio"]:
                by_feature[f] = {"ratio": m["ratio"], "scale": key}
    worst.sort(key=lambda w: -w["ratio"])
    noise_floor = {key: {"energy": part["energy"]["noise_floor"],
                         "ks": {f: m["noise_floor"] for f, m in part["ks"].items()}} for key, part in per_scale.items()}
    result.data = {
        "format": FORMAT_NAME, "version": FORMAT_VERSION, "tracegen_version": __version__,
        "labels": dict(labels or {}),
        "real": _set_summary(prep_r, split_masks), "synthetic": _set_summary(prep_s, []),
        "step_s": prep_r.step_s, "scales_s": [scale_key(s) for s in scales],
        "settings": {"splits": splits, "seed": seed, "k": k, "max_points": max_points,
                     "permutations": n_permutations, "max_lag_s": max_lag_s,
                     "readings": {"within_noise": WITHIN_NOISE, "far": FAR}},
        "gap_ratio": {"overall": overall, "reading": reading(overall), "by_scale": by_scale,
                      "by_scale_spread": spread_by_scale, "by_feature": {f: v["ratio"] for f, v in sorted(by_feature.items())},
                      "by_feature_scale": {f: v["scale"] for f, v in sorted(by_feature.items())},
                      "temporal": {name: part["ratio"] for name, part in temporal.items()}},
        "noise_floor": {"splits": len(split_masks), "by_scale": noise_floor},
        "scales": per_scale, "temporal": temporal, "worst_features": worst[:10], "notes": notes,
    }
    return result


def _set_summary(prep: Prepared, splits: list[np.ndarray]) -> dict[str, Any]:
    hours = sum(len(t) for t in prep.traces) * prep.step_s / 3600.0
    out = {"traces": len(prep.traces), "hours": hours, "groups": int(_groups(prep.traces).max()) + 1}
    if splits:
        out["split_traces_a"] = [int(m.sum()) for m in splits]
    return out


__all__ = ["coverage", "CoverageResult", "ScaleData", "group_splits", "reading", "scale_key", "WITHIN_NOISE", "FAR",
           "FORMAT_NAME", "FORMAT_VERSION"]
