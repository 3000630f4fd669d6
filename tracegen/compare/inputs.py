"""Where the two sides of a comparison come from: a catalog selection, or a folder of trace files."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import TracegenError
from ..trace import Trace

SKIPPED_NAMES = {"manifest.csv", "run.json"}  # what `tracegen synth --out` writes beside the traces


def read_trace_file(path: str | Path) -> list[Trace]:
    """The traces of one file: Parquet written by tracegen (one trace), or CSV/TSV whose columns carry the
    Trace names (t_s, bandwidth_bps, ...), read by the ordinary CSV reader."""
    from ..ingest import read_file

    path = Path(path)
    if path.suffix == ".parquet":
        try:
            return [Trace.from_arrow(pq.read_table(path), path=str(path))]
        except (pa.ArrowException, OSError) as exc:
            raise TracegenError(f"cannot be read as Parquet ({exc})", path=path) from None
    if path.suffix in (".csv", ".tsv"):
        return read_file(path, "csv")
    raise TracegenError("is not a trace file (.parquet, .csv or .tsv)", path=path)


def read_folder(folder: str | Path) -> list[Trace]:
    """Every trace file in ``folder`` (sorted by name): Parquet written by tracegen, or CSV whose columns
    carry the Trace names (t_s, bandwidth_bps, ...), read by the ordinary CSV reader."""
    folder = Path(folder)
    if not folder.is_dir():
        raise TracegenError("is not a folder", path=folder, hint="give a folder of trace files or a selection")
    out: list[Trace] = []
    for path in sorted(folder.iterdir()):
        if path.name in SKIPPED_NAMES or path.name.startswith(".") or not path.is_file():
            continue
        if path.suffix in (".parquet", ".csv", ".tsv"):
            out.extend(read_trace_file(path))
    if not out:
        raise TracegenError("holds no trace files (.parquet or .csv)", path=folder,
                            hint="write traces there with `tracegen synth --out`")
    return out


def select(catalog_root: str | Path, where: Sequence[str], side: str) -> list[Trace]:
    """The traces of a catalog selection (all must hold); TracegenError naming the side when empty."""
    from ..catalog import Catalog

    cat = Catalog.open(catalog_root)
    traces = list(cat.traces(list(where)))
    if not traces:
        shown = " and ".join(where) if where else "(everything)"
        raise TracegenError(f"the {side} selection {shown} holds no traces", field=f"--{side}",
                            path=str(cat.root), hint="see `tracegen catalog list` for what is there")
    return traces


def resolve(catalog_root: str | Path | None, spec: Sequence[str], side: str) -> tuple[list[Trace], str]:
    """A side given as selection expressions, or as one folder path: (traces, label)."""
    if len(spec) == 1 and (Path(spec[0]).is_dir() or spec[0].endswith("/")):
        return read_folder(spec[0]), str(Path(spec[0]))
    if catalog_root is None:
        raise TracegenError("needs a catalog for a selection", field=f"--{side}", hint="pass --catalog DIR")
    return select(catalog_root, spec, side), " and ".join(spec) or "all traces"


__all__ = ["read_trace_file", "read_folder", "select", "resolve"]
