"""Field fidelity: fit on half of a real corpus's files, synthesise, and measure the gap to the other half.

Usage: python benchmarks/field_fidelity.py [--quick] [--splits N] [--draws N] [--data DIR]

DIR (default ../shared/field-data next to the checkout) holds one folder per dataset of CSV files with
columns ``t_s``, ``bandwidth_bps`` (bit/s) and, where the file has them, ``segment`` (a reconnect inside
the file: each segment is its own trace), ``mode`` and ``scenario`` (kept as tags). Every file is read
with tracegen's ordinary CSV reader (``split_column="segment"`` when there is one); a file is one group,
so a file's segments stay on one side of a split. When DIR is absent the benchmark prints why and exits
0 without figures.

For each of ``--splits`` seeded splits (default 5; 1 with ``--quick``: a split takes about 4 minutes on
the 2-core machine, most of it the fit) the files are cut into two disjoint halves A and B (A gets the
extra file of an odd count). Then:

* tracegen: ``tracegen.fit(A)`` with its defaults (two worker processes, which changes nothing but the
  time), ``tracegen.synth`` of as many traces as B has, each
  as long as its B counterpart, at the model's step (one call per distinct length, ``start=`` running on
  so every trace has its own index and stream);
* baselines, also one trace per B trace and as long: (a) i.i.d. resampling of all of A's bandwidth
  samples; (b) a block bootstrap of random 60 s blocks of A's traces (a trace, then a start, uniformly;
  traces shorter than a block are not used) glued end to end; (c) plain hmmlearn ``GaussianHMM``
  (library defaults: diagonal covariance, default EM iterations) on A's log bandwidth with zeros clamped
  to the 10 kbit/s outage floor, 2..8 states chosen by hmmlearn's BIC, one ``sample`` per trace, exp'd
  back;
* the field itself: A's own measured traces, as they are (what the other half of the corpus gives; a
  model of A that draws as varied traces as A holds scores about the same);
* each set scored with ``tracegen.coverage(B, set, seed=split_seed, n_permutations=0)`` at the default
  10, 60 and 300 s scales (its own group splits of B give the noise floor);
* ``--draws`` (default 5) independent draws of every random set (tracegen's synthesis, hmmlearn's
  sampling from its one fit, the block and i.i.d. resampling) on each split, each scored; a split's
  figure for a set is the median over its draws, ratio by ratio (the overall one too: the median of
  each draw's worst scale, never below the worst of the per-scale medians). One draw of 13-14 synthetic
  traces is a small sample, and the ratio of single draws of one model varies widely.
  Draw 0 uses the split's seed, so it is the single draw earlier versions scored; its medians are kept
  in the JSON (``first_draw``).

Nothing is chosen on B: the model, its state count and the baselines see A only.

Under the targets, a 90 % two-stage bootstrap interval (splits, then each split's draws) of tracegen's
median and of plain hmmlearn's factor over it shows how much of a gap to a target the splits and draws
alone could make (``median_intervals``).

Printed: a table per split and the medians over splits (overall gap ratio = the worst scale, per-scale
ratios, the worst feature and its ratio) for tracegen and each baseline, the time of each step, then as
the last line one JSON object with the medians, every per-split figure and the targets (median gap ratio
<= 1.5 at every scale, >= 3x lower than plain hmmlearn, lower than the block bootstrap at 300 s, no
feature's median ratio above 3) and whether each is met. The run only reports: a missed target is not an
error.

The NYU-METS LTE traces in ../shared/field-data/nyu-mets-lte are used under the Open Database License 1.0
(NYU Metropolitan Mobile Bandwidth Trace dataset; L. Mei et al., "Realtime Mobile Bandwidth Prediction
using LSTM Neural Networks", PAM 2019); no part of them is shipped with tracegen.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
import time
import warnings
from collections import defaultdict
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
FIELD = ROOT.parent / "shared" / "field-data"
READ_OPTIONS = {"time_column": "t_s", "bandwidth_column": "bandwidth_bps", "bandwidth_unit": "bps"}
OPTIONAL_COLUMNS = {"split_column": "segment", "tag_columns": ("mode", "scenario")}   # used where a file has them
BLOCK_S = 60.0
HMM_STATES = range(2, 9)
SETS = ("tracegen", "plain_hmm", "block", "iid", "field")
FIT_WORKERS = 2      # state counts fitted side by side: the same model bytes as one process (tracegen.parallel)
TARGET_SCALE_RATIO = 1.5
TARGET_HMM_FACTOR = 3.0
TARGET_FEATURE_RATIO = 3.0
DRAWS = 5
DRAW_SEED_STEP = 100_003   # draw d of split seed s uses seed s + d * DRAW_SEED_STEP (draw 0: the split seed)
BOOT_REPS = 4000
RANDOM_SETS = ("tracegen", "plain_hmm", "block", "iid")


# --- data ----------------------------------------------------------------------------------------------
def dataset_folders(data: Path) -> list[Path]:
    """Folders of CSV files under ``data`` (``data`` itself when it holds CSV files directly)."""
    if any(data.glob("*.csv")):
        return [data]
    return sorted(p for p in data.iterdir() if p.is_dir() and any(p.glob("*.csv")))


def read_dataset(folder: Path) -> dict[str, list]:
    """Every CSV file of ``folder`` through tracegen's CSV reader: {file stem: [one Trace per segment]}.
    Files need ``t_s`` and ``bandwidth_bps``; ``segment``, ``mode`` and ``scenario`` are read where present."""
    from tracegen.ingest import read_file

    return {f.stem: read_file(f, "csv", **read_options(f)) for f in sorted(folder.glob("*.csv"))}


def read_options(path: Path) -> dict[str, Any]:
    """READ_OPTIONS plus the optional columns that the file's header names."""
    with path.open(newline="") as fh:
        header = {name.strip() for name in next(csv.reader(fh), [])}
    split, tags = OPTIONAL_COLUMNS["split_column"], OPTIONAL_COLUMNS["tag_columns"]
    return {**READ_OPTIONS, "split_column": split if split in header else None,
            "tag_columns": tuple(t for t in tags if t in header)}


