"""The audit for people: a terminal summary and a self-contained HTML page (same look as the coverage
report: inline style, matplotlib PNGs as data URLs, no script; same result, same bytes)."""

from __future__ import annotations

import html
from typing import Any

import numpy as np

from ..compare.report import PAGE_STYLE, REAL_COLOUR, SYNTH_COLOUR, fmt, page_end, png, pyplot

STATUS_CLASS = {"ok": "ok", "over": "wide", "outside": "wide", "thin": "far", "empty": "far"}
SHOWN_ROWS = 25


def _pct(x: Any) -> str:
    return "-" if x is None else f"{x:.1%}"


def summary_text(result) -> str:
    """Size, composition at a glance, effective size, duplicates and the flagged cells."""
    d = result.data
    sel = d["selection"]
    label = (d.get("labels") or {}).get("selection", "the selection")
    lines = [f"audit of {label}: {sel['traces']} traces, {sel['groups']} groups, {sel['hours']:.2f} h, "
             f"{sel['windows']:,} windows of {d['scheme']['scale_s']:g} s at {d['step_s']:g} s steps"]
    du = d["durations"]["duration_s"]
    lines.append(f"durations: median {fmt(du['median'], 0)} s (p10 {fmt(du['p10'], 0)}, p90 {fmt(du['p90'], 0)}); "
                 f"steps: " + ", ".join(f"{s} s x{c}" for s, c in d["durations"]["steps"].items()))
    lv = d["effective"].get("mean_log_bw")
    if lv:
        lines.append(f"effective windows (level): {lv['effective']:,.0f} of {lv['windows']:,} "
                     f"(integrated autocorrelation time {lv['tau_windows']:.2f} windows)")
    for name, bins in d["cells"]["marginals"].items():
        lines.append(f"  {name:12} " + "  ".join(f"{b} {_pct(v['share'])}" for b, v in bins.items()))
    for name, vals in d["tags"].items():
        lines.append(f"  tag {name:8} " + "  ".join(f"{v} {_pct(x['share'])}" for v, x in vals.items()))
    dup = d.get("duplicates")
    if dup is not None:
        lines.append(f"duplicates: {len(dup.get('identical', []))} identical sets, "
                     f"{len(dup.get('pairs', []))} near-copy pairs")
    for kind, part in d["comparisons"].items():
        flagged = [r for r in part["cells"] if r["status"] in ("empty", "thin")]
        lines.append(f"against {part['label']}: {len(flagged)} cells empty or thin, "
                     f"{sum(r['status'] == 'outside' for r in part['cells'])} outside it")
        for r in sorted(flagged, key=lambda r: -(r["expected"] - r["windows"]))[:10]:
            lines.append(f"  {r['status']:6} {r['cell']}: {r['windows']} windows, {r['expected']:.1f} expected "
                         f"(p_low {fmt(r['p_low'], 3)})")
        for name, rows in part.get("tags", {}).items():
            for r in rows:
                if r["status"] in ("empty", "thin"):
                    lines.append(f"  {r['status']:6} tag {name}={r['value']}: {r['hours']:.2f} h, "
                                 f"{r['expected_hours']:.2f} h expected")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------------
# plots


def marginals_figure(result) -> str | None:
    """One panel per dimension: share of windows per bin, the selection beside the reference/target."""
    d = result.data
    marg = d["cells"]["marginals"]
    if not d["selection"]["windows"]:
        return None
    ref = (d["comparisons"].get("reference") or {}).get("marginals") or {}
    plt = pyplot()
    fig, axes = plt.subplots(1, len(marg), figsize=(2.3 * len(marg) + 0.5, 2.4), squeeze=False)
    for ax, (name, bins) in zip(axes[0], marg.items()):
        labels = list(bins)
        rrows = {r["cell"].split("=", 1)[1]: r for r in ref.get(name, [])}
        labels += [b for b in rrows if b not in bins]
        x = np.arange(len(labels))
        own = [bins.get(b, {}).get("share") or 0.0 for b in labels]
        ax.bar(x - 0.2 if rrows else x, own, width=0.4 if rrows else 0.6, color=SYNTH_COLOUR, label="selection")
        if rrows:
            ax.bar(x + 0.2, [rrows.get(b, {}).get("target_share") or 0.0 for b in labels], width=0.4,
                   color=REAL_COLOUR, label="reference")
        ax.set_xticks(x, labels, rotation=40, ha="right")
        ax.set_title(name)
        ax.set_ylim(0, 1)
    axes[0][0].set_ylabel("share of windows")
    if ref:
        axes[0][0].legend(frameon=False)
    fig.tight_layout()
    return png(fig)


