"""The coverage report for people: a terminal summary and a self-contained HTML page.

The page needs no network: plots are PNG images drawn by matplotlib (Agg) and embedded as data URLs,
the style sheet is inline, there is no script. It shows the headline gap ratio, the table of ratios per
feature and scale with a plain reading, CDF overlays per feature and scale, the autocorrelation and
dwell-time overlays, a 2-D projection of the feature space with the holes marked, and where the
synthetic set misses (traces, tags), then every note. Same result, same bytes.
"""

from __future__ import annotations

import base64
import html
import io
import math
from typing import Any

import numpy as np

from .gap import FAR, TRACE_SCALE, WITHIN_NOISE, CoverageResult, reading

MAX_DRAWN_POINTS = 4000     # per set in the projection; the holes are drawn on top, up to as many
REAL_COLOUR, SYNTH_COLOUR, HOLE_COLOUR = "#1f4e79", "#c55a11", "#7a0019"
READING_CLASS = {"within noise": "ok", "wider than noise": "wide", "far": "far"}


def fmt(v: Any, digits: int = 2) -> str:
    if v is None:
        return "-"
    if isinstance(v, str):
        return v
    if isinstance(v, float) and math.isinf(v):
        return "inf"
    if isinstance(v, float) and not math.isfinite(v):
        return "-"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    return f"{v:.{digits}f}" if abs(v) >= 10 ** -digits or v == 0 else f"{v:.2e}"


# --------------------------------------------------------------------------------------------------
# terminal


def summary_text(result: CoverageResult) -> str:
    """The headline and the per-scale and worst-feature ratios, for a terminal."""
    d = result.data
    g = d["gap_ratio"]
    labels = d.get("labels") or {}
    lines = [f"coverage of {labels.get('synthetic', 'the synthetic set')} ({d['synthetic']['traces']} traces, "
             f"{d['synthetic']['hours']:.2f} h) against {labels.get('real', 'the real set')} "
             f"({d['real']['traces']} traces, {d['real']['hours']:.2f} h) at {d['step_s']:g} s steps",
             f"gap ratio (worst scale): {fmt(g['overall'])}  [{g['reading']}]  "
             f"noise floor from {d['noise_floor']['splits']} group splits of the real set"]
    lines.append(f"{'scale':>8}  {'windows real/synth':>20}  {'energy ratio':>12}  {'split to split':>14}  "
                 f"{'coverage':>9}  reading")
    for key, part in d["scales"].items():
        pr = part.get("prdc") or {}
        sp = part["energy"].get("spread")
        sp_text = "-" if not sp else f"{fmt(sp['ratio'][0])}-{fmt(sp['ratio'][1])}"
        lines.append(f"{key:>8}  {part['windows']['real']:>9,}/{part['windows']['synthetic']:<10,}  "
                     f"{fmt(part['energy']['ratio']):>12}  {sp_text:>14}  {fmt(pr.get('coverage')):>9}  "
                     f"{part['energy']['reading']}")
    lines.append("over time: " + ", ".join(f"{name} {fmt(part['ratio'])}" for name, part in d["temporal"].items()))
    if d["worst_features"]:
        lines.append("worst features: " + ", ".join(f"{w['feature']}@{w['scale']} {fmt(w['ratio'])}"
                                                    for w in d["worst_features"][:5]))
    for note in d["notes"][:8]:
        lines.append(f"note: {note}")
    if len(d["notes"]) > 8:
        lines.append(f"note: ... {len(d['notes']) - 8} more in the JSON")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------------
# plots


def png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80, metadata={"Software": None})
    import matplotlib.pyplot as plt

    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 8, "axes.titlesize": 8, "svg.hashsalt": "tracegen"})
    return plt


def _ecdf(ax, x: np.ndarray, colour: str, label: str) -> None:
    x = np.sort(x[np.isfinite(x)])
    if x.size:
        ax.step(x, np.arange(1, x.size + 1) / x.size, where="post", color=colour, lw=1.2, label=label)


