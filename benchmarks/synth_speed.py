"""Synthesis speed as ratios measured in one run, and peak memory of a long stream to Parquet.

Usage: python benchmarks/synth_speed.py [--quick] [--model models/quillon-lte.json]

Every figure is samples per second of *output* samples, best of a few runs, and every ratio divides two
figures measured in this run on this machine:

- the floor: numpy's ``Generator.standard_normal`` draws/s (one number per sample is the least any
  sampler must produce);
- sampler: ``tracegen.synth.sampler.sample_trace`` (state path, levels + AR residuals, RTT, jitter,
  Gilbert-Elliott loss, the model's own handovers and outages; no cross traffic, no Trace object) at
  output steps of 10 ms, 100 ms and the model's own step, each trace holding the same number of samples;
- hmmlearn: ``GaussianHMM.sample`` on a model with as many states, per sample;
- full core: the sampler plus the shared link (``tracegen.synth.link.share_link``: Poisson/Pareto cross
  traffic, the bottleneck queue) with 2 handovers/min at 10 ms, i.e. every column of the trace computed
  but not packed into a Trace; once per drop policy (drop-tail, RED, CoDel); the "full" headline is the
  slowest policy;
- synth_one: ``tracegen.synth.synth_one`` at 10 ms, i.e. the same plus the validated Trace with its
  content id (what a run writes); without and with cross traffic, CoDel and handovers;
- stream: samples streamed to one Parquet file (full run: 10^9 samples, target peak RSS < 1 GB;
  --quick: 10^7), in a subprocess so its peak RSS is its own.

Headline ratios (targets): ``synth_vs_rng`` = sampler at 10 ms / floor (>= 0.25);
``synth_vs_hmmlearn`` = sampler at the model step / hmmlearn (>= 100; the model step is where one
sample is one step of each model, the fair comparison); ``synth_full_vs_rng`` = full core at 10 ms,
slowest policy / floor (>= 0.1). The ratios at the other steps, and of synth_one with the Trace, are
printed too. The last line is a JSON object.
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

ROOT = Path(__file__).resolve().parents[1]
HEADLINE_STEP_S = 0.01


def per_second(fn, samples: int, repeat: int = 3) -> float:
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return samples / best


def stream_child(model_path: str, samples: int, out: str) -> None:
    """Run in a subprocess: stream ``samples`` samples to one Parquet file in row groups, print peak RSS."""
    import pyarrow.parquet as pq

    from tracegen import load_model
    from tracegen.synth import iter_synth

    model = load_model(model_path)
    per_trace = 3600 * 100  # one hour at 10 ms
    count = max(1, -(-samples // per_trace))
    writer = None
    start = time.perf_counter()
    for tr in iter_synth(model, count, 3600.0, 0.01, seed=1):
        table = tr.to_arrow().replace_schema_metadata(None)
        if writer is None:
            writer = pq.ParquetWriter(out, table.schema, compression="zstd")
        writer.write_table(table)
        del tr, table
    writer.close()
    print(json.dumps({"samples": count * per_trace, "seconds": time.perf_counter() - start,
                      "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))


def hmmlearn_rate(k: int, n: int) -> float:
    from hmmlearn.hmm import GaussianHMM

    ref = GaussianHMM(n_components=k, covariance_type="diag")
    ref.startprob_ = np.full(k, 1.0 / k)
    off = 0.1 / max(k - 1, 1)
    ref.transmat_ = np.full((k, k), off) + np.eye(k) * (0.9 - off)
    ref.means_ = np.linspace(13.0, 17.0, k)[:, None]
    ref.covars_ = np.full((k, 1), 0.05)
    return per_second(lambda: ref.sample(n, random_state=0), n, repeat=1)


def measure(quick: bool = False, model_path: str | Path = ROOT / "models" / "quillon-lte.json") -> dict:
    """Every figure of the module docstring, as the dict printed on the last line (NaN where a part failed)."""
    from tracegen import load_model
    from tracegen.synth import model_digest, synth_one
    from tracegen.synth.bottleneck import Bottleneck
    from tracegen.synth.crosstraffic import CrossTraffic
    from tracegen.synth.events import HandoverPlan
    from tracegen.synth.sampler import sample_trace, trace_generator

    model_path = str(model_path)
    model = load_model(model_path)
    h = float(model.step_s)
    n = 360_000 if quick else 3_600_000      # samples per trace: 1 h (10 h) at 10 ms
    repeat = 3 if quick else 5
    rng = np.random.default_rng(0)

    def floor() -> float:
        return per_second(lambda: rng.standard_normal(n), n, repeat=repeat)

    steps = sorted({HEADLINE_STEP_S, 0.1, h})
    sample_trace(model, 60.0, HEADLINE_STEP_S, trace_generator(1, 0))  # warm the per-model plan
    floors = [floor()]
    sampler = {}
    for step in steps:
        sampler[step] = per_second(lambda: sample_trace(model, n * step, step, trace_generator(1, 0)), n, repeat)
        floors.append(floor())
    rng_rate = max(floors)  # the floor at its best, so the ratios are never flattered by a slow moment

    n_one = 360_000
    digest = model_digest(model)  # once per run, as iter_synth does
    one = per_second(lambda: synth_one(model, 0, n_one * HEADLINE_STEP_S, HEADLINE_STEP_S, 1, digest=digest).id,
                     n_one, repeat)
    full_opts = dict(cross_traffic=CrossTraffic(flow_rate_per_s=0.5),
                     bottleneck=Bottleneck(buffer_ms=100.0, policy="codel"),
                     handover=HandoverPlan(rate_per_min=2.0))
    try:
        full = per_second(lambda: synth_one(model, 0, n_one * HEADLINE_STEP_S, HEADLINE_STEP_S, 1, digest=digest,
                                            **full_opts).id, n_one, repeat=1)
        full_error = None
    except Exception as exc:  # owned by the synth module; report rather than hide the other figures
        full, full_error = float("nan"), f"{type(exc).__name__}: {exc}"
    from tracegen.synth import STREAM_CROSS, STREAM_QUEUE, STREAM_SAMPLER, trace_rng
    from tracegen.synth.link import share_link

    def core(policy: str) -> None:
        s = sample_trace(model, n_one * HEADLINE_STEP_S, HEADLINE_STEP_S, trace_rng(1, 0, STREAM_SAMPLER),
                         handover=full_opts["handover"])
        share_link(s.bandwidth_bps, HEADLINE_STEP_S, full_opts["cross_traffic"],
                   Bottleneck(buffer_ms=100.0, policy=policy), trace_rng(1, 0, STREAM_CROSS),
                   trace_rng(1, 0, STREAM_QUEUE))

    core_rates = {p: per_second(lambda: core(p), n_one, repeat) for p in ("drop-tail", "red", "codel")}
    core_full = min(core_rates.values())
    floors.append(floor())
    rng_rate = max(floors)

    hmm = hmmlearn_rate(model.n_states, 20_000 if quick else 100_000)

    stream_samples = 10**7 if quick else 10**9
    out = Path("/tmp") / f"tracegen-stream-bench-{int(time.time() * 1000)}.parquet"
    try:
        child = subprocess.run([sys.executable, __file__, "--model", model_path, "--stream-child",
                                str(stream_samples), str(out)], capture_output=True, text=True)
        if child.returncode:
            stream = {"samples": 0, "seconds": float("nan"), "peak_rss_mib": float("nan"),
                      "error": child.stderr.strip().splitlines()[-1] if child.stderr.strip() else "failed"}
        else:
            stream = json.loads(child.stdout.strip().splitlines()[-1])
    finally:
        out.unlink(missing_ok=True)

    head = sampler[HEADLINE_STEP_S]
    at_h = sampler[h]
    result = {
        "model": Path(model_path).name, "model_step_s": h, "model_states": model.n_states,
        "samples_per_trace": n, "repeat": repeat, "quick": quick,
        "rng_draws_per_s": rng_rate, "hmmlearn_samples_per_s": hmm,
        "sampler_samples_per_s": {f"{s:g}": v for s, v in sampler.items()},
        "sampler_vs_rng": {f"{s:g}": v / rng_rate for s, v in sampler.items()},
        "synth_one_samples_per_s": one, "synth_one_full_samples_per_s": full,
        "synth_vs_rng": head / rng_rate, "synth_vs_rng_step_s": HEADLINE_STEP_S,
        "synth_vs_hmmlearn": at_h / hmm, "synth_vs_hmmlearn_step_s": h,
        "synth_vs_hmmlearn_at_10ms": head / hmm,
        "core_full_samples_per_s": core_rates, "core_full_vs_rng": {p: v / rng_rate for p, v in core_rates.items()},
        "synth_one_vs_rng": one / rng_rate, "synth_one_full_vs_rng": full / rng_rate,
        "synth_full_vs_rng": core_full / rng_rate,
        "stream_samples": stream["samples"], "stream_seconds": stream["seconds"],
        "stream_peak_rss_mib": stream["peak_rss_mib"],
    }
    if full_error:
        result["synth_full_error"] = full_error
    if "error" in stream:
        result["stream_error"] = stream["error"]
    return result


def print_table(result: dict) -> None:
    r = result
    h, rng_rate, hmm = r["model_step_s"], r["rng_draws_per_s"], r["hmmlearn_samples_per_s"]
    core_rates, one, full = r["core_full_samples_per_s"], r["synth_one_samples_per_s"], r["synth_one_full_samples_per_s"]
    core_full, full_error = min(core_rates.values()), r.get("synth_full_error")
    print(f"model {r['model']} (step {h:g} s), {r['samples_per_trace']:,} samples per trace, best of {r['repeat']}")
    print(f"numpy standard_normal (floor)          {rng_rate:14,.0f} draws/s")
    for key, v in r["sampler_samples_per_s"].items():
        s = float(key)
        tag = "  <- headline synth_vs_rng" if s == HEADLINE_STEP_S else (
            "  <- headline synth_vs_hmmlearn" if s == h else "")
        print(f"sampler at {s:>5g} s                    {v:14,.0f} samples/s  {v / rng_rate:6.3f} x floor"
              f"  {v / hmm:8.0f} x hmmlearn{tag}")
    print(f"hmmlearn GaussianHMM.sample ({r['model_states']} states) {hmm:14,.0f} samples/s")
    for p, v in core_rates.items():
        print(f"full core at 10 ms, {p:9}          {v:14,.0f} samples/s  {v / rng_rate:6.3f} x floor"
              + ("  <- headline synth_full_vs_rng" if v == core_full else ""))
    print(f"synth_one at 10 ms (Trace + id)        {one:14,.0f} samples/s  {one / rng_rate:6.3f} x floor")
    print(f"  + cross traffic, CoDel, handovers    {full:14,.0f} samples/s  {full / rng_rate:6.3f} x floor"
          + (f"  ({full_error})" if full_error else ""))
    print(f"stream to Parquet                      {r['stream_samples']:14,d} samples in {r['stream_seconds']:.0f} s,"
          f" peak RSS {r['stream_peak_rss_mib']:.0f} MiB" + (f"  ({r['stream_error']})" if "stream_error" in r else ""))
    print(f"targets: synth_vs_rng (10 ms) >= 0.25: {r['synth_vs_rng']:.3f}; synth_vs_hmmlearn (model step) >= 100: "
          f"{r['synth_vs_hmmlearn']:.0f}; synth_full_vs_rng >= 0.1: {r['synth_full_vs_rng']:.3f}")


def json_safe(result: dict) -> dict:
    """NaN (a part that failed) as null."""
    return {k: (None if isinstance(v, float) and v != v else v) for k, v in result.items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="shorter traces, a 10^7-sample stream (under a minute)")
    ap.add_argument("--model", default=str(ROOT / "models" / "quillon-lte.json"))
    ap.add_argument("--stream-child", nargs=2, metavar=("SAMPLES", "OUT"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.stream_child:
        stream_child(args.model, int(args.stream_child[0]), args.stream_child[1])
        return
    result = measure(args.quick, args.model)
    print_table(result)
    print(json.dumps(json_safe(result)))


if __name__ == "__main__":
    main()