def split_files(names: list[str], seed: int) -> tuple[list[str], list[str]]:
    order = np.random.default_rng(seed).permutation(len(names))
    cut = (len(names) + 1) // 2
    return sorted(names[i] for i in order[:cut]), sorted(names[i] for i in order[cut:])


def _synthetic(bandwidth: np.ndarray, step_s: float, name: str, index: int):
    from tracegen import Trace

    n = len(bandwidth)
    return Trace.from_columns(np.arange(n) * step_s, bandwidth_bps=bandwidth, origin="synthetic",
                              source=f"{name}#{index}", group=f"{name}-{index}")


# --- the sets compared with B ----------------------------------------------------------------------------
def tracegen_set(model: Any, lengths: list[int], seed: int) -> list:
    import tracegen

    step = float(model.step_s)
    out: list = [None] * len(lengths)
    by_length: dict[int, list[int]] = defaultdict(list)
    for i, n in enumerate(lengths):
        by_length[n].append(i)
    start = 0
    for n in sorted(by_length):
        where = by_length[n]
        made = tracegen.synth(model, len(where), n * step, step, seed=seed, start=start, name="field-fidelity")
        for i, tr in zip(where, made):
            out[i] = tr
        start += len(where)
    return out


def iid_set(a: list, lengths: list[int], step_s: float, seed: int) -> list:
    pool = np.concatenate([np.asarray(t["bandwidth_bps"], float) for t in a])
    pool = pool[np.isfinite(pool)]
    rng = np.random.default_rng([seed, 1])
    return [_synthetic(rng.choice(pool, size=n), step_s, "iid", i) for i, n in enumerate(lengths)]


def block_set(a: list, lengths: list[int], step_s: float, seed: int) -> list:
    block = round(BLOCK_S / step_s)
    sources = [np.asarray(t["bandwidth_bps"], float) for t in a if len(t) >= block]
    rng = np.random.default_rng([seed, 2])
    out = []
    for i, n in enumerate(lengths):
        pieces, have = [], 0
        while have < n:
            src = sources[int(rng.integers(len(sources)))]
            s = int(rng.integers(len(src) - block + 1))
            pieces.append(src[s:s + block])
            have += block
        out.append(_synthetic(np.concatenate(pieces)[:n], step_s, "block", i))
    return out