def cdf_figure(result: CoverageResult, key: str) -> str | None:
    """CDF overlays of every compared feature at one scale."""
    data = result.scales.get(key)
    part = result.data["scales"].get(key)
    if data is None or part is None or not part["features"]:
        return None
    plt = pyplot()
    names = part["features"]
    cols = 4
    rows = -(-len(names) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(11, 2.2 * rows), squeeze=False)
    for ax in axes.ravel()[len(names):]:
        ax.axis("off")
    for ax, name in zip(axes.ravel(), names):
        j = data.features.index(name)
        _ecdf(ax, data.real[:, j], REAL_COLOUR, "real")
        _ecdf(ax, data.synthetic[:, j], SYNTH_COLOUR, "synthetic")
        ks = part["ks"].get(name, {})
        ax.set_title(f"{name}\nKS ratio {fmt(ks.get('ratio'))} ({ks.get('reading', '-')})")
        ax.set_ylim(0, 1)
    axes[0, 0].legend(loc="lower right", frameon=False)
    fig.tight_layout()
    return png(fig)


def acf_figure(result: CoverageResult) -> str | None:
    if not result.acf:
        return None
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(5.5, 3))
    ax.plot(result.acf["lags_s"], result.acf["real"], color=REAL_COLOUR, label="real")
    ax.plot(result.acf["lags_s"], result.acf["synthetic"], color=SYNTH_COLOUR, label="synthetic")
    ax.axhline(0.0, color="#999999", lw=0.6)
    ax.set_xlabel("lag (s)")
    ax.set_ylabel("autocorrelation of log bandwidth")
    ax.legend(frameon=False)
    fig.tight_layout()
    return png(fig)


def dwell_figure(result: CoverageResult) -> str | None:
    if not result.runs:
        return None
    plt = pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(8, 3))
    for ax, side in zip(axes, ("above", "below")):
        for who, colour in (("real", REAL_COLOUR), ("synthetic", SYNTH_COLOUR)):
            x = np.sort(result.runs[f"{who}_{side}"])
            if x.size:
                ax.step(x, 1.0 - np.arange(x.size) / x.size, where="post", color=colour, label=who)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel(f"run {side} the real median level (s)")
        ax.set_ylabel("share of runs at least this long")
    axes[0].legend(frameon=False)
    fig.tight_layout()
    return png(fig)


def projection_figure(result: CoverageResult, key: str) -> str | None:
    """Both sets on the first two principal axes of the standardised real windows, holes marked."""
    data = result.scales.get(key)
    if data is None or data.real_rows is None or not data.multivariate:
        return None
    cols = [data.features.index(f) for f in data.multivariate]
    real = data.real[np.ix_(data.real_rows, cols)]
    fake = data.synthetic[np.ix_(data.fake_rows, cols)]
    if len(real) < 3 or real.shape[1] < 2:
        return None
    center = np.median(real, axis=0)
    scale = np.where(np.std(real, axis=0) > 0, np.std(real, axis=0), 1.0)
    zr, zf = (real - center) / scale, (fake - center) / scale
    _, _, vt = np.linalg.svd(zr - zr.mean(axis=0), full_matrices=False)
    basis = vt[:2].T * np.sign(vt[:2, :1].T + 1e-300)  # a fixed sign, so the picture does not flip
    pr, pf = zr @ basis, zf @ basis
    rng = np.random.default_rng(0)

    def some(n: int) -> np.ndarray:
        return np.sort(rng.permutation(n)[:MAX_DRAWN_POINTS])

    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 4.5))
    ir, i_f = some(len(pr)), some(len(pf))
    ax.scatter(pr[ir, 0], pr[ir, 1], s=4, color=REAL_COLOUR, alpha=0.5, label="real windows", lw=0)
    ax.scatter(pf[i_f, 0], pf[i_f, 1], s=4, color=SYNTH_COLOUR, alpha=0.5, label="synthetic windows", lw=0)
    if data.real_hole is not None and data.real_hole.any():
        holes = np.flatnonzero(data.real_hole)[:MAX_DRAWN_POINTS]
        ax.scatter(pr[holes, 0], pr[holes, 1], s=14, marker="x", color=HOLE_COLOUR, lw=0.8,
                   label="holes (no synthetic window near)")
    ax.set_xlabel("first principal axis of the real windows")
    ax.set_ylabel("second principal axis")
    ax.legend(frameon=False, markerscale=2, loc="best")
    fig.tight_layout()
    return png(fig)


# --------------------------------------------------------------------------------------------------
# page

