"""Ingest speed: our CSV reader against pandas.read_csv on the same files, in the same run.

Usage: python benchmarks/ingest_speed.py [--repeat N] [FOLDER]
FOLDER defaults to ../shared/field-data/nyu-mets-lte (skipped with a message when absent); without it,
a synthetic folder of 27 files x 4000 rows is written to a temporary directory so the ratio is still
measured. Prints a table and a last line of JSON.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

from tracegen.catalog import Catalog
from tracegen.ingest import Labels, read_file

FIELD = Path(__file__).resolve().parents[2] / "shared" / "field-data" / "nyu-mets-lte"


def synthetic_folder(root: Path) -> Path:
    rng = np.random.default_rng(1)
    root.mkdir(parents=True, exist_ok=True)
    for i in range(27):
        t = np.arange(4000)
        bw = rng.gamma(2.0, 4e6, t.size).round()
        pd.DataFrame({"t_s": t, "bandwidth_bps": bw, "segment": 0}).to_csv(root / f"f{i}.csv", index=False)
    return root


def best_of(repeat: int, fn) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def measure(folder: Path | None = None, repeat: int = 3) -> dict:
    """Read ``folder`` (default: the field data, else generated files) both ways; the dict printed last."""
    with tempfile.TemporaryDirectory(prefix="tracegen-bench-") as scratch:
        tmp = Path(scratch)
        folder = folder or (FIELD if FIELD.is_dir() else None)
        generated = folder is None
        if generated:
            print(f"note: {FIELD} is absent; using a synthetic folder", file=sys.stderr)
            folder = synthetic_folder(tmp / "synthetic")
        files = sorted(folder.glob("*.csv"))
        rows = sum(sum(1 for _ in open(f)) - 1 for f in files)

        ours = best_of(repeat, lambda: [read_file(f, "csv", Labels(), split_column="segment") for f in files])
        ref = best_of(repeat, lambda: [pd.read_csv(f) for f in files])
        tracemalloc.start()
        [read_file(f, "csv", Labels(), split_column="segment") for f in files]
        peak_mib = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        counter = iter(range(10**6))
        store = best_of(1, lambda: Catalog.open(tmp / f"cat{next(counter)}", create=True).ingest(
            files, "csv", Labels(), split_column="segment"))

    return {"files": len(files), "rows": rows, "read_s": ours, "pandas_read_csv_s": ref,
            "read_ratio_vs_pandas": ours / ref, "ingest_to_catalog_s": store,
            "rows_per_s": rows / ours, "peak_traced_mib": peak_mib,
            "folder": "generated" if generated else str(folder)}


def print_table(result: dict) -> None:
    r = result
    print(f"{'files':>24}: {r['files']}\n{'rows':>24}: {r['rows']}")
    print(f"{'tracegen read (best)':>24}: {r['read_s']:.3f} s ({r['rows_per_s']:,.0f} rows/s)")
    print(f"{'pandas.read_csv (best)':>24}: {r['pandas_read_csv_s']:.3f} s")
    print(f"{'ratio':>24}: {r['read_ratio_vs_pandas']:.2f}x pandas (checks, units, provenance, sha256 included)")
    print(f"{'ingest into catalog':>24}: {r['ingest_to_catalog_s']:.3f} s")
    print(f"{'peak traced memory':>24}: {r['peak_traced_mib']:.1f} MiB")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folder", nargs="?", type=Path, default=None)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    result = measure(args.folder, args.repeat)
    print_table(result)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
