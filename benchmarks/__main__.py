"""Every benchmark in one run: ratios against references measured in the same run, one table, one JSON file.

Usage (from the checkout): python -m benchmarks [--quick] [--json FILE] [--only PART ...]

Each part runs in a fresh child process (``--part NAME``), so its peak RSS (``ru_maxrss`` of the part,
and of the largest process it started) is its own. The JSON file (default
benchmarks/results/latest.json) holds the machine, the table's rows and every part's full result.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_JSON = ROOT / "benchmarks" / "results" / "latest.json"
QUICK_FIT_HOURS, FULL_FIT_HOURS = 3.0, 100.0
QUICK_SCALING_TRACES, FULL_SCALING_TRACES = 24, 48


# --- the parts, each run in its own child process ------------------------------------------------------
def part_ingest(quick: bool) -> dict:
    from benchmarks import ingest_speed

    return ingest_speed.measure()


def part_synthesis(quick: bool) -> dict:
    from benchmarks import synth_speed

    return synth_speed.json_safe(synth_speed.measure(quick))


def part_fit(quick: bool) -> dict:
    from benchmarks import fit_speed

    return fit_speed.measure(hours=QUICK_FIT_HOURS if quick else FULL_FIT_HOURS)


def part_coverage_1e4(quick: bool) -> dict:
    from benchmarks import coverage_speed

    return coverage_speed.measure(10_000)


def part_coverage_1e5(quick: bool) -> dict:
    from benchmarks import coverage_speed

    return coverage_speed.measure(100_000)


def part_scaling(quick: bool) -> dict:
    from benchmarks import scaling

    return scaling.measure(QUICK_SCALING_TRACES if quick else FULL_SCALING_TRACES)


def part_streaming(quick: bool) -> dict:
    from benchmarks import streaming

    return streaming.measure(quick)


PARTS: dict[str, Callable[[bool], dict]] = {
    "ingest": part_ingest, "synthesis": part_synthesis, "fit": part_fit, "coverage-1e4": part_coverage_1e4,
    "coverage-1e5": part_coverage_1e5, "scaling": part_scaling, "streaming": part_streaming,
}
SKIPPED_WHEN_QUICK = {"coverage-1e5": "10^5 windows per set: skipped with --quick"}


def run_part_here(name: str, quick: bool) -> None:
    """Child side: measure one part, print its result and this process's peak RSS as one JSON line."""
    start = time.perf_counter()
    result = PARTS[name](quick)
    print(json.dumps({"result": result, "seconds": time.perf_counter() - start,
                      "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                      "children_peak_rss_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024},
                     default=str))


def run_part(name: str, quick: bool) -> dict:
    """Parent side: one part in a fresh process; its JSON, or the error it ended on."""
    start = time.perf_counter()
    cmd = [sys.executable, "-m", "benchmarks", "--part", name] + (["--quick"] if quick else [])
    done = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, check=False)
    if done.returncode:
        lines = done.stderr.strip().splitlines()
        return {"error": lines[-1] if lines else f"exit code {done.returncode}",
                "seconds": time.perf_counter() - start}
    return json.loads(done.stdout.strip().splitlines()[-1])


# --- the machine -------------------------------------------------------------------------------------
def _first(path: str, key: str) -> str | None:
    try:
        with open(path) as f:
            for line in f:
                if line.startswith(key):
                    return line.split(":" if ":" in line else "=", 1)[1].strip().strip('"')
    except OSError:
        pass
    return None


def machine() -> dict:
    """CPU, cores, RAM, OS, Python, numpy, tracegen commit, and the load when the run started."""
    import numpy

    mem_kib = _first("/proc/meminfo", "MemTotal")
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True,
                                text=True, check=False).stdout.strip() or None
        dirty = bool(subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=ROOT,
                                    capture_output=True, text=True, check=False).stdout.strip())
    except OSError:
        commit, dirty = None, None
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count()
    return {
        "cpu": _first("/proc/cpuinfo", "model name") or platform.processor() or platform.machine(),
        "cores": os.cpu_count(), "usable_cores": usable,
        "ram_gib": round(int(mem_kib.split()[0]) / 2**20, 1) if mem_kib else None,
        "os": _first("/etc/os-release", "PRETTY_NAME") or platform.system(), "kernel": platform.release(),
        "python": platform.python_version(), "numpy": numpy.__version__,
        "tracegen_commit": commit, "uncommitted_changes": dirty,
        "load_average_at_start": [round(v, 2) for v in os.getloadavg()],
    }


def describe(m: dict) -> str:
    return (f"{m['cpu']}, {m['cores']} cores ({m['usable_cores']} usable), {m['ram_gib']} GiB RAM, {m['os']}, "
            f"Python {m['python']}, numpy {m['numpy']}, tracegen {m['tracegen_commit']}"
            f"{' + uncommitted changes' if m['uncommitted_changes'] else ''}, "
            f"load {m['load_average_at_start'][0]} at start")