def plain_hmm_fit(a: list, seed: int) -> tuple[Any, dict]:
    from hmmlearn.hmm import GaussianHMM

    from tracegen.trace import OUTAGE_FLOOR_BPS

    xs = []
    for t in a:
        bw = np.asarray(t["bandwidth_bps"], float)
        bw = bw[np.isfinite(bw)]
        xs.append(np.log(np.maximum(bw, OUTAGE_FLOOR_BPS)))
    x = np.concatenate(xs)[:, None]
    lens = [len(v) for v in xs]
    fits = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # hmmlearn's convergence chatter at its default 10 iterations
        for k in HMM_STATES:
            m = GaussianHMM(n_components=k, random_state=seed)
            m.fit(x, lens)
            fits[k] = (m.bic(x, lens), m)
    best = min(fits, key=lambda k: fits[k][0])
    return fits[best][1], {"states": best, "bic": {str(k): float(v[0]) for k, v in fits.items()}}


def plain_hmm_sample(model: Any, lengths: list[int], step_s: float, seed: int) -> list:
    rng = np.random.RandomState(seed)
    out = []
    for i, n in enumerate(lengths):
        obs, _ = model.sample(n, random_state=rng)
        out.append(_synthetic(np.exp(obs[:, 0]), step_s, "plain-hmm", i))
    return out


def score(b: list, candidate: list, seed: int) -> dict:
    import tracegen

    res = tracegen.coverage(b, candidate, seed=seed, n_permutations=0, progress=False)
    g = res.data["gap_ratio"]
    feats = {f: v for f, v in g["by_feature"].items() if v is not None}
    worst = max(feats, key=feats.get) if feats else None
    return {"overall": g["overall"], "by_scale": dict(g["by_scale"]), "by_feature": feats,
            "by_feature_scale": dict(g["by_feature_scale"]), "worst_feature": worst,
            "worst_feature_ratio": feats.get(worst) if worst else None, "temporal": dict(g.get("temporal", {})),
            "noise_floor_splits": res.data["noise_floor"]["splits"]}


def over_draws(draws: list[dict]) -> dict:
    """One set's score on a split from its draws: the median of each ratio over the draws."""
    if len(draws) == 1:
        return {**draws[0], "draws_overall": [draws[0]["overall"]]}
    scales = sorted({k for d in draws for k in d["by_scale"]}, key=float)
    feats = sorted({f for d in draws for f in d["by_feature"]})
    by_feature = {f: _median([d["by_feature"].get(f) for d in draws]) for f in feats}
    by_feature = {f: v for f, v in by_feature.items() if v is not None}
    worst = max(by_feature, key=by_feature.get) if by_feature else None
    temporal_keys = sorted({k for d in draws for k in d["temporal"]})
    return {"overall": _median([d["overall"] for d in draws]),
            "by_scale": {k: _median([d["by_scale"].get(k) for d in draws]) for k in scales},
            "by_feature": by_feature, "by_feature_scale": draws[0]["by_feature_scale"], "worst_feature": worst,
            "worst_feature_ratio": by_feature.get(worst) if worst else None,
            "temporal": {k: _median([d["temporal"].get(k) for d in draws]) for k in temporal_keys},
            "noise_floor_splits": draws[0]["noise_floor_splits"], "draws_overall": [d["overall"] for d in draws]}


# --- one split ------------------------------------------------------------------------------------------
def run_split(files: dict[str, list], seed: int, draws: int = DRAWS) -> dict:
    import tracegen

    names_a, names_b = split_files(sorted(files), seed)
    a = [t for n in names_a for t in files[n]]
    b = [t for n in names_b for t in files[n]]
    lengths = [len(t) for t in b]
    times: dict[str, float] = defaultdict(float)
    t0 = time.perf_counter()
    model = tracegen.fit(a, progress=False, workers=FIT_WORKERS)
    times["fit"] = time.perf_counter() - t0
    step = float(model.step_s)
    slow = None if model.slow is None else {"offset_sd": math.sqrt(model.slow.between_var),
                                            "drift_sd": math.sqrt(model.slow.drift_var),
                                            "drift_time_s": model.slow.drift_time_s,
                                            "outage_slope": model.slow.outage_slope}
    extra: dict[str, Any] = {"model_states": int(model.n_states), "slow": slow}
    t0 = time.perf_counter()
    hmm, extra["plain_hmm"] = plain_hmm_fit(a, seed)
    times["plain_hmm_fit"] = time.perf_counter() - t0
    makers = {"tracegen": lambda s: tracegen_set(model, lengths, s),
              "plain_hmm": lambda s: plain_hmm_sample(hmm, lengths, step, s),
              "block": lambda s: block_set(a, lengths, step, s),
              "iid": lambda s: iid_set(a, lengths, step, s)}
    per_draw: dict[str, list[dict]] = {name: [] for name in SETS}
    lengths_match = True
    for d in range(draws):
        draw_seed = seed + d * DRAW_SEED_STEP
        for name in RANDOM_SETS:
            t0 = time.perf_counter()
            made = makers[name](draw_seed)
            times[f"make_{name}"] += time.perf_counter() - t0
            lengths_match &= [len(t) for t in made] == lengths
            t0 = time.perf_counter()
            per_draw[name].append(score(b, made, seed))
            times[f"coverage_{name}"] += time.perf_counter() - t0
    t0 = time.perf_counter()
    per_draw["field"].append(score(b, a, seed))   # the field itself: A's own measured traces against B
    times["coverage_field"] = time.perf_counter() - t0
    scores = {name: over_draws(per_draw[name]) for name in SETS}
    first = {name: per_draw[name][0] for name in SETS}
    return {"seed": seed, "files_a": names_a, "files_b": names_b, "traces_a": len(a), "traces_b": len(b),
            "hours_a": sum(len(t) * t.step_s for t in a) / 3600, "hours_b": sum(len(t) * t.step_s for t in b) / 3600,
            "step_s": step, "draws": draws, "lengths_match": lengths_match, "scores": scores,
            "first_draw": first, "times_s": dict(times), **extra}


