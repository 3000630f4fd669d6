"""Synthesis scaling from 1 to 2 local workers: traces/s of ``synth_files``, and the same bytes either way.

Usage: python benchmarks/scaling.py [--quick] [--count 48] [--workers 2] [--model models/quillon-lte.json]

The workload is heavy enough that starting the worker processes is a small part of it: 1 h traces at
10 ms of a shipped model with cross traffic (``CrossTraffic(flow_rate_per_s=0.5)``) and a 150 ms
bottleneck, written to Parquet in a temporary folder by ``tracegen.synth.output.synth_files`` (the
workers synthesise and write; only manifest rows come back). Each setting runs twice, alternating, and
keeps its best time. The reference is the same run with ``workers=1`` (in this process), so the figure
is ``speedup`` = traces/s with N workers / traces/s with 1 (target on a 2-core machine: >= 1.6). Every
run must write byte-identical files (sha256 of each trace file, the manifest and run.json). Peak RSS
of this process and of its workers is printed too. The last line is a JSON object.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import resource
import shutil
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TARGET_SPEEDUP = 1.6
DURATION_S = 3600.0
STEP_S = 0.01


def file_digests(folder: Path) -> dict[str, str]:
    """sha256 of every file in ``folder``, by name."""
    out = {}
    for path in sorted(folder.iterdir()):
        h = hashlib.sha256()
        with open(path, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
        out[path.name] = h.hexdigest()
    return out


def timed_run(model, count: int, workers: int, out_dir: Path) -> float:
    """Seconds for one ``synth_files`` run into ``out_dir`` (which must not exist yet)."""
    from tracegen.synth import Bottleneck, CrossTraffic
    from tracegen.synth.output import synth_files

    start = time.perf_counter()
    synth_files(model, count, DURATION_S, STEP_S, 1, out_dir, fmt="parquet", name="scaling", workers=workers,
                cross_traffic=CrossTraffic(flow_rate_per_s=0.5), bottleneck=Bottleneck(buffer_ms=150.0))
    return time.perf_counter() - start


def measure(count: int = 48, workers: int = 2, repeat: int = 2,
            model_path: str | Path = ROOT / "models" / "quillon-lte.json") -> dict:
    """Best-of-``repeat`` traces/s at 1 and at ``workers`` workers, their ratio, and whether every run
    wrote the same bytes."""
    from tracegen import load_model

    model = load_model(str(model_path))
    settings = (1, workers)
    best = {w: float("inf") for w in settings}
    digests: list[dict[str, str]] = []
    with tempfile.TemporaryDirectory(prefix="tracegen-scaling-") as scratch:
        for r in range(repeat):
            for w in settings:
                out_dir = Path(scratch) / f"run{r}-w{w}"
                best[w] = min(best[w], timed_run(model, count, w, out_dir))
                digests.append(file_digests(out_dir))
                shutil.rmtree(out_dir)  # 1 h traces at 10 ms are large; keep one run on disk at a time
    rates = {w: count / best[w] for w in settings}
    speedup = rates[workers] / rates[1]
    return {"model": Path(model_path).name, "traces": count, "duration_s": DURATION_S, "step_s": STEP_S,
            "cross_flows_per_s": 0.5, "buffer_ms": 150.0, "repeat": repeat, "workers": workers,
            "seconds": {str(w): best[w] for w in settings}, "traces_per_s": {str(w): rates[w] for w in settings},
            "speedup": speedup, "target_speedup": TARGET_SPEEDUP, "target_met": speedup >= TARGET_SPEEDUP,
            "files_per_run": len(digests[0]), "runs_compared": len(digests),
            "identical_bytes": all(d == digests[0] for d in digests),
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "workers_peak_rss_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024}


def print_table(r: dict) -> None:
    w = r["workers"]
    print(f"{r['traces']} traces of {r['duration_s'] / 3600:g} h at {r['step_s'] * 1000:g} ms from {r['model']}, "
          f"cross traffic {r['cross_flows_per_s']} flows/s, {r['buffer_ms']:g} ms bottleneck; best of {r['repeat']}")
    for key in r["seconds"]:
        print(f"  workers={key:<3} {r['seconds'][key]:7.1f} s  {r['traces_per_s'][key]:6.2f} traces/s")
    print(f"  speedup 1 -> {w} workers: {r['speedup']:.2f}x (target >= {r['target_speedup']}: "
          f"{'met' if r['target_met'] else 'NOT met'})")
    print(f"  same bytes in all {r['runs_compared']} runs ({r['files_per_run']} files each): "
          f"{'yes' if r['identical_bytes'] else 'NO'}")
    print(f"  peak RSS: this process {r['peak_rss_mib']:.0f} MiB, largest worker {r['workers_peak_rss_mib']:.0f} MiB")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="24 traces instead of 48")
    ap.add_argument("--count", type=int, default=None, help="traces per run (default 48, 24 with --quick)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--model", default=str(ROOT / "models" / "quillon-lte.json"))
    args = ap.parse_args()
    count = args.count or (24 if args.quick else 48)
    result = measure(count, args.workers, model_path=args.model)
    print_table(result)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