# --- the table -----------------------------------------------------------------------------------------
def _row(part: str, figure: str, value: str, reference: str = "", ratio: float | None = None, target: str = "",
         met: bool | None = None) -> dict:
    return {"part": part, "figure": figure, "value": value, "reference": reference,
            "ratio": None if ratio is None or (isinstance(ratio, float) and math.isnan(ratio)) else ratio,
            "target": target, "met": met}


def _rate(v: float | None) -> str:
    if v is None or math.isnan(v):
        return "n/a"
    for scale, unit in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if v >= scale:
            return f"{v / scale:.1f} {unit}/s"
    return f"{v:.1f} /s"


def rows_ingest(r: dict) -> list[dict]:
    return [_row("ingest", f"CSV read time / pandas.read_csv ({r['files']} files, {r['rows']:,} rows)",
                 f"{r['read_s']:.2f} s", f"{r['pandas_read_csv_s']:.3f} s", r["read_ratio_vs_pandas"])]


def rows_synthesis(r: dict) -> list[dict]:
    h = r["model_step_s"]
    out = [
        _row("synthesis", "sampler at 10 ms / numpy normal draws (per s)", _rate(r["sampler_samples_per_s"]["0.01"]),
             _rate(r["rng_draws_per_s"]), r["synth_vs_rng"], ">= 0.25", r["synth_vs_rng"] >= 0.25),
        _row("synthesis", f"sampler at the model step ({h:g} s) / hmmlearn sample",
             _rate(r["sampler_samples_per_s"][f"{h:g}"]), _rate(r["hmmlearn_samples_per_s"]), r["synth_vs_hmmlearn"],
             ">= 100", r["synth_vs_hmmlearn"] >= 100),
        _row("synthesis", "+ cross traffic and queue, 10 ms, slowest policy / numpy",
             _rate(min(r["core_full_samples_per_s"].values())), _rate(r["rng_draws_per_s"]), r["synth_full_vs_rng"],
             ">= 0.1", r["synth_full_vs_rng"] >= 0.1),
    ]
    stream = r.get("stream_peak_rss_mib")
    target = "< 1024 MiB" if r["stream_samples"] >= 10**9 else "(< 1 GiB at 10^9, full)"
    power = round(math.log10(max(r["stream_samples"], 1)))
    out.append(_row("synthesis", f"peak RSS, 10^{power} samples streamed to Parquet",
                    "failed" if stream is None else f"{stream:.0f} MiB", "", None, target,
                    (stream < 1024) if stream is not None and r["stream_samples"] >= 10**9 else None))
    return out


def rows_fit(r: dict) -> list[dict]:
    c = r["state_counts"]
    return [_row("fit", f"tracegen.fit / hmmlearn fit time ({r['hours']:g} h, {c[0]}..{c[-1]} states, "
                        f"{r['restarts']} restarts)",
                 f"{r['tracegen_fit_s']:.1f} s", f"{r['hmmlearn_fit_s']:.1f} s", r["ratio"], "<= 2", r["ratio"] <= 2)]


def rows_coverage(r: dict) -> list[dict]:
    n = f"10^{round(math.log10(r['windows_per_set']))}"
    return [
        _row("coverage", f"whole report (HTML, JSON), {n} windows per set",
             f"{r['total_s']:.1f} s", "", None, "< 120 s", r["total_s"] < r["target_total_s"]),
        _row("coverage", f"k-NN metrics / bare cKDTree 5-NN time, {n} windows", f"{r['knn_s']:.1f} s",
             f"{r['kdtree_reference_s']:.2f} s", r["knn_vs_kdtree_reference"]),
    ]


def rows_scaling(r: dict) -> list[dict]:
    w = r["workers"]
    return [
        _row("scaling", f"synth_files traces/s, {w} workers / 1 ({r['traces']} x {r['duration_s'] / 3600:g} h at "
                        f"{r['step_s'] * 1000:g} ms)", f"{r['traces_per_s'][str(w)]:.2f} tr/s",
             f"{r['traces_per_s']['1']:.2f} tr/s",
             r["speedup"], f">= {r['target_speedup']}", r["target_met"]),
        _row("scaling", f"same bytes, 1 vs {w} workers ({r['files_per_run']} files x {r['runs_compared']} runs)",
             "yes" if r["identical_bytes"] else "NO", "", None, "identical",
             r["identical_bytes"]),
    ]