def heatmap_figure(result, rows_dim: str = "level", cols_dim: str = "variability") -> str | None:
    """Windows per bin pair of two dimensions, counts written in the cells."""
    d = result.data
    dims = {x["name"]: x for x in d["scheme"]["dims"]}
    if rows_dim not in dims or cols_dim not in dims or not d["selection"]["windows"]:
        return None
    rl, cl = dims[rows_dim]["bins"] + ["unknown"], dims[cols_dim]["bins"] + ["unknown"]
    grid = np.zeros((len(rl), len(cl)))
    for r in d["cells"]["joint"]:
        parts = dict(p.split("=", 1) for p in r["cell"].split(","))
        grid[rl.index(parts[rows_dim]), cl.index(parts[cols_dim])] += r["windows"]
    keep_r, keep_c = grid.sum(axis=1) > 0, grid.sum(axis=0) > 0
    keep_r[:-1], keep_c[:-1] = True, True  # always show the real bins; unknown only when used
    grid = grid[keep_r][:, keep_c]
    rl = [x for x, k in zip(rl, keep_r) if k]
    cl = [x for x, k in zip(cl, keep_c) if k]
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(1.1 * len(cl) + 1.6, 0.5 * len(rl) + 1.2))
    ax.imshow(grid, cmap="Blues", aspect="auto")
    for (i, j), v in np.ndenumerate(grid):
        ax.text(j, i, f"{int(v)}", ha="center", va="center", color="#222" if v < grid.max() / 2 else "white")
    ax.set_xticks(range(len(cl)), cl)
    ax.set_yticks(range(len(rl)), rl)
    ax.set_xlabel(cols_dim)
    ax.set_ylabel(rows_dim)
    fig.tight_layout()
    return png(fig)


def durations_figure(result) -> str | None:
    """Histogram of trace durations on log-spaced bins (from the JSON's histogram)."""
    hist = result.data["durations"].get("histogram") or {}
    edges, counts = np.asarray(hist.get("edges_s") or []), np.asarray(hist.get("traces") or [])
    if edges.size < 2 or not counts.sum():
        return None
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(4.5, 2.2))
    if edges[-1] > edges[0]:
        ax.stairs(counts, edges, fill=True, color=SYNTH_COLOUR)
        ax.set_xscale("log")
    else:
        ax.bar([edges[0]], counts[:1], color=SYNTH_COLOUR)
    ax.set_xlabel("duration (s)")
    ax.set_ylabel("traces")
    fig.tight_layout()
    return png(fig)


# --------------------------------------------------------------------------------------------------
# page


def _img(src: str | None, alt: str) -> str:
    return f'<img src="{src}" alt="{html.escape(alt)}">' if src else ""


def _status_cell(status: str) -> str:
    return f'<td class="{STATUS_CLASS.get(status, "")}">{html.escape(status)}</td>'


