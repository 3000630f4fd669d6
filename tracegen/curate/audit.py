"""The representativeness audit of a corpus: what it holds, what it repeats, where it is thin.

``audit(traces, against=None, mix=None)`` reads, for the traces given (a catalog selection or a folder):

* composition by tags (traces and hours per value of every tag) and by condition cells (windows per cell
  and per bin of each dimension, with the traces and groups behind them; cells.py);
* the spread of durations and sampling steps;
* duplicates and near copies (duplicates.py);
* the effective number of windows, autocorrelation-aware, for the main window features (effective.py);
* against a reference selection and/or a target mix (mix.py): every cell, bin and tag value with its
  expected count and a status.

Statuses. With ``n`` windows in the corpus and a reference share (or target share) ``s`` of a cell, its
expected count is ``e = s * n``. A cell is ``empty`` when it has no window and ``e >= min_expected``
(default 5), ``thin`` when its count is below ``thin_ratio * e`` (default 0.5) and ``e >= min_expected``,
``over`` when its count is above ``e / thin_ratio``, ``outside`` when it has windows but the reference
has none (or the target is 0), else ``ok``. Beside each count, ``p_low`` is the chance of a count this
low or lower if the corpus were drawn from the reference's (or target's) mix: the binomial lower tail,
computed on effective sizes (counts times the corpus's effective-to-actual window ratio for the level)
because windows of one trace are not independent; a small ``p_low`` says the shortfall is not luck.
Tags compare hours the same way (no p-value: hours are not counts).
"""

from __future__ import annotations

import json
import math
from collections import defaultdict
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
from scipy import special

from .. import __version__
from ..compare.gap import common_step
from ..errors import TracegenError
from ..plainjson import plain
from ..trace import Trace
from .cells import UNKNOWN, CellScheme, CellTable, cell_table
from .effective import effective_size
from .mix import TargetMix

FORMAT_NAME = "tracegen-audit"
FORMAT_VERSION = 1
THIN_RATIO = 0.5
MIN_EXPECTED = 5.0  # the usual rule of thumb for counts read as binomial or chi-square (Cochran 1954, from memory)
EFFECTIVE_FEATURES = ("mean_log_bw", "cv_bw", "outage_share", "rtt_p50_ms", "loss_mean")
NO_TAG = "(none)"
STATUSES = ("empty", "thin", "over", "outside", "ok")


def _round(x: float | None, digits: int = 6) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(round(x, digits))


@dataclass(frozen=True)
class AuditResult:
    """Every number of an audit in ``data`` (plain, JSON-ready); text, JSON and HTML renderings."""

    data: dict[str, Any]

    def to_json(self) -> str:
        return json.dumps(self.data, indent=1, sort_keys=False, allow_nan=False) + "\n"

    def to_html(self) -> str:
        from .audit_page import render_html

        return render_html(self)

    def summary_text(self) -> str:
        from .audit_page import summary_text

        return summary_text(self)

    def flagged(self, *statuses: str) -> list[dict[str, Any]]:
        """The compared cells with one of ``statuses`` (default empty and thin), most missing first."""
        wanted = statuses or ("empty", "thin")
        rows = [r for part in self.data.get("comparisons", {}).values() for r in part["cells"]
                if r["status"] in wanted]
        return sorted(rows, key=lambda r: (-(r["expected"] - r["windows"]), r["cell"]))


def _status(count: np.ndarray, expected: np.ndarray, known: np.ndarray, thin_ratio: float,
            min_expected: float) -> list[str]:
    """Status of each row (module docstring); ``known`` is False where the reference or target is 0."""
    out = []
    for c, e, k in zip(count.tolist(), expected.tolist(), known.tolist()):  # a loop over cells
        if not k:
            out.append("outside" if c > 0 else "ok")
        elif c == 0 and e >= min_expected:
            out.append("empty")
        elif c < thin_ratio * e and e >= min_expected:
            out.append("thin")
        elif c > e / thin_ratio:
            out.append("over")
        else:
            out.append("ok")
    return out