def rows_streaming(r: dict) -> list[dict]:
    small, large = (str(c) for c in (r["counts"][0], r["counts"][-1]))
    labels = {"write": "synth_files to Parquet", "catalog": "catalog add, then read back"}
    out = []
    for step, by in r["steps"].items():
        ratio = r["ratio_100x_vs_1x"][step]
        out.append(_row("streaming", f"peak RSS, {int(large):,} / {int(small):,} traces: {labels[step]}",
                        f"{by[large]['peak_rss_mib']:.0f} MiB", f"{by[small]['peak_rss_mib']:.0f} MiB", ratio,
                        f"< {r['target_ratio']}", not math.isnan(ratio) and ratio < r["target_ratio"]))
    return out


ROWS = {"ingest": rows_ingest, "synthesis": rows_synthesis, "fit": rows_fit, "coverage-1e4": rows_coverage,
        "coverage-1e5": rows_coverage, "scaling": rows_scaling, "streaming": rows_streaming}


def part_rows(name: str, outcome: dict) -> list[dict]:
    """The table rows of one part, each carrying the part's peak RSS (itself or its largest child)."""
    if "skipped" in outcome:
        return [_row(name.split("-")[0], outcome["skipped"], "-")]
    if "error" in outcome:
        return [_row(name, f"failed: {outcome['error']}", "-", met=False)]
    rows = ROWS[name](outcome["result"])
    rss = max(outcome["peak_rss_mib"], outcome["children_peak_rss_mib"])
    for row in rows:
        row["peak_rss_mib"] = rss
    return rows


def coverage_growth(parts: dict) -> list[dict]:
    """Full runs: how the whole report's time grows from 10^4 to 10^5 windows (10 would be linear)."""
    a, b = parts.get("coverage-1e4", {}), parts.get("coverage-1e5", {})
    if "result" not in a or "result" not in b:
        return []
    ratio = b["result"]["total_s"] / a["result"]["total_s"]
    return [_row("coverage", "whole report time, 10^5 / 10^4 windows (10: linear)",
                 f"{b['result']['total_s']:.1f} s", f"{a['result']['total_s']:.1f} s", ratio)]


def print_table(rows: list[dict]) -> None:
    head = ("part", "figure", "value", "reference", "ratio", "target", "met", "peak RSS")
    cells = [[r["part"], r["figure"], r["value"], r["reference"],
              "" if r["ratio"] is None else f"{r['ratio']:.3g}x", r["target"],
              {True: "yes", False: "NO", None: ""}[r["met"]],
              f"{r['peak_rss_mib']:.0f} MiB" if r.get("peak_rss_mib") else ""] for r in rows]
    widths = [max(len(str(c[i])) for c in [head, *cells]) for i in range(len(head))]
    for line in [head, ["-" * w for w in widths], *cells]:
        print("  ".join(str(c).ljust(w) if i < 2 else str(c).rjust(w) for i, (c, w) in enumerate(zip(line, widths))))


def main() -> None:
    ap = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help=f"smaller workloads: {QUICK_FIT_HOURS:g} h fit, coverage at 10^4 windows only, "
                         f"{QUICK_SCALING_TRACES} scaling traces, 10..1000 short streaming traces (about 3 minutes)")
    ap.add_argument("--json", type=Path, default=DEFAULT_JSON,
                    help=f"where to write the results (default {DEFAULT_JSON.relative_to(ROOT)})")
    ap.add_argument("--only", nargs="+", choices=list(PARTS), metavar="PART",
                    help=f"run only these parts ({', '.join(PARTS)})")
    ap.add_argument("--part", choices=list(PARTS), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.part:
        run_part_here(args.part, args.quick)
        return

    started = time.perf_counter()
    info = machine()
    print(f"machine: {describe(info)}", flush=True)
    names = args.only or list(PARTS)
    parts: dict[str, Any] = {}
    for i, name in enumerate(names, 1):
        if args.quick and name in SKIPPED_WHEN_QUICK:
            parts[name] = {"skipped": SKIPPED_WHEN_QUICK[name]}
            print(f"[{i}/{len(names)}] {name}: {SKIPPED_WHEN_QUICK[name]}", file=sys.stderr)
            continue
        print(f"[{i}/{len(names)}] {name} ...", end=" ", flush=True, file=sys.stderr)
        parts[name] = run_part(name, args.quick)
        print(f"{parts[name]['seconds']:.0f} s" + (f" (failed: {parts[name]['error']})" if "error" in parts[name]
                                                  else ""), flush=True, file=sys.stderr)
    rows = [row for name in names for row in part_rows(name, parts[name])]
    rows += coverage_growth(parts)
    total_s = time.perf_counter() - started
    print(f"{'quick' if args.quick else 'full'} run, {total_s:.0f} s; every ratio divides two figures of this run")
    print_table(rows)

    out = {"format": "tracegen-benchmarks", "version": 1, "quick": args.quick, "seconds": total_s,
           "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "machine": info, "rows": rows, "parts": parts}
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps(out, indent=1, default=str) + "\n")
    print(f"results: {args.json}")
    sys.exit(1 if any("error" in p for p in parts.values()) else 0)


if __name__ == "__main__":
    main()