PAGE_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2rem auto;max-width:72rem;color:#222;
line-height:1.4;padding:0 1rem}
h1{font-size:1.4rem}h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ccc}h3{font-size:1rem}
table{border-collapse:collapse;margin:.5rem 0}td,th{border:1px solid #ddd;padding:.2rem .5rem;text-align:right}
th{background:#f3f3f3}td.name,th.name{text-align:left}
.ok{background:#e3f1e6}.wide{background:#fbeed5}.far{background:#f6d6d6}
.headline{font-size:1.2rem;padding:.6rem 1rem;border-left:6px solid #888;background:#f7f7f7}
img{max-width:100%;height:auto;display:block;margin:.5rem 0}.note{color:#555;font-size:.9rem}
"""


def page_end(parts: list[str], notes: list[str]) -> str:
    """The page from its parts, closed by the list of notes (if any)."""
    if notes:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{html.escape(n)}</li>" for n in notes) + "</ul>")
    return "\n".join(parts + ["</body></html>"]) + "\n"


def _spread(spread: Any) -> str:
    if not spread:
        return "-"
    (g0, g1), (f0, f1) = spread["ratio"], spread["floor"]
    return f"{fmt(g0)}-{fmt(g1)} (real halves {fmt(f0)}-{fmt(f1)})"


def _cell(ratio: Any) -> str:
    r = reading(ratio if isinstance(ratio, (int, float)) else None) if ratio is not None else "no noise floor"
    cls = READING_CLASS.get(r, "")
    return f'<td class="{cls}" title="{html.escape(r)}">{fmt(ratio)}</td>'


def _img(src: str | None, alt: str) -> str:
    return f'<img src="{src}" alt="{html.escape(alt)}">' if src else f'<p class="note">({html.escape(alt)}: not enough data)</p>'


def render_html(result: CoverageResult) -> str:
    """The whole page as one string (module docstring)."""
    d = result.data
    e = html.escape
    labels = d.get("labels") or {}
    g = d["gap_ratio"]
    keys = [k for k in d["scales"]]
    window_keys = [k for k in keys if k != TRACE_SCALE]
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           f"<title>tracegen coverage: {e(labels.get('synthetic', 'synthetic'))}</title>",
           f"<style>{PAGE_STYLE}</style></head><body>",
           f"<h1>How far {e(labels.get('synthetic', 'the synthetic set'))} is from "
           f"{e(labels.get('real', 'the field'))}</h1>",
           f"<p>{d['synthetic']['traces']} synthetic traces ({d['synthetic']['hours']:.2f} h) against "
           f"{d['real']['traces']} real traces ({d['real']['hours']:.2f} h, {d['real']['groups']} groups), on a common "
           f"step of {d['step_s']:g} s. tracegen {e(d['tracegen_version'])}.</p>",
           f'<p class="headline">Gap ratio (worst window scale): <b>{fmt(g["overall"])}</b>: '
           f"{e(g['reading'])}.</p>",
           "<p>A gap ratio divides a distance between the synthetic set and one half of the real set by the same "
           "distance between the two halves of the real set (split by session, route or device so no session "
           f"sits on both sides, {d['noise_floor']['splits']} seeded splits, medians). About 1 means the synthetic "
           f"set is as close to the field as the field is to itself; up to {WITHIN_NOISE:g} reads "
           f"<span class='ok'>within noise</span>, up to {FAR:g} <span class='wide'>wider than noise</span>, "
           "beyond that <span class='far'>far</span>.</p>"]

    out.append("<h2>Gap ratios</h2><table><tr><th class='name'>metric</th>"
               + "".join(f"<th>{e(k)}{' s' if k != TRACE_SCALE else ''}</th>" for k in keys) + "</tr>")
    out.append("<tr><td class='name'>whole feature vector (energy distance)</td>"
               + "".join(_cell(d["scales"][k]["energy"]["ratio"]) for k in keys) + "</tr>")
    out.append("<tr><td class='name'>&nbsp;&nbsp;split to split (10th-90th percentile)</td>"
               + "".join(f"<td>{_spread(d['scales'][k]['energy'].get('spread'))}</td>" for k in keys) + "</tr>")
    out.append("<tr><td class='name'>real windows not covered (1 - coverage)</td>"
               + "".join(_cell((d["scales"][k].get("prdc") or {}).get("uncovered_ratio")) for k in keys) + "</tr>")
    features = list(dict.fromkeys(f for k in keys for f in d["scales"][k]["ks"]))  # in order of appearance
    for f in features:
        out.append(f"<tr><td class='name'>{e(f)} (KS)</td>"
                   + "".join(_cell(d["scales"][k]["ks"].get(f, {}).get("ratio")) if f in d["scales"][k]["ks"]
                             else "<td>-</td>" for k in keys) + "</tr>")
    out.append("</table>")
    out.append("<h3>Over time</h3><table><tr><th class='name'>metric</th><th>real</th><th>synthetic</th>"
               "<th>distance</th><th>noise floor</th><th>ratio</th></tr>")
    for name, part in d["temporal"].items():
        real_v = part.get("real", part.get("mean_above_s", {}).get("real") if name == "dwell" else None)
        syn_v = part.get("synthetic", part.get("mean_above_s", {}).get("synthetic") if name == "dwell" else None)
        out.append(f"<tr><td class='name'>{e(name)}</td><td>{fmt(real_v)}</td><td>{fmt(syn_v)}</td>"
                   f"<td>{fmt(part['distance'], 3)}</td><td>{fmt(part['noise_floor'], 3)}</td>{_cell(part['ratio'])}</tr>")
    out.append("</table>")
    worst = d["worst_features"]
    if worst:
        out.append("<p>Worst features: " + ", ".join(f"{e(w['feature'])} at {e(w['scale'])} "
                                                      f"({fmt(w['ratio'])}, {e(w['reading'])})" for w in worst[:5])
                   + ".</p>")

    out.append("<h2>Feature distributions</h2>")
    for k in keys:
        title = "per trace" if k == TRACE_SCALE else f"{k} s windows"
        out.append(f"<h3>{e(title)}</h3>" + _img(cdf_figure(result, k), f"CDF overlays, {title}"))
    out.append("<h2>Over time</h2>" + _img(acf_figure(result), "autocorrelation overlay")
               + _img(dwell_figure(result), "dwell-time overlay"))

    out.append("<h2>Where the synthetic set misses</h2>")
    for k in window_keys:
        part = d["scales"][k]
        holes, unreal = part.get("holes"), part.get("unrealistic")
        out.append(f"<h3>{e(k)} s windows</h3>" + _img(projection_figure(result, k), f"projection, {k} s windows"))
        if holes is None:
            continue
        pr = part["prdc"]
        out.append(f"<p>{holes['count']:,} of {part['windows']['real']:,} real windows "
                   f"({holes['share']:.1%}) have no synthetic window near them (holes); {unreal['count']:,} of "
                   f"{part['windows']['synthetic']:,} synthetic windows ({unreal['share']:.1%}) are far from every "
                   f"real one. Precision {fmt(pr['precision'])}, recall {fmt(pr['recall'])}, density "
                   f"{fmt(pr['density'])}, coverage {fmt(pr['coverage'])} (k = {pr['k']}).</p>")
        if holes["traces"]:
            out.append("<table><tr><th class='name'>real trace with holes</th><th class='name'>source</th>"
                       "<th>windows</th><th>share</th><th class='name'>tags</th><th class='name'>first starts (s)</th></tr>")
            for t in holes["traces"][:10]:
                tags = ", ".join(f"{e(a)}={e(str(b))}" for a, b in sorted(t["tags"].items()))
                starts = ", ".join(f"{x:g}" for x in t["first_starts_s"][:5])
                out.append(f"<tr><td class='name'>{e(t['id'])}</td><td class='name'>{e(t['source'])}</td>"
                           f"<td>{t['windows']:,}</td><td>{t['share']:.0%}</td><td class='name'>{tags}</td>"
                           f"<td class='name'>{starts}</td></tr>")
            out.append("</table>")
        rows = [(tag, value, c) for tag, vals in holes["by_tag"].items() for value, c in vals.items()
                if c["share"] is not None]
        if rows:
            out.append("<table><tr><th class='name'>tag</th><th class='name'>value</th><th>real windows</th>"
                       "<th>holes</th><th>share</th></tr>")
            for tag, value, c in sorted(rows, key=lambda r: -(r[2]["share"] or 0))[:15]:
                out.append(f"<tr><td class='name'>{e(tag)}</td><td class='name'>{e(value)}</td>"
                           f"<td>{c['windows']:,}</td><td>{c['missed']:,}</td><td>{c['share']:.0%}</td></tr>")
            out.append("</table>")
    return page_end(out, d["notes"])


__all__ = ["summary_text", "render_html", "cdf_figure", "acf_figure", "dwell_figure", "projection_figure"]
