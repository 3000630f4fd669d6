"""Coverage report speed and memory: 10^5 real windows against 10^5 synthetic windows, HTML included.

Usage: python benchmarks/coverage_speed.py [--quick] [--model models/quillon-lte.json]

Both sets are synthesised from a shipped model at 1 s steps (the real side from one seed, the synthetic
side from another, so the gap ratio should read "within noise"): 10^5 windows of 10 s each per set,
i.e. 278 h (--quick: 10^4 windows). The run is ``tracegen.coverage`` at 10 s, 60 s and 300 s plus
per-trace rows, 10 group splits, then JSON and HTML. Reported: seconds for features + distances and for
the HTML, the share spent in the k-NN metrics (``distances.prdc``), peak RSS (in a subprocess of its
own), and as a reference measured in the same run a bare ``scipy.spatial.cKDTree`` 5-NN query of the
10 s windows of both sets (the least any k-NN coverage metric must do). Target: the whole report in
under 2 minutes on the 2-core machine. The last line is a JSON object.
"""

from __future__ import annotations

import argparse
import json
import resource
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def measure(windows: int = 100_000, model_path: str | Path = ROOT / "models" / "quillon-lte.json") -> dict:
    """The whole report for about ``windows`` 10 s windows per set; the dict printed on the last line."""
    import tracegen
    from tracegen.compare import distances
    from tracegen.compare.features import prepare, window_features

    duration_s = 3600.0
    count = int(np.ceil(windows * 10.0 / duration_s))
    model = tracegen.load_model(str(model_path))
    start = time.perf_counter()
    real = tracegen.synth(model, count, duration_s, 1.0, seed=1, name="field")
    synthetic = tracegen.synth(model, count, duration_s, 1.0, seed=2, name="candidate")
    synth_s = time.perf_counter() - start

    knn_s = [0.0]
    original = distances.prdc

    def timed(*a, **kw):
        t0 = time.perf_counter()
        try:
            return original(*a, **kw)
        finally:
            knn_s[0] += time.perf_counter() - t0

    distances.prdc = timed
    try:
        start = time.perf_counter()
        result = tracegen.coverage(real, synthetic, progress=False)
        compare_s = time.perf_counter() - start
        start = time.perf_counter()
        page = result.to_html()
        text = result.to_json()
        html_s = time.perf_counter() - start
    finally:
        distances.prdc = original

    from scipy.spatial import cKDTree

    wr = window_features(prepare(real, 1.0), 10.0).values
    ws = window_features(prepare(synthetic, 1.0), 10.0).values
    center, scale = distances.robust_scale(wr)
    zr = distances.standardise(wr, center, scale)
    zs = distances.standardise(ws, center, scale)
    cols = np.all(np.isfinite(zr), axis=0) & np.all(np.isfinite(zs), axis=0)
    start = time.perf_counter()
    tree = cKDTree(zr[:, cols])
    tree.query(zr[:, cols], k=6)
    tree.query(zs[:, cols], k=5)
    ref_s = time.perf_counter() - start

    total = compare_s + html_s
    return {"windows_per_set": int(result.data["scales"]["10"]["windows"]["real"]), "traces_per_set": count,
            "synth_s": synth_s, "compare_s": compare_s, "html_s": html_s, "total_s": total,
            "knn_s": knn_s[0], "knn_share": knn_s[0] / compare_s, "kdtree_reference_s": ref_s,
            "knn_vs_kdtree_reference": knn_s[0] / ref_s,
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "html_bytes": len(page), "json_bytes": len(text), "gap_ratio": result.gap_ratio,
            "target_total_s": 120.0, "quick": windows < 100_000}


def print_table(out: dict) -> None:
    print(f"{out['windows_per_set']:,} windows of 10 s per set ({out['traces_per_set']} traces of 1 h each), "
          f"synthesised in {out['synth_s']:.1f} s")
    print(f"coverage (features, distances, 10 splits)  {out['compare_s']:7.1f} s, of which k-NN metrics "
          f"{out['knn_s']:.1f} s ({out['knn_share']:.0%})")
    print(f"HTML and JSON                              {out['html_s']:7.1f} s ({out['html_bytes'] / 1e6:.1f} MB page)")
    print(f"whole report                               {out['total_s']:7.1f} s (target < 120 s)")
    print(f"reference: bare cKDTree 5-NN of the 10 s windows {out['kdtree_reference_s']:.1f} s; k-NN metrics / "
          f"reference {out['knn_vs_kdtree_reference']:.1f}x")
    print(f"peak RSS {out['peak_rss_mib']:.0f} MiB; gap ratio of two samples of one model {out['gap_ratio']:.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="10^4 windows per set instead of 10^5")
    ap.add_argument("--model", default=str(ROOT / "models" / "quillon-lte.json"))
    args = ap.parse_args()
    out = measure(10_000 if args.quick else 100_000, args.model)
    print_table(out)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
