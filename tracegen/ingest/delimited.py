"""Delimited text logs (CSV, TSV, semicolon or pipe separated) of throughput and path figures.

The user maps columns to fields by option, by header name or by 0-based position; columns named as in
the Trace schema (``t_s``, ``bandwidth_bps``, ``rtt_ms``, ``loss``, ``jitter_ms``, ``cell``) are read
without options. Lines that are blank
or start with ``#`` are skipped. One delimiter per file: detected from the first line (``,`` tab ``;``
``|``) unless given; a row with a different number of fields than the first line is an error.

Times: ``s``, ``ms``, ``us``, ``ns`` (relative or epoch numbers) or ``iso8601`` calendar times (without a
zone they are taken as UTC). Bandwidth: ``bps``, ``kbps``, ``Mbps``, ``Gbps``, ``Bps``, ``kBps``, ``MBps``
(decimal prefixes), or ``bytes``: bytes received since the previous row (the row's time ends its
interval; the first row's interval is ``interval_s`` or the median spacing), converted to bit/s and
stamped at the interval's start. Loss: ``fraction`` or ``percent``. Delays: ``ms``, ``s``, ``us``.

Personal data: only mapped columns are read. Locations (``lat_column``/``lon_column``) are rounded to
0.01 degree, and a group or tag taken from a column whose name looks like an identifier (device, IMSI,
IP, ...) is replaced by a pseudonym, unless ``keep_personal``. Calendar start times are kept to the day.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import privacy, units
from ..errors import InputError
from ..trace import Trace
from .common import Labels, build_trace, parse_floats, provenance, require_rows
from .textlines import iter_lines

OPTIONS: dict[str, Any] = {
    "time_column": "t_s",
    "time_unit": "s",
    "bandwidth_column": "bandwidth_bps",
    "bandwidth_unit": "bps",
    "rtt_column": None,
    "rtt_unit": "ms",
    "loss_column": None,
    "loss_unit": "fraction",
    "jitter_column": None,
    "jitter_unit": "ms",
    "cell_column": None,
    "lat_column": None,
    "lon_column": None,
    "delimiter": None,
    "split_column": None,
    "tag_columns": (),
    "group_column": None,
    "interval_s": None,
}
PATTERNS = ("*.csv", "*.tsv")
_DELIMITERS = {",": ",", "tab": "\t", "\\t": "\t", "\t": "\t", ";": ";", "|": "|"}
_SCHEMA_NAMES = {"rtt_column": "rtt_ms", "loss_column": "loss", "jitter_column": "jitter_ms",
                 "cell_column": "cell"}
_FIELD_COLUMNS = ("time_column", "bandwidth_column", "rtt_column", "loss_column", "jitter_column",
                  "cell_column", "lat_column", "lon_column", "split_column", "group_column")


def _delimiter(first: str, given: str | None, path: Path, lineno: int) -> str:
    if given is not None:
        if given not in _DELIMITERS:
            raise InputError(f"unknown delimiter {given!r}", field="delimiter",
                             hint="use ',', 'tab', ';' or '|'")
        return _DELIMITERS[given]
    counts = {d: first.count(d) for d in (",", "\t", ";", "|")}
    present = sorted((c, d) for d, c in counts.items() if c)
    if not present:
        return ","  # a single column
    if len(present) > 1 and present[-1][0] == present[-2][0]:
        raise InputError("the first line mixes delimiters in equal numbers", path=str(path), line=lineno,
                         hint="say which with --delimiter")
    return present[-1][1]


def _split(line: str, delim: str) -> list[str]:
    if '"' not in line:
        return line.split(delim)
    return next(csv.reader([line], delimiter=delim))


def _resolve(name: str | None, header: list[str] | None, option: str, path: Path, width: int) -> int | None:
    if name is None:
        return None
    if header is not None and name in header:
        return header.index(name)
    if str(name).isdigit() and int(name) < width:
        return int(name)
    known = ", ".join(header) if header else f"positions 0..{width - 1}"
    raise InputError(f"no column '{name}'", path=str(path), line=1 if header else None, field=option,
                     hint=f"the file has: {known}")


class _Table:
    """The mapped columns of a delimited file, as text cells with their line numbers."""

    def __init__(self, path: Path, options: dict[str, Any]):
        self.path = path
        wanted = {opt: options[opt] for opt in _FIELD_COLUMNS if options.get(opt) is not None}
        tag_columns = tuple(options.get("tag_columns") or ())
        rows = iter((n, s) for n, s in iter_lines(path) if s.strip() and not s.lstrip().startswith("#"))
        first = next(rows, None)
        if first is None:
            raise InputError("is empty", path=str(path), hint="the file holds no header and no rows")
        lineno, text = first
        self.delimiter = _delimiter(text, options.get("delimiter"), path, lineno)
        cells = [c.strip() for c in _split(text, self.delimiter)]
        self.width = len(cells)
        names = list(wanted.values()) + list(tag_columns)
        by_name = any(not str(n).isdigit() for n in names)
        self.header: list[str] | None = cells if by_name or not _looks_numeric(cells) else None
        self.header_line = lineno if self.header is not None else None
        if self.header is not None:  # our own schema's column names are read without being asked for
            for opt, name in _SCHEMA_NAMES.items():
                if options.get(opt) is None and name in self.header:
                    wanted[opt] = name
        self.index = {opt: _resolve(name, self.header, opt, path, self.width) for opt, name in wanted.items()}
        self.tag_index = {name: _resolve(name, self.header, "tag_columns", path, self.width)
                          for name in tag_columns}
        keep = sorted(set(self.index.values()) | set(self.tag_index.values()))
        self.cells: dict[int, list[str]] = {i: [] for i in keep}
        line_numbers: list[int] = []
        pending = [] if self.header is not None else [first]
        for lineno, text in _chain(pending, rows):
            parts = _split(text, self.delimiter)
            if len(parts) != self.width:
                raise InputError(f"has {len(parts)} fields where the first line has {self.width}",
                                 path=str(path), line=lineno,
                                 hint="mixed delimiters or a stray delimiter? set --delimiter or fix the row")
            for i in keep:
                self.cells[i].append(parts[i])
            line_numbers.append(lineno)
        self.lines = np.asarray(line_numbers, dtype=np.int64)
        require_rows(len(self.lines), path)

    def column(self, option: str) -> list[str] | None:
        i = self.index.get(option)
        return None if i is None else self.cells[i]

    def name(self, option: str) -> str:
        """The header name (else the position) of the column mapped to ``option``."""
        return self.header[self.index[option]] if self.header else str(self.index[option])

    def floats(self, option: str, scale: float = 1.0) -> np.ndarray | None:
        col = self.column(option)
        if col is None:
            return None
        return parse_floats(col, path=self.path, lines=self.lines, column=self.name(option)) * scale

    def ignored(self) -> list[str]:
        used = set(self.index.values()) | set(self.tag_index.values())
        names = self.header or [str(i) for i in range(self.width)]
        return [n for i, n in enumerate(names) if i not in used]


def _chain(first: list, rest):
    yield from first
    yield from rest


def _looks_numeric(cells: list[str]) -> bool:
    try:
        [float(c) for c in cells if c]
        return True
    except ValueError:
        return False


def _times(table: _Table, unit: str) -> tuple[np.ndarray, str | None]:
    """Seconds since the first row, and the calendar start (ISO text) when times are calendar times."""
    col = table.column("time_column")
    name = table.header[table.index["time_column"]] if table.header else "time"
    if unit != units.ISO8601:
        whole = _whole_numbers(col)
        if whole is not None:  # differences first, exactly: epoch nanoseconds need more than float64's 53 bits
            return (whole - whole[0]).astype(np.float64) * units.time_scale_s(unit), None
        t = parse_floats(col, path=table.path, lines=table.lines, column=name) * units.time_scale_s(unit)
        return t, None
    stamps = pd.to_datetime(pd.Series(col, dtype="string").str.strip(), format="ISO8601", utc=True,
                            errors="coerce")
    bad = np.flatnonzero(stamps.isna().to_numpy())
    if bad.size:
        i = int(bad[0])
        raise InputError(f"'{col[i][:40]}' is not an ISO 8601 time", path=str(table.path),
                         line=int(table.lines[i]), field=name, hint="e.g. 2026-03-01T12:00:00.250Z")
    seconds = (stamps - stamps.iloc[0]).dt.total_seconds().to_numpy(dtype=np.float64)
    return seconds, stamps.iloc[0].isoformat()


def _whole_numbers(cells: list[str]) -> np.ndarray | None:
    """The cells as int64 when every one is an integer whose differences fit int64, else None."""
    try:
        whole = np.asarray(cells, dtype=str).astype(np.int64)
    except (ValueError, OverflowError):
        return None
    return whole if whole.min() > -2**62 and whole.max() < 2**62 else None


def _check_loss(loss: np.ndarray, unit: str, table: _Table) -> None:
    """Loss as given in the file must lie in 0..1 (fraction) or 0..100 (percent)."""
    top = 100.0 if unit == "percent" else 1.0
    with np.errstate(invalid="ignore"):
        bad = np.flatnonzero((loss < 0) | (loss > top))
    if bad.size:
        i = int(bad[0])
        hint = ("with --loss-unit percent, loss is 0..100; is --loss-column the right column?" if unit == "percent"
                else "loss is a fraction here; if the file has percent, give --loss-unit percent")
        raise InputError(f"loss {loss[i]:g} is outside 0..{top:g}", path=str(table.path), line=int(table.lines[i]),
                         field=table.name("loss_column"), hint=hint)


def _parts(table: _Table) -> list[tuple[str | None, np.ndarray]]:
    col = table.column("split_column")
    if col is None:
        return [(None, np.arange(len(table.lines)))]
    values = np.asarray([c.strip() for c in col], dtype=object)
    order, first = np.unique(values, return_index=True)
    out = []
    for value in order[np.argsort(first)]:
        out.append((str(value), np.flatnonzero(values == value)))
    return out


def _read(path: Path, labels: Labels, options: dict[str, Any]) -> tuple[list[Trace], _Table]:
    units.check_bandwidth_unit(options["bandwidth_unit"])
    if options["time_unit"] != units.ISO8601:
        units.time_scale_s(options["time_unit"])
    rtt_scale = units.delay_scale_ms(options["rtt_unit"], "rtt unit")
    jitter_scale = units.delay_scale_ms(options["jitter_unit"], "jitter unit")
    loss_scale = units.loss_scale(options["loss_unit"])
    interval = None if options["interval_s"] is None else units.parse_duration_s(options["interval_s"], "interval")
    table = _Table(path, options)
    t_all, start = _times(table, options["time_unit"])
    bw_unit = options["bandwidth_unit"]
    bw_raw = table.floats("bandwidth_column", 1.0)
    if bw_raw is None:
        raise InputError("no bandwidth column given", path=str(path), field="bandwidth_column")
    rtt = table.floats("rtt_column", rtt_scale)
    loss = table.floats("loss_column")
    if loss is not None:
        _check_loss(loss, options["loss_unit"], table)
        loss = loss * loss_scale
    jitter = table.floats("jitter_column", jitter_scale)
    lat = table.floats("lat_column")
    lon = table.floats("lon_column")
    if not labels.keep_personal:
        lat = None if lat is None else privacy.coarsen_degrees(lat)
        lon = None if lon is None else privacy.coarsen_degrees(lon)
    cells = table.column("cell_column")
    groups = table.column("group_column")
    shown = {k: v for k, v in options.items() if v not in (None, ())}
    prov = provenance(path, "csv", shown, delimiter=table.delimiter,
                      columns_not_read=table.ignored())
    if start is not None:
        prov["calendar_start"] = privacy.calendar_start(start, labels.keep_personal)

    traces = []
    for part, rows in _parts(table):
        with np.errstate(invalid="ignore"):
            t = t_all[rows] - t_all[rows[0]]
        lines = table.lines[rows]
        bw = bw_raw[rows]
        if all(np.isnan(a[rows]).all() for a in (bw_raw, rtt, loss, jitter) if a is not None):
            # no data at all (RTT or loss without bandwidth is data, as from ping)
            which = "" if part is None else f" ({options['split_column']}={part})"
            also = [table.name(o) for o in ("rtt_column", "loss_column", "jitter_column") if o in table.index]
            raise InputError(f"bandwidth is empty on every row{which}"
                             + (f", and so {'is' if len(also) == 1 else 'are'} {', '.join(also)}" if also else ""),
                             path=str(path), line=int(lines[0]), field=table.name("bandwidth_column"),
                             hint="is --bandwidth-column the right column? a trace needs measured values")
        if bw_unit == units.BYTES_PER_INTERVAL:
            t, bw = _bytes_to_rate(t, bw, interval, path, lines)
        else:
            bw = units.bandwidth_to_bps(bw, bw_unit)
        tags = {name: privacy.identifier(table.cells[i][rows[0]].strip(), name, labels.keep_personal)
                for name, i in table.tag_index.items()}
        group = None
        if groups is not None:
            group_name = table.header[table.index["group_column"]] if table.header else "group"
            values = np.asarray([g.strip() for g in np.asarray(groups, dtype=object)[rows]], dtype=object)
            other = np.flatnonzero(values != values[0])
            if other.size:  # one trace cannot belong to two groups: a leak-free split would be wrong
                raise InputError(f"changes from '{values[0]}' to '{values[other[0]]}' within one trace",
                                 path=str(path), line=int(lines[other[0]]), field=group_name,
                                 hint=f"cut the file into one trace per value with --split-column {group_name}")
            group = privacy.identifier(values[0], group_name, labels.keep_personal)
        pick = (lambda a: None if a is None else a[rows])
        if part is not None:
            part = privacy.identifier(part, table.name("split_column"), labels.keep_personal)
        traces.append(build_trace(
            path, labels, prov, t_s=t, lines=lines, part=None if part is None else f"{options['split_column']}={part}",
            extra_tags=tags, group=group, time_field=table.name("time_column"), bandwidth_bps=bw,
            rtt_ms=pick(rtt), loss=pick(loss), jitter_ms=pick(jitter), lat_deg=pick(lat), lon_deg=pick(lon),
            cell=None if cells is None else [c.strip() or None for c in np.asarray(cells, dtype=object)[rows]]))
    return traces, table


def _bytes_to_rate(t: np.ndarray, counted: np.ndarray, interval: float | None, path: Path,
                   lines: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bytes since the previous row -> bit/s, stamped at each interval's start."""
    dt = np.diff(t)
    if len(t) < 2 and interval is None:
        raise InputError("one row of bytes per interval has no interval", path=str(path), line=int(lines[0]),
                         field="interval_s", hint="give --interval")
    if dt.size and np.any(dt <= 0):
        i = int(np.flatnonzero(dt <= 0)[0]) + 1
        raise InputError("time does not increase", path=str(path), line=int(lines[i]), field="time",
                         hint="times must strictly increase")
    first = interval if interval is not None else float(np.median(dt))
    widths = np.concatenate(([first], dt))
    bps = units.bandwidth_to_bps(counted, units.BYTES_PER_INTERVAL, widths)
    begin = t - widths
    return begin - begin[0], bps


