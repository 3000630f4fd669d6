"""Streaming: peak memory stays flat as the corpus grows, writing traces and reading them back.

Usage: python benchmarks/streaming.py [--quick] [--model models/quillon-lte.json]

For 1x, 10x and 100x traces (--quick: 10, 100, 1000 traces of 10 min at 100 ms; else 20, 200, 2000
traces of 1 h at 100 ms), each step in a fresh child process so its peak RSS (``ru_maxrss``) is its own:

- write: ``synth_files`` writes the traces to Parquet, one file each (``workers=1``, all in the child);
- catalog: a new catalog takes those files through ``Catalog.add`` from a generator (one file read at
  a time), then ``Catalog.traces()`` yields them one at a time and the mean bandwidth of each is kept.

The reference is the same step at 1x: ``ratio`` = peak RSS at 100x / peak RSS at 1x (target < 1.5, i.e.
flat). The catalog child also records its peak after ``add`` alone, to tell which half grew. The last
line is a JSON object.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TARGET_RATIO = 1.5
QUICK = {"counts": (10, 100, 1000), "duration_s": 600.0, "step_s": 0.1}
FULL = {"counts": (20, 200, 2000), "duration_s": 3600.0, "step_s": 0.1}


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux


def write_child(model_path: str, count: int, duration_s: float, step_s: float, out_dir: str) -> dict:
    """Child: ``count`` traces to Parquet files in ``out_dir``."""
    from tracegen.synth.output import synth_files

    start = time.perf_counter()
    synth_files(model_path, count, duration_s, step_s, 1, out_dir, fmt="parquet", name="stream", workers=1)
    return {"seconds": time.perf_counter() - start, "peak_rss_mib": peak_rss_mib()}


def catalog_child(folder: str, catalog_root: str) -> dict:
    """Child: the Parquet files of ``folder`` into a new catalog, then every trace read back."""
    import numpy as np

    from tracegen.catalog import Catalog
    from tracegen.compare.inputs import read_trace_file

    files = sorted(Path(folder).glob("*.parquet"))
    cat = Catalog.open(catalog_root, create=True)
    start = time.perf_counter()
    cat.add((tr for f in files for tr in read_trace_file(f)), length=len(files))
    add_s, add_peak = time.perf_counter() - start, peak_rss_mib()
    start = time.perf_counter()
    means = [float(np.nanmean(tr["bandwidth_bps"])) for tr in cat.traces()]
    read_s = time.perf_counter() - start
    if len(means) != len(files):
        raise RuntimeError(f"read back {len(means)} traces, wrote {len(files)}")
    return {"seconds": add_s + read_s, "add_seconds": add_s, "read_seconds": read_s,
            "add_peak_rss_mib": add_peak, "peak_rss_mib": peak_rss_mib()}


def run_child(*args: str) -> dict:
    """This script in a fresh process with ``--child ARGS``; its JSON line (or the error it ended on)."""
    done = subprocess.run([sys.executable, __file__, "--child", *args], capture_output=True, text=True, check=False)
    if done.returncode:
        lines = done.stderr.strip().splitlines()
        return {"error": lines[-1] if lines else f"exit code {done.returncode}", "peak_rss_mib": float("nan")}
    return json.loads(done.stdout.strip().splitlines()[-1])


def measure(quick: bool = False, model_path: str | Path = ROOT / "models" / "quillon-lte.json") -> dict:
    """Peak RSS of each step at each size, and the 100x / 1x ratios."""
    plan = QUICK if quick else FULL
    counts = plan["counts"]
    steps: dict[str, dict[str, dict]] = {"write": {}, "catalog": {}}
    with tempfile.TemporaryDirectory(prefix="tracegen-streaming-") as scratch:
        for count in counts:
            folder, root = Path(scratch) / f"files-{count}", Path(scratch) / f"catalog-{count}"
            steps["write"][str(count)] = run_child("write", str(model_path), str(count), str(plan["duration_s"]),
                                                   str(plan["step_s"]), str(folder))
            steps["catalog"][str(count)] = run_child("catalog", str(folder), str(root))
    small, large = str(counts[0]), str(counts[-1])
    ratios = {name: by[large]["peak_rss_mib"] / by[small]["peak_rss_mib"] for name, by in steps.items()}
    return {"model": Path(model_path).name, "counts": list(counts), "duration_s": plan["duration_s"],
            "step_s": plan["step_s"], "quick": quick, "steps": steps, "ratio_100x_vs_1x": ratios,
            "target_ratio": TARGET_RATIO,
            "target_met": all(v < TARGET_RATIO for v in ratios.values()),  # NaN (a failed child) is not met
            "errors": [f"{name} x{c}: {r['error']}" for name, by in steps.items() for c, r in by.items()
                       if "error" in r]}


def print_table(r: dict) -> None:
    print(f"traces of {r['duration_s'] / 60:g} min at {r['step_s'] * 1000:g} ms from {r['model']}; "
          f"peak RSS (MiB) of a fresh process per cell")
    print(f"  {'step':<10}" + "".join(f"{c:>12,d} tr" for c in r["counts"]) + f"{'100x / 1x':>12}{'growth':>12}")
    for name, by in r["steps"].items():
        cells = "".join(f"{by[str(c)]['peak_rss_mib']:12.0f} MiB" for c in r["counts"])
        growth = by[str(r["counts"][-1])]["peak_rss_mib"] - by[str(r["counts"][0])]["peak_rss_mib"]
        print(f"  {name:<10}{cells}{r['ratio_100x_vs_1x'][name]:11.2f}x{growth:+8.0f} MiB")
    big = r["steps"]["catalog"][str(r["counts"][-1])]
    if "add_peak_rss_mib" in big:
        print(f"  catalog at {r['counts'][-1]:,} traces: add {big['add_seconds']:.1f} s "
              f"(peak {big['add_peak_rss_mib']:.0f} MiB), read back {big['read_seconds']:.1f} s")
    print(f"  target 100x / 1x < {r['target_ratio']}: {'met' if r['target_met'] else 'NOT met'}")
    for e in r["errors"]:
        print(f"  error: {e}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="10, 100, 1000 traces of 10 min (under a minute)")
    ap.add_argument("--model", default=str(ROOT / "models" / "quillon-lte.json"))
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        kind, *rest = args.child
        if kind == "write":
            out = write_child(rest[0], int(rest[1]), float(rest[2]), float(rest[3]), rest[4])
        else:
            out = catalog_child(*rest)
        print(json.dumps(out))
        return
    result = measure(args.quick, args.model)
    print_table(result)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
