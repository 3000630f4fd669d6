"""Synthesis speed as ratios measured in one run, and peak memory of a long stream to Parquet.

Usage: python benchmarks/synth_speed.py [--quick] [--model models/quillon-lte.json]

- synth_vs_hmmlearn: samples/s of tracegen's sampler (levels + AR + loss, no cross traffic) over
  samples/s of hmmlearn's GaussianHMM.sample on a model of the same size (target >= 100).
- synth_vs_rng: the same samples/s over numpy's standard_normal draws/s on this machine, the floor
  (target >= 0.25); synth_full_vs_rng with cross traffic, a bottleneck and handovers (target >= 0.1).
- stream: samples streamed to Parquet with the peak RSS (full run: 10^9 samples, target < 1 GB; --quick:
  10^7). The last line is a JSON object with all figures.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from hmmlearn.hmm import GaussianHMM

ROOT = Path(__file__).resolve().parents[1]


def per_second(fn, samples: int, repeat: int = 3) -> float:
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return samples / best


def stream_child(model_path: str, samples: int, out: str) -> None:
    """Run in a subprocess: stream ``samples`` samples to one Parquet file in row groups, print peak RSS."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from tracegen import load_model
    from tracegen.synth import iter_synth

    model = load_model(model_path)
    per_trace = 3600 * 100  # one hour at 10 ms
    count = max(1, samples // per_trace)
    writer = None
    for tr in iter_synth(model, count, 3600.0, 0.01, seed=1):
        table = tr.to_arrow().replace_schema_metadata(None)
        if writer is None:
            writer = pq.ParquetWriter(out, table.schema, compression="zstd")
        writer.write_table(table)
    writer.close()
    print(json.dumps({"samples": count * per_trace,
                      "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--model", default=str(ROOT / "models" / "quillon-lte.json"))
    ap.add_argument("--stream-child", nargs=2, metavar=("SAMPLES", "OUT"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.stream_child:
        stream_child(args.model, int(args.stream_child[0]), args.stream_child[1])
        return

    from tracegen import load_model
    from tracegen.synth import synth_one
    from tracegen.synth.bottleneck import Bottleneck
    from tracegen.synth.crosstraffic import CrossTraffic
    from tracegen.synth.scenario import HandoverPlan

    model = load_model(args.model)
    duration_s, step_s = (600.0, 0.01) if args.quick else (3600.0, 0.01)
    n = int(duration_s / step_s)

    ours = per_second(lambda: synth_one(model, 0, duration_s, step_s, 1), n)
    full_opts = dict(cross_traffic=CrossTraffic(flow_rate_per_s=0.5),
                     bottleneck=Bottleneck(buffer_ms=100.0, policy="codel"),
                     handover=HandoverPlan(rate_per_min=2.0))
    full = per_second(lambda: synth_one(model, 0, duration_s, step_s, 1, **full_opts), n, repeat=1)
    rng = np.random.default_rng(0)
    floor = per_second(lambda: rng.standard_normal(n), n)

    k = model.n_states
    ref = GaussianHMM(n_components=k, covariance_type="diag")
    ref.startprob_ = np.full(k, 1.0 / k)
    ref.transmat_ = np.full((k, k), 0.1 / max(k - 1, 1)) + np.eye(k) * (0.9 - 0.1 / max(k - 1, 1))
    ref.means_ = np.linspace(13.0, 17.0, k)[:, None]
    ref.covars_ = np.full((k, 1), 0.05)
    ref_n = min(n, 200_000)
    hmm = per_second(lambda: ref.sample(ref_n, random_state=0), ref_n, repeat=1)

    stream_samples = 10**7 if args.quick else 10**9
    out = Path("/tmp") / "tracegen-stream-bench.parquet"
    child = subprocess.run([sys.executable, __file__, "--model", args.model, "--stream-child",
                            str(stream_samples), str(out)], capture_output=True, text=True, check=True)
    stream = json.loads(child.stdout.strip().splitlines()[-1])
    out.unlink(missing_ok=True)

    result = {"samples_per_s": ours, "samples_per_s_full": full, "hmmlearn_samples_per_s": hmm,
              "rng_draws_per_s": floor, "synth_vs_hmmlearn": ours / hmm, "synth_vs_rng": ours / floor,
              "synth_full_vs_rng": full / floor, "stream_samples": stream["samples"],
              "stream_peak_rss_mib": stream["peak_rss_mib"], "quick": args.quick}
    print(f"sampler (levels, AR, loss)     {ours:14,.0f} samples/s")
    print(f"  with cross traffic, queue, handovers {full:14,.0f} samples/s")
    print(f"hmmlearn GaussianHMM.sample    {hmm:14,.0f} samples/s   ratio {ours / hmm:8.1f}x (target >= 100)")
    print(f"numpy standard_normal          {floor:14,.0f} draws/s     ratio {ours / floor:8.3f} (target >= 0.25),"
          f" full {full / floor:.3f} (target >= 0.1)")
    print(f"stream to Parquet              {stream['samples']:14,d} samples, peak RSS {stream['peak_rss_mib']:.0f} MiB")
    print(json.dumps(result))


if __name__ == "__main__":
    main()
