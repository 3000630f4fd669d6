"""One trace per file in tracegen's own schema: Parquet, CSV or JSON lines.

* Parquet: the table of :meth:`Trace.to_arrow` (metadata in the schema under ``tracegen``), so
  ``Trace.from_arrow(pyarrow.parquet.read_table(path))`` gives back the same trace and id.
* CSV: a header row of column names, then one row per sample; unknown (NaN) is an empty cell and
  numbers are written in their shortest exact form, so ``pandas.read_csv(path)`` reads the same values
  back (whole-number columns may come back as integers). CSV has no place for the metadata.
* JSON lines: a first line holding the metadata (:func:`jsonl_header`), then one object per sample
  keyed by column name, unknown written as ``null``; every line is plain JSON (no ``NaN`` token).

Each file is written under a temporary name in the same folder and renamed, so no reader ever sees
half of it; an existing file is refused unless ``force``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import TracegenError
from ..plainjson import plain
from ..trace import COLUMNS, SCHEMA_VERSION, Trace

JSONL_FORMAT = "tracegen-trace-jsonl"
JSONL_FORMAT_VERSION = 1

# Units by column, for readers of the JSON lines header (the names carry them too).
UNITS: dict[str, str | None] = {
    "t_s": "s", "bandwidth_bps": "bit/s", "rtt_ms": "ms", "loss": "fraction", "jitter_ms": "ms",
    "cell": None, "lat_deg": "degree", "lon_deg": "degree", "state": None, "cross_bps": "bit/s",
    "queue_ms": "ms", "event": None,
}


def write_atomic(path: str | Path, write: Callable[[Path], None], *, force: bool = False) -> Path:
    """Call ``write(temporary_path)``, then rename the result to ``path``.

    Refuses an existing ``path`` unless ``force``; creates the folder; on failure leaves nothing behind.
    """
    path = Path(path)
    if path.is_dir():
        raise TracegenError("is a folder", path=path, hint="give a file name to write to")
    if path.exists() and not force:
        raise TracegenError("exists already", path=path, hint="pass --force to replace it")
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write(tmp)
        os.replace(tmp, path)
    except OSError as exc:
        _remove(tmp)
        raise TracegenError(f"cannot be written ({exc.strerror or exc})", path=path) from None
    except BaseException:
        _remove(tmp)
        raise
    return path


def _remove(tmp: Path) -> None:
    try:
        tmp.unlink(missing_ok=True)
    except OSError:   # e.g. its folder could not be made: there is nothing to remove
        pass


def write_parquet(trace: Trace, path: str | Path, *, force: bool = False) -> Path:
    """Write ``trace`` as Parquet (zstd) with its metadata; readable with :meth:`Trace.from_arrow`."""
    import pyarrow.parquet as pq

    table = trace.to_arrow()
    return write_atomic(path, lambda tmp: pq.write_table(table, tmp, compression="zstd"), force=force)


def write_csv(trace: Trace, path: str | Path, *, force: bool = False) -> Path:
    """Write ``trace`` as CSV: a header row of column names, empty cells for unknown."""
    import pyarrow.csv as pacsv

    table = trace.to_arrow().replace_schema_metadata(None)

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as out:
            out.write((",".join(table.column_names) + "\n").encode())  # names need no quoting
            pacsv.write_csv(table, out, pacsv.WriteOptions(include_header=False, quoting_style="needed"))

    return write_atomic(path, write, force=force)


def write_jsonl(trace: Trace, path: str | Path, *, force: bool = False) -> Path:
    """Write ``trace`` as JSON lines: the metadata line, then one object per sample (NaN as null)."""
    lines = json.dumps(jsonl_header(trace), sort_keys=True, allow_nan=False) + "\n" + jsonl_samples(trace)

    def write(tmp: Path) -> None:
        tmp.write_text(lines, encoding="utf-8")

    return write_atomic(path, write, force=force)


def jsonl_header(trace: Trace) -> dict[str, Any]:
    """The JSON lines metadata object: identity, provenance, shape and the columns with their units."""
    columns = [{"name": name, "type": COLUMNS[name][0], "unit": UNITS.get(name), "meaning": COLUMNS[name][1]}
               for name in trace.columns]
    return plain({"format": JSONL_FORMAT, "format_version": JSONL_FORMAT_VERSION,
                   "schema_version": SCHEMA_VERSION, "id": trace.id, "origin": trace.origin,
                   "source": trace.source, "group": trace.group, "tags": dict(trace.tags),
                   "step_s": trace.step_s, "duration_s": trace.duration_s, "weight": trace.weight,
                   "samples": len(trace), "provenance": dict(trace.provenance), "columns": columns})


def jsonl_samples(trace: Trace) -> str:
    """One JSON object per sample and line, built column by column (no Python pass per sample)."""
    names = trace.columns
    n = len(trace)
    width = 2 * len(names) + 1            # per line: key, value, key, value, ..., closing brace
    pieces: list[str] = [""] * (n * width)
    for j, name in enumerate(names):
        key = ("{" if j == 0 else ", ") + json.dumps(name) + ": "
        pieces[2 * j::width] = [key] * n
        pieces[2 * j + 1::width] = _json_tokens(trace, name)
    pieces[width - 1::width] = ["}\n"] * n
    return "".join(pieces)


def _json_tokens(trace: Trace, name: str) -> list[str]:
    """The JSON text of each value of one column: NaN and None become ``null``."""
    values = np.asarray(trace[name])
    if COLUMNS[name][0] == "float":
        bad = np.flatnonzero(np.isinf(values))
        if bad.size:
            i = int(bad[0])
            raise TracegenError(f"value {values[i]} at t = {trace['t_s'][i]:g} s has no JSON form",
                                path=trace.source or None, field=name,
                                hint="JSON has no infinity; fix the value or write Parquet instead")
        obj = values.astype(object)
        obj[np.isnan(values)] = None
        values = obj
    # json writes each item without a raw line break (strings escape theirs), so a line break is a
    # safe separator to cut the encoded list into its items.
    text = json.dumps(values.tolist(), separators=("\n", ": "), allow_nan=False)
    return text[1:-1].split("\n") if len(values) else []


__all__ = [
    "JSONL_FORMAT",
    "JSONL_FORMAT_VERSION",
    "UNITS",
    "jsonl_header",
    "jsonl_samples",
    "write_atomic",
    "write_csv",
    "write_jsonl",
    "write_parquet",
]