def read(path: Path, labels: Labels, **options: Any) -> list[Trace]:
    """Read a delimited log into one Trace (or one per ``split_column`` value)."""
    return _read(path, labels, options)[0]


def describe(path: Path, labels: Labels, **options: Any) -> str:
    """What :func:`read` would make of the file, without storing anything."""
    traces, table = _read(path, labels, options)
    names = table.header or [str(i) for i in range(table.width)]
    delim = {"\t": "tab"}.get(table.delimiter, table.delimiter)
    out = [f"{path}: {len(table.lines)} data rows, delimiter '{delim}', "
           f"{'header on line ' + str(table.header_line) if table.header else 'no header'}"]
    for opt, i in table.index.items():
        unit_opt = opt.replace("_column", "_unit")
        unit = f" ({options[unit_opt]})" if unit_opt in options else ""
        out.append(f"  {names[i]!r} -> {opt.replace('_column', '')}{unit}")
    for name in table.tag_index:
        out.append(f"  {name!r} -> tag")
    skipped = table.ignored()
    if skipped:
        personal = [n for n in skipped if privacy.is_personal_field(n)]
        out.append(f"  not read: {', '.join(skipped)}"
                   + (f" (personal-looking: {', '.join(personal)})" if personal else ""))
    if not labels.keep_personal and (table.index.get("lat_column") is not None):
        out.append(f"  locations rounded to {privacy.LOCATION_DECIMALS} decimals (use --keep-personal to keep)")
    for tr in traces:
        s = tr.summary()
        out.append(f"  trace {tr.id} source={tr.source} group={tr.group}: {len(tr)} samples, "
                   f"{tr.duration_s:.1f} s, step {tr.step_s:g} s, mean {s['mean_bw_bps'] / 1e6:.3f} Mbit/s")
    return "\n".join(out)
