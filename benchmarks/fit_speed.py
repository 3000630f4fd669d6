"""Fit cost: tracegen.fit against plain hmmlearn GaussianHMM with the same EM iterations, in one run.

Usage: python benchmarks/fit_speed.py [--hours 100] [--states 2..6] [--restarts 3] [--iterations 20]
Data: --hours of 1 s samples from a generated three-level semi-Markov process (60 traces). Both sides run
exactly --iterations EM iterations (tolerance 0) for every state count and restart; the reference is the
bare hmmlearn fit (its own initialisation and default "diag" covariance, for one feature the same model
as ours); the overhead of ours is initialisation, decoding, dwell, AR, loss and event fits. Prints a
table and a last line of JSON with the ratio (target: at most 2).
"""

from __future__ import annotations

import argparse
import json
import time
import tracemalloc

import numpy as np
from hmmlearn.hmm import GaussianHMM

import tracegen
from tracegen import Trace


def make_traces(hours: float, n_traces: int = 60, seed: int = 0) -> list[Trace]:
    rng = np.random.default_rng(seed)
    per = int(hours * 3600 / n_traces)
    levels = np.log([1e6, 4e6, 12e6])
    out = []
    for _ in range(n_traces):
        k = per // 10 + 10
        state = rng.integers(0, 3, k)
        dwell = np.maximum(1, rng.gamma(4.0, 6.0, k).round().astype(int))
        s = np.repeat(state, dwell)[:per]
        bw = np.exp(levels[s] + 0.12 * rng.standard_normal(s.size))
        out.append(Trace.from_columns(np.arange(s.size, dtype=float), bandwidth_bps=bw))
    return out


def measure(hours: float = 100.0, states: str = "2..6", restarts: int = 3, iterations: int = 20) -> dict:
    """Both fits on the same generated data; the dict printed on the last line."""
    lo, hi = (int(v) for v in states.split(".."))
    counts = range(lo, hi + 1)
    traces = make_traces(hours)
    x = np.concatenate([np.log(t["bandwidth_bps"]) for t in traces])[:, None]
    lengths = [len(t) for t in traces]

    tracemalloc.start()
    start = time.perf_counter()
    model = tracegen.fit(traces, states=counts, restarts=restarts, max_iter=iterations, tol=0.0,
                         progress=False)
    ours_s = time.perf_counter() - start
    ours_peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()

    tracemalloc.start()
    start = time.perf_counter()
    for k in counts:
        for r in range(restarts):
            GaussianHMM(n_components=k, n_iter=iterations, tol=0.0,  # library default "diag", as ours for 1-D
                        random_state=r).fit(x, lengths)
    ref_s = time.perf_counter() - start
    ref_peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()

    return {"samples": int(x.shape[0]), "hours": hours, "state_counts": list(counts),
            "restarts": restarts, "iterations": iterations, "tracegen_fit_s": ours_s,
            "hmmlearn_fit_s": ref_s, "ratio": ours_s / ref_s, "tracegen_peak_mib": ours_peak,
            "hmmlearn_peak_mib": ref_peak, "chosen_level_states": model.report["level_states"]}


def print_table(result: dict) -> None:
    r = result
    counts = r["state_counts"]
    print(f"{r['samples']} samples ({r['hours']:g} h), states {counts[0]}..{counts[-1]}, {r['restarts']} restarts, "
          f"{r['iterations']} EM iterations each")
    print(f"  tracegen.fit        {r['tracegen_fit_s']:8.1f} s   peak {r['tracegen_peak_mib']:7.1f} MiB   "
          f"chose {r['chosen_level_states']} levels")
    print(f"  plain hmmlearn      {r['hmmlearn_fit_s']:8.1f} s   peak {r['hmmlearn_peak_mib']:7.1f} MiB")
    print(f"  ratio               {r['ratio']:8.2f}x (target <= 2)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=100.0)
    ap.add_argument("--states", default="2..6")
    ap.add_argument("--restarts", type=int, default=3)
    ap.add_argument("--iterations", type=int, default=20)
    args = ap.parse_args()
    result = measure(args.hours, args.states, args.restarts, args.iterations)
    print_table(result)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