# --- summary --------------------------------------------------------------------------------------------
def _median(values: list) -> float | None:
    vals = [v for v in values if v is not None and math.isfinite(v)]
    return float(np.median(vals)) if vals else None


def summarise(splits: list[dict], key: str = "scores") -> dict:
    """Medians over the splits of each set's figures (``key``: the per-split scores, or ``first_draw``)."""
    med: dict[str, Any] = {}
    for name in SETS:
        sc = [s[key][name] for s in splits]
        scales = sorted({k for x in sc for k in x["by_scale"]}, key=float)
        feats = sorted({f for x in sc for f in x["by_feature"]})
        by_feature = {f: _median([x["by_feature"].get(f) for x in sc]) for f in feats}
        worst = max((f for f in by_feature if by_feature[f] is not None), key=lambda f: by_feature[f], default=None)
        med[name] = {"overall": _median([x["overall"] for x in sc]),
                     "by_scale": {k: _median([x["by_scale"].get(k) for x in sc]) for k in scales},
                     "by_feature": by_feature, "worst_feature": worst,
                     "worst_feature_ratio": by_feature.get(worst) if worst else None,
                     "worst_feature_ratio_per_split": [x["worst_feature_ratio"] for x in sc]}
    return med


def median_intervals(splits: list[dict], reps: int = BOOT_REPS, level: float = 0.9, seed: int = 0) -> dict:
    """How far the medians could move with other splits and draws: a two-stage percentile bootstrap
    (splits with replacement, then each chosen split's draws with replacement; Davison & Hinkley,
    *Bootstrap Methods and their Application*, 1997, sec. 3.8, cited from memory) of tracegen's overall
    median and of plain hmmlearn's over tracegen's (splits paired). With 5 splits it is coarse, a guide to
    how much of a gap to a target is noise, not a test."""
    def table(name: str) -> np.ndarray:
        rows = [s["scores"][name]["draws_overall"] for s in splits]
        width = min(len(r) for r in rows)
        return np.array([[np.nan if v is None else v for v in r[:width]] for r in rows], dtype=float)

    rng = np.random.default_rng(seed)
    pick = rng.integers(len(splits), size=(reps, len(splits)))

    def medians(draws: np.ndarray) -> np.ndarray:
        within = rng.integers(draws.shape[1], size=pick.shape + (draws.shape[1],))
        return np.nanmedian(np.nanmedian(draws[pick[..., None], within], axis=2), axis=1)

    ours_med, hmm_med = medians(table("tracegen")), medians(table("plain_hmm"))
    q = [(1.0 - level) / 2.0 * 100.0, (1.0 + level) / 2.0 * 100.0]
    return {"level": level, "reps": reps, "tracegen_overall": [float(v) for v in np.nanpercentile(ours_med, q)],
            "plain_hmm_over_tracegen": [float(v) for v in np.nanpercentile(hmm_med / ours_med, q)]}


def over_field(splits: list[dict]) -> list[float | None]:
    """Per split, tracegen's overall ratio over the field itself's: 1 = as close to B as A's own traces."""
    out = []
    for s in splits:
        ours, field = s["scores"]["tracegen"]["overall"], s["scores"]["field"]["overall"]
        out.append(ours / field if ours is not None and field else None)
    return out