def _comparison_table(rows: list[dict[str, Any]], with_ref: bool) -> str:
    e = html.escape
    order = {"empty": 0, "thin": 1, "over": 2, "outside": 3, "ok": 4}
    rows = sorted(rows, key=lambda r: (order.get(r["status"], 5), -(r["expected"] - r["windows"]), r["cell"]))
    head = ("<table><tr><th class='name'>cell</th><th>windows</th><th>share</th>"
            + ("<th>reference windows</th>" if with_ref else "")
            + "<th>target share</th><th>expected</th><th>p_low</th><th>status</th></tr>")
    body = []
    for r in rows[:SHOWN_ROWS]:
        body.append(f"<tr><td class='name'>{e(r['cell'])}</td><td>{r['windows']:,}</td><td>{_pct(r['share'])}</td>"
                    + (f"<td>{r.get('reference_windows', 0):,}</td>" if with_ref else "")
                    + f"<td>{_pct(r['target_share'])}</td><td>{fmt(r['expected'], 1)}</td>"
                      f"<td>{fmt(r['p_low'], 3)}</td>{_status_cell(r['status'])}</tr>")
    more = f"<p class='note'>{len(rows) - SHOWN_ROWS} more rows in the JSON.</p>" if len(rows) > SHOWN_ROWS else ""
    return head + "".join(body) + "</table>" + more