def binomial_low_tail(count: np.ndarray, n: float, share: np.ndarray) -> np.ndarray:
    """P(X <= count) for X ~ Binomial(n, share), continued to non-whole n and counts through the
    regularised incomplete beta function: P(X <= k) = I_{1-p}(n - k, k + 1) (Abramowitz and Stegun
    26.5.24); 1 where count >= n or share is 0."""
    count = np.asarray(count, dtype=np.float64)
    share = np.asarray(share, dtype=np.float64)
    out = np.ones_like(count)
    inside = (count < n) & (share > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[inside] = special.betainc(n - count[inside], count[inside] + 1.0, 1.0 - share[inside])
    return out


def _groups(traces: Sequence[Trace]) -> np.ndarray:
    labels = np.array([t.group or f"trace:{t.id}" for t in traces], dtype=object).astype(str)
    return np.unique(labels, return_inverse=True)[1].reshape(-1)


def _window_hours(table: CellTable) -> float:
    m = max(1, int(round(table.scheme.scale_s / table.step_s)))
    return m * table.step_s / 3600.0


def _spread(x: np.ndarray) -> dict[str, float | None]:
    if x.size == 0:
        return {"min": None, "p10": None, "median": None, "p90": None, "max": None}
    q = np.percentile(x, [0, 10, 50, 90, 100])
    return {"min": _round(q[0]), "p10": _round(q[1]), "median": _round(q[2]), "p90": _round(q[3]),
            "max": _round(q[4])}


def _durations(traces: Sequence[Trace]) -> dict[str, Any]:
    d = np.array([t.duration_s for t in traces], dtype=np.float64)
    steps = np.array([t.step_s for t in traces], dtype=np.float64)
    finite = steps[np.isfinite(steps)]
    counts: dict[str, int] = defaultdict(int)
    for s in finite.tolist():  # a loop over traces
        counts[f"{float(f'{s:.3g}'):g}"] += 1
    pos = d[d > 0]
    hist: dict[str, list] = {"edges_s": [], "traces": []}
    if pos.size:
        edges = np.geomspace(pos.min(), pos.max(), 21) if pos.max() > pos.min() else np.array([pos.min(), pos.min()])
        per_bin = np.histogram(pos, bins=edges if pos.max() > pos.min() else 1)[0]
        hist = {"edges_s": [float(x) for x in edges], "traces": [int(c) for c in per_bin]}
    return {"duration_s": _spread(d), "total_hours": _round(float(d.sum()) / 3600.0), "histogram": hist,
            "step_s": _spread(finite), "steps": dict(sorted(counts.items(), key=lambda kv: float(kv[0])))}


def _tag_table(traces: Sequence[Trace]) -> dict[str, dict[str, dict[str, Any]]]:
    """Per tag, per value: traces and hours (traces without the tag under '(none)')."""
    names = sorted({k for t in traces for k in t.tags})
    hours = np.array([t.duration_s / 3600.0 for t in traces])
    total = float(hours.sum())
    out: dict[str, dict[str, dict[str, Any]]] = {}
    for name in names:  # a loop over tags and traces: metadata only
        per: dict[str, list[float]] = defaultdict(lambda: [0, 0.0])
        for t, h in zip(traces, hours.tolist()):
            v = per[str(t.tags.get(name, NO_TAG))]
            v[0] += 1
            v[1] += h
        out[name] = {v: {"traces": int(c), "hours": _round(h), "share": _round(h / total if total > 0 else 0.0)}
                     for v, (c, h) in sorted(per.items())}
    return out


def _cells(table: CellTable, traces: Sequence[Trace]) -> dict[str, Any]:
    """Windows, share, traces, groups and hours of every cell that occurs, and of every bin."""
    n = len(table)
    groups = _groups(traces)
    hours_per = _window_hours(table)
    rows = []
    for c, key in enumerate(table.keys):  # a loop over cells
        hit = table.cell == c
        tr = np.unique(table.trace[hit])
        rows.append({"cell": key, "windows": int(hit.sum()), "share": _round(hit.sum() / n),
                     "hours": _round(hit.sum() * hours_per), "traces": int(tr.size),
                     "groups": int(np.unique(groups[tr]).size)})
    marginals: dict[str, dict[str, Any]] = {}
    for j, dim in enumerate(table.scheme.dims):
        codes = table.codes[:, j] if n else np.zeros(0, dtype=np.int16)
        part = {}
        for code, label in [(i, lab) for i, lab in enumerate(dim.labels)] + [(-1, UNKNOWN)]:
            hit = codes == code
            if code == -1 and not hit.any():
                continue
            part[label] = {"windows": int(hit.sum()), "share": _round(hit.sum() / n if n else 0.0),
                           "traces": int(np.unique(table.trace[hit]).size)}
        marginals[dim.name] = part
    return {"windows": n, "window_hours": _round(hours_per), "joint": rows, "marginals": marginals}


def _partial_counts(table: CellTable, dims: Sequence[str]) -> dict[str, int]:
    """Windows per partial key over ``dims`` (only the combinations that occur)."""
    idx = [table.scheme.names.index(d) for d in dims]
    if not len(table):
        return {}
    sub = table.codes[:, idx]
    uniq, counts = np.unique(sub, axis=0, return_counts=True)
    out = {}
    for row, c in zip(uniq, counts):
        key = ",".join(f"{d}={table.scheme.dims[i].label(int(code))}" for d, i, code in zip(dims, idx, row))
        out[key] = int(c)
    return out


def _compare_counts(counts: Mapping[str, int], shares: Mapping[str, float], n: int, deff: float,
                    thin_ratio: float, min_expected: float, ref_counts: Mapping[str, int] | None = None
                    ) -> list[dict[str, Any]]:
    keys = sorted(set(counts) | {k for k, s in shares.items() if s > 0})
    count = np.array([counts.get(k, 0) for k in keys], dtype=np.float64)
    share = np.array([shares.get(k, 0.0) for k in keys], dtype=np.float64)
    expected = share * n
    status = _status(count, expected, share > 0, thin_ratio, min_expected)
    n_eff = n / deff if deff > 0 else float(n)
    p_low = binomial_low_tail(count / deff, n_eff, share)
    rows = []
    for i, k in enumerate(keys):
        row = {"cell": k, "windows": int(count[i]), "share": _round(count[i] / n if n else 0.0),
               "target_share": _round(share[i]), "expected": _round(expected[i], 3), "status": status[i],
               "p_low": _round(float(p_low[i]))}
        if ref_counts is not None:
            row["reference_windows"] = int(ref_counts.get(k, 0))
        rows.append(row)
    return rows


def _compare_tags(tags: Mapping[str, Mapping[str, Mapping[str, Any]]], targets: Mapping[str, Mapping[str, float]],
                  total_hours: float, thin_ratio: float) -> dict[str, list[dict[str, Any]]]:
    out = {}
    for name, shares in targets.items():
        have = tags.get(name, {})
        rows = []
        for value in sorted(set(have) | {v for v, s in shares.items() if s > 0}):
            h = float(have.get(value, {}).get("hours") or 0.0)
            s = float(shares.get(value, 0.0))
            e = s * total_hours
            status = _status(np.array([h]), np.array([e]), np.array([s > 0]), thin_ratio, 1e-9)[0]
            rows.append({"value": value, "hours": _round(h), "share": _round(h / total_hours if total_hours else 0.0),
                         "target_share": _round(s), "expected_hours": _round(e), "status": status})
        out[name] = rows
    return out


def _shares_of(counts: Mapping[str, int]) -> dict[str, float]:
    total = sum(counts.values())
    return {k: v / total for k, v in counts.items()} if total else {}


def _effective(table: CellTable) -> dict[str, Any]:
    m = max(1, int(round(table.scheme.scale_s / table.step_s)))
    pos = np.rint(table.start_s / (m * table.step_s)).astype(np.int64)
    out = {}
    for f in EFFECTIVE_FEATURES:
        v = table.windows.values[:, table.windows.features.index(f)] if len(table) else np.zeros(0)
        if np.isfinite(v).sum() < 2:
            continue
        ok = np.isfinite(v)
        out[f] = effective_size(v[ok], table.trace[ok], pos[ok]).to_data()
    return out


def _check_tags(mix: TargetMix, traces: Sequence[Trace]) -> None:
    have = {k for t in traces for k in t.tags}
    for name in mix.tags:
        if name not in have:
            raise TracegenError(f"no trace of the selection has a tag '{name}'", field=f"tags.{name}", path=mix.path,
                                hint=f"tags present: {', '.join(sorted(have)) or 'none'}")


def audit(traces: Sequence[Trace], *, against: Sequence[Trace] | None = None, mix: TargetMix | None = None,
          scheme: CellScheme | None = None, step_s: float | None = None, thin_ratio: float = THIN_RATIO,
          min_expected: float = MIN_EXPECTED, duplicates: bool = True, labels: Mapping[str, str] | None = None
          ) -> AuditResult:
    """Audit ``traces`` (module docstring), optionally against reference traces and/or a target mix."""
    traces = list(traces)
    if not traces:
        raise TracegenError("no traces to audit", field="traces", hint="check the selection or the folder")
    if not (0 < thin_ratio < 1):
        raise TracegenError(f"thin ratio {thin_ratio!r} must be between 0 and 1", field="thin_ratio")
    if not (math.isfinite(min_expected) and min_expected >= 0):
        raise TracegenError(f"{min_expected!r} must be a number >= 0", field="min_expected")
    if against is not None and not list(against):
        raise TracegenError("the reference holds no traces", field="against")
    scheme = scheme or CellScheme()
    if mix is not None:
        _check_tags(mix, traces)
        missing = [d for d in mix.cell_dims if d not in scheme.names]
        if missing:
            raise TracegenError(f"the target mix names {', '.join(missing)}, which the cells leave out",
                                field="cells", path=mix.path, hint="add the dimension with --dims")
    ref = list(against) if against is not None else None
    step = step_s if step_s is not None else common_step(traces, ref or traces)
    table = cell_table(traces, scheme, step)
    notes = list(dict.fromkeys(table.notes))
    n = len(table)
    if n == 0:
        notes.append(f"no trace gives a whole {scheme.scale_s:g} s window with half its bandwidth known: "
                     "composition by cells is empty")
    effective = _effective(table)
    level = effective.get("mean_log_bw")
    deff = (level["windows"] / level["effective"]) if level and level["effective"] > 0 else 1.0
    tags = _tag_table(traces)
    groups = _groups(traces)
    data: dict[str, Any] = {
        "format": FORMAT_NAME, "version": FORMAT_VERSION, "tracegen_version": __version__,
        "labels": dict(labels or {}),
        "selection": {"traces": len(traces), "groups": int(groups.max()) + 1,
                      "hours": _round(sum(t.duration_s for t in traces) / 3600.0), "windows": n},
        "step_s": _round(table.step_s), "scheme": scheme.describe(), "thin_ratio": thin_ratio,
        "min_expected": min_expected, "tags": tags, "cells": _cells(table, traces), "durations": _durations(traces),
        "effective": effective, "design_effect": _round(deff),
    }
    comparisons: dict[str, Any] = {}
    sel_counts = {k: int(c) for k, c in zip(table.keys, np.bincount(table.cell, minlength=len(table.keys)))}
    if ref is not None:
        rtable = cell_table(ref, scheme, table.step_s)
        notes.extend(f"reference: {x}" for x in dict.fromkeys(rtable.notes))
        ref_counts = {k: int(c) for k, c in zip(rtable.keys, np.bincount(rtable.cell, minlength=len(rtable.keys)))}
        marg = {}
        for d in scheme.names:
            sc, rc = _partial_counts(table, [d]), _partial_counts(rtable, [d])
            marg[d] = _compare_counts(sc, _shares_of(rc), n, deff, thin_ratio, min_expected, rc)
        rtags = _tag_table(ref)
        tag_shares = {name: {v: x["share"] or 0.0 for v, x in vals.items()} for name, vals in rtags.items()
                      if name in tags}
        comparisons["reference"] = {
            "label": (labels or {}).get("reference", "reference"),
            "traces": len(ref), "windows": len(rtable), "hours": _round(sum(t.duration_s for t in ref) / 3600.0),
            "cells": _compare_counts(sel_counts, _shares_of(ref_counts), n, deff, thin_ratio, min_expected,
                                     ref_counts),
            "marginals": marg,
            "tags": _compare_tags(tags, tag_shares, data["durations"]["total_hours"] or 0.0, thin_ratio)}
    if mix is not None:
        part: dict[str, Any] = {"label": mix.path or "target mix", "dims": list(mix.cell_dims), "cells": []}
        if mix.cells:
            part["cells"] = _compare_counts(_partial_counts(table, mix.cell_dims), mix.cells, n, deff, thin_ratio,
                                            min_expected)
        part["tags"] = _compare_tags(tags, mix.tags, data["durations"]["total_hours"] or 0.0, thin_ratio)
        comparisons["target"] = part
    data["comparisons"] = comparisons
    if duplicates:
        from .duplicates import find_duplicates

        dup = find_duplicates(traces, step_s=table.step_s)
        data["duplicates"] = dup.to_data(traces)
        notes.extend(dup.notes)
    data["notes"] = notes
    return AuditResult(plain(data, digits=6))


__all__ = ["audit", "AuditResult", "binomial_low_tail", "FORMAT_NAME", "THIN_RATIO", "MIN_EXPECTED", "STATUSES"]