def targets(med: dict) -> dict:
    ours, hmm, block = med["tracegen"], med["plain_hmm"], med["block"]
    scale_ok = bool(ours["by_scale"]) and all(v is not None and v <= TARGET_SCALE_RATIO for v in ours["by_scale"].values())
    factor = (hmm["overall"] / ours["overall"]) if ours["overall"] and hmm["overall"] is not None else None
    o300, b300 = ours["by_scale"].get("300"), block["by_scale"].get("300")
    wf = ours["worst_feature_ratio"]
    return {
        "gap_ratio_every_scale_le_1_5": {"value": ours["by_scale"], "target": f"<= {TARGET_SCALE_RATIO}", "met": scale_ok},
        "plain_hmm_over_tracegen_ge_3": {"value": factor, "target": f">= {TARGET_HMM_FACTOR}",
                                         "met": factor is not None and factor >= TARGET_HMM_FACTOR},
        "tracegen_below_block_at_300s": {"value": [o300, b300], "target": "tracegen < block at 300 s",
                                         "met": o300 is not None and b300 is not None and o300 < b300},
        "no_feature_above_3": {"value": wf, "feature": ours["worst_feature"], "target": f"<= {TARGET_FEATURE_RATIO}",
                               "met": wf is not None and wf <= TARGET_FEATURE_RATIO},
    }


def _slow_text(slow: dict | None) -> str:
    if slow is None:
        return "none"
    return (f"offset sd {slow['offset_sd']:.2f}, drift sd {slow['drift_sd']:.2f} over {slow['drift_time_s']:.0f} s, "
            f"outage slope {slow.get('outage_slope', 0.0):+.2f}")


def _f(v: Any) -> str:
    return "-" if v is None else f"{v:.2f}"


def print_rows(title: str, rows: dict, scales: list[str]) -> None:
    print(title)
    head = f"  {'set':<10} {'overall':>8} " + " ".join(f"{s + ' s':>8}" for s in scales) + "  worst feature"
    print(head)
    for name in SETS:
        r = rows[name]
        print(f"  {name:<10} {_f(r['overall']):>8} " + " ".join(f"{_f(r['by_scale'].get(s)):>8}" for s in scales)
              + f"  {r['worst_feature'] or '-'} {_f(r['worst_feature_ratio'])}")