def render_html(result) -> str:
    """The whole audit page as one string."""
    d = result.data
    e = html.escape
    sel = d["selection"]
    label = (d.get("labels") or {}).get("selection", "the selection")
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>tracegen audit: {e(label)}</title>", f"<style>{PAGE_STYLE}</style></head><body>",
           f"<h1>What {e(label)} holds</h1>",
           f"<p>{sel['traces']} traces in {sel['groups']} groups, {sel['hours']:.2f} h, {sel['windows']:,} windows of "
           f"{d['scheme']['scale_s']:g} s on a common step of {d['step_s']:g} s. tracegen {e(d['tracegen_version'])}.</p>"]
    flagged = [r for part in d["comparisons"].values() for r in part["cells"] if r["status"] in ("empty", "thin")]
    if d["comparisons"]:
        out.append(f'<p class="headline">{len(flagged)} cell{"s" if len(flagged) != 1 else ""} empty or thin against '
                   + " and ".join(e(p["label"]) for p in d["comparisons"].values()) + ".</p>")
    lv = d["effective"].get("mean_log_bw")
    if lv:
        out.append(f"<p>Windows of one trace are alike: the {lv['windows']:,} windows are worth about "
                   f"<b>{lv['effective']:,.0f}</b> independent ones for the level (integrated autocorrelation time "
                   f"{lv['tau_windows']:.2f} windows, Geyer's initial monotone sequence).</p>")

    out.append("<h2>Condition cells</h2><p>Each window falls in one bin of every dimension:</p><table>"
               "<tr><th class='name'>dimension</th><th class='name'>window value</th><th class='name'>bins</th></tr>")
    for dim in d["scheme"]["dims"]:
        out.append(f"<tr><td class='name'>{e(dim['name'])}</td><td class='name'>{e(dim['feature'])}</td>"
                   f"<td class='name'>{e(', '.join(dim['bins']))}</td></tr>")
    out.append("</table>" + _img(marginals_figure(result), "share of windows per bin")
               + _img(heatmap_figure(result), "windows per level and variability"))
    joint = sorted(d["cells"]["joint"], key=lambda r: -r["windows"])
    out.append("<h3>Occupied cells</h3><table><tr><th class='name'>cell</th><th>windows</th><th>share</th>"
               "<th>hours</th><th>traces</th><th>groups</th></tr>")
    for r in joint[:SHOWN_ROWS]:
        out.append(f"<tr><td class='name'>{e(r['cell'])}</td><td>{r['windows']:,}</td><td>{_pct(r['share'])}</td>"
                   f"<td>{fmt(r['hours'])}</td><td>{r['traces']:,}</td><td>{r['groups']:,}</td></tr>")
    out.append("</table>")
    if len(joint) > SHOWN_ROWS:
        out.append(f"<p class='note'>{len(joint) - SHOWN_ROWS} more cells in the JSON.</p>")

    for kind, part in d["comparisons"].items():
        out.append(f"<h2>Against {e(part['label'])}</h2>")
        if part["cells"]:
            out.append(_comparison_table(part["cells"], "reference_windows" in part["cells"][0]))
        for name, rows in part.get("tags", {}).items():
            out.append(f"<h3>tag {e(name)}</h3><table><tr><th class='name'>value</th><th>hours</th><th>share</th>"
                       "<th>target share</th><th>status</th></tr>")
            for r in rows:
                out.append(f"<tr><td class='name'>{e(r['value'])}</td><td>{fmt(r['hours'])}</td><td>{_pct(r['share'])}</td>"
                           f"<td>{_pct(r['target_share'])}</td>{_status_cell(r['status'])}</tr>")
            out.append("</table>")

    out.append("<h2>Tags</h2>")
    for name, vals in d["tags"].items():
        out.append(f"<h3>{e(name)}</h3><table><tr><th class='name'>value</th><th>traces</th><th>hours</th>"
                   "<th>share</th></tr>")
        for v, x in vals.items():
            out.append(f"<tr><td class='name'>{e(v)}</td><td>{x['traces']:,}</td><td>{fmt(x['hours'])}</td>"
                       f"<td>{_pct(x['share'])}</td></tr>")
        out.append("</table>")
    if not d["tags"]:
        out.append("<p class='note'>No trace carries a tag.</p>")

    du = d["durations"]
    out.append("<h2>Durations and steps</h2><table><tr><th class='name'></th><th>min</th><th>p10</th><th>median</th>"
               "<th>p90</th><th>max</th></tr>")
    for name in ("duration_s", "step_s"):
        q = du[name]
        out.append(f"<tr><td class='name'>{name}</td>" + "".join(f"<td>{fmt(q[k])}</td>" for k in
                                                                ("min", "p10", "median", "p90", "max")) + "</tr>")
    out.append("</table><p>Steps: " + ", ".join(f"{e(s)} s &times; {c}" for s, c in du["steps"].items()) + ".</p>")
    out.append(_img(durations_figure(result), "trace durations"))

    if d["effective"]:
        out.append("<h3>Effective windows per feature</h3><table><tr><th class='name'>feature</th><th>windows</th>"
                   "<th>autocorrelation time</th><th>effective</th></tr>")
        for f, x in d["effective"].items():
            out.append(f"<tr><td class='name'>{e(f)}</td><td>{x['windows']:,}</td><td>{fmt(x['tau_windows'])}</td>"
                       f"<td>{x['effective']:,.0f}</td></tr>")
        out.append("</table>")

    dup = d.get("duplicates")
    if dup is not None:
        out.append("<h2>Duplicates and near copies</h2>")
        ident, pairs = dup.get("identical", []), dup.get("pairs", [])
        if not ident and not pairs:
            out.append("<p>None found.</p>")
        for s in ident:
            out.append("<p>Identical samples: " + ", ".join(e(f"{x['id']} ({x['source']})") for x in s["traces"]) + "</p>")
        if pairs:
            out.append("<table><tr><th class='name'>trace</th><th class='name'>trace</th><th class='name'>why</th>"
                       "<th>correlation</th><th>lag (s)</th><th>overlap (s)</th></tr>")
            for p in pairs[:SHOWN_ROWS]:
                out.append(f"<tr><td class='name'>{e(p['a']['id'])} ({e(p['a']['source'])})</td>"
                           f"<td class='name'>{e(p['b']['id'])} ({e(p['b']['source'])})</td>"
                           f"<td class='name'>{e(', '.join(p['reasons']))}</td><td>{fmt(p.get('corr'), 3)}</td>"
                           f"<td>{fmt(p.get('lag_s'), 1)}</td><td>{fmt(p.get('overlap_s'), 0)}</td></tr>")
            out.append("</table>")
    return page_end(out, d["notes"])


__all__ = ["summary_text", "render_html", "marginals_figure", "heatmap_figure", "durations_figure"]