def measure(data: Path = FIELD, n_splits: int = 5, draws: int = DRAWS) -> dict | None:
    folders = dataset_folders(data) if data.is_dir() else []
    if not folders:
        print(f"field fidelity: skipped, no field data at {data} (a folder of dataset folders of CSV files)")
        return None
    out: dict[str, Any] = {"datasets": {}}
    for folder in folders:
        t0 = time.perf_counter()
        files = read_dataset(folder)
        read_s = time.perf_counter() - t0
        n_traces = sum(len(v) for v in files.values())
        print(f"== {folder.name}: {len(files)} files, {n_traces} traces (one per segment), "
              f"{sum(len(t) * t.step_s for v in files.values() for t in v) / 3600:.1f} h, read in {read_s:.2f} s")
        splits = []
        for i in range(n_splits):
            seed = 1000 + i
            t0 = time.perf_counter()
            s = run_split(files, seed, draws)
            s["total_s"] = time.perf_counter() - t0
            splits.append(s)
            scales = sorted({k for x in s["scores"].values() for k in x["by_scale"]}, key=float)
            print_rows(f"split {i + 1}/{n_splits} (seed {seed}): A {len(s['files_a'])} files / {s['traces_a']} traces "
                       f"/ {s['hours_a']:.1f} h, B {len(s['files_b'])} files / {s['traces_b']} traces / "
                       f"{s['hours_b']:.1f} h; tracegen model {s['model_states']} states, plain HMM "
                       f"{s['plain_hmm']['states']} states; slow part {_slow_text(s['slow'])}", s["scores"], scales)
            if draws > 1:
                print(f"  (each random set: median of {draws} draws; tracegen's overall per draw "
                      + " ".join(_f(v) for v in s["scores"]["tracegen"]["draws_overall"]) + ")")
            if not s["lengths_match"]:
                print("  note: a synthesised trace's length differs from its B counterpart")
            print("  time: " + ", ".join(f"{k} {v:.1f} s" for k, v in s["times_s"].items())
                  + f"; split {s['total_s']:.1f} s", flush=True)
        med = summarise(splits)
        scales = sorted({k for x in med.values() for k in x["by_scale"]}, key=float)
        print_rows(f"medians over {n_splits} splits", med, scales)
        med_first = summarise(splits, "first_draw")
        if draws > 1:
            print_rows(f"medians over {n_splits} splits, first draw only (one draw per split, as earlier versions)",
                       med_first, scales)
        tg = targets(med)
        print("targets:")
        for k, v in tg.items():
            print(f"  {k:<32} {'met' if v['met'] else 'NOT met'}  ({v['value']})")
        ci = median_intervals(splits)
        print(f"noise: {ci['level']:.0%} bootstrap interval over splits and draws: tracegen overall "
              f"{_f(ci['tracegen_overall'][0])}-{_f(ci['tracegen_overall'][1])}, plain hmmlearn / tracegen "
              f"{_f(ci['plain_hmm_over_tracegen'][0])}-{_f(ci['plain_hmm_over_tracegen'][1])}")
        rel = over_field(splits)
        print("against the field itself (tracegen's overall / A's own traces' overall), per split "
              + " ".join(_f(v) for v in rel) + f"; median {_f(_median(rel))}")
        out["datasets"][folder.name] = {"files": len(files), "traces": n_traces, "read_s": read_s,
                                        "medians": med, "medians_first_draw": med_first, "targets": tg,
                                        "intervals": ci, "tracegen_over_field": rel,
                                        "splits": splits}
    first = out["datasets"][folders[0].name]
    med = first["medians"]
    out.update({
        "dataset": folders[0].name, "n_splits": n_splits, "draws": draws,
        "gap_ratio": med["tracegen"]["overall"], "gap_ratio_by_scale": med["tracegen"]["by_scale"],
        "plain_hmm_ratio": med["plain_hmm"]["overall"], "block_ratio": med["block"]["overall"],
        "iid_ratio": med["iid"]["overall"], "field_ratio": med["field"]["overall"],
        "field_ratio_by_scale": med["field"]["by_scale"],
        "plain_hmm_ratio_by_scale": med["plain_hmm"]["by_scale"], "block_ratio_by_scale": med["block"]["by_scale"],
        "iid_ratio_by_scale": med["iid"]["by_scale"],
        "worst_feature": med["tracegen"]["worst_feature"], "worst_feature_ratio": med["tracegen"]["worst_feature_ratio"],
        "gap_ratio_by_feature": med["tracegen"]["by_feature"],
        "first_draw": {name: {"overall": first["medians_first_draw"][name]["overall"],
                              "by_scale": first["medians_first_draw"][name]["by_scale"]} for name in SETS},
        "per_split": [{"seed": s["seed"], "files_b": s["files_b"], "model_states": s["model_states"], "slow": s["slow"],
                       **{name: {k: s["scores"][name][k] for k in ("overall", "by_scale", "worst_feature",
                                                                   "worst_feature_ratio", "by_feature",
                                                                   "draws_overall")}
                          for name in SETS}, "times_s": s["times_s"]} for s in first["splits"]],
        "intervals": first["intervals"], "tracegen_over_field": _median(first["tracegen_over_field"]),
        "targets": first["targets"], "all_targets_met": all(v["met"] for v in first["targets"].values()),
    })
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="1 split instead of 5 (the fit keeps its defaults)")
    ap.add_argument("--splits", type=int, default=None, help="number of seeded A/B splits (default 5, 1 with --quick)")
    ap.add_argument("--draws", type=int, default=DRAWS,
                    help=f"draws of every random set per split, each scored; the split's figure is their median "
                         f"(default {DRAWS})")
    ap.add_argument("--data", type=Path, default=FIELD, help="folder of dataset folders (default ../shared/field-data)")
    args = ap.parse_args()
    n = args.splits if args.splits is not None else (1 if args.quick else 5)
    if n < 1:
        ap.error("--splits must be at least 1")
    if args.draws < 1:
        ap.error("--draws must be at least 1")
    start = time.perf_counter()
    out = measure(args.data, n, args.draws)
    if out is None:
        print(json.dumps({"skipped": f"no field data at {args.data}"}))
        return
    out["quick"] = bool(args.quick)
    out["total_s"] = time.perf_counter() - start
    print(f"total {out['total_s']:.0f} s")
    print(json.dumps(out, default=float))


if __name__ == "__main__":
    sys.exit(main())
