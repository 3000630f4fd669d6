"""Per-packet arrival logs as delimited text (``--format packets``).

One packet per line; blank lines and lines starting with ``#`` are skipped. Cells are separated by
comma, semicolon, tab or whitespace: the delimiter is detected on the first line, and a line that holds
another delimiter is an error. The first line is a header when one of its cells is not a number.
Columns are chosen by option, each a 0-based column number ("0" is the first) or a header name:

- ``time_column`` (default "0"): arrival time, in ``time_unit`` (s, ms, us or ns; default s);
  non-decreasing (equal times allowed).
- ``bytes_column`` (default "1"): packet size in bytes (integer >= 0).
- ``seq_column`` (optional): packet sequence number (integer >= 0). Numbers are taken as they are
  unless ``seq_bits`` is 16 (RTP) or 32, in which case they wrap and are unwrapped.
- ``send_time_column`` (optional): sender timestamp in the same unit and clock offset as arrival;
  an empty cell means unknown.
Other columns are never read.

Output: one sample per bin of ``interval_s`` seconds (default 1 s) from the first arrival:
- ``bandwidth_bps`` = bytes arriving in the bin * 8 / interval (duplicates included: bytes on the wire).
- ``loss`` (with ``seq_column``) = missing / expected in the bin. A missing sequence number is placed
  in time between the arrivals of its received neighbours (linearly, so a long gap spreads over the bins
  it spans); expected = distinct numbers received in the bin + missing ones placed there. Unknown for a
  bin with neither, and without a sequence column.
- ``jitter_ms`` (with ``send_time_column``): the RFC 3550 appendix A.8 estimator on transit =
  arrival - send, run per packet in arrival order; each bin reports the value after its last packet
  with a known send time (unknown if none).
- ``rtt_ms`` unknown.
The last bin is usually partly covered: it is kept only if the last arrival lies in its second half
(at least half an interval covered), and its rate is over the full interval, so a kept last bin can
read low by up to half; a shorter one is dropped.

Personal data: only the chosen columns are read, so address, host or device columns in the file are
never stored; their names are listed by describe.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..jitter import interarrival_jitter
from ..privacy import is_personal_field
from ..trace import Trace
from ..units import TIME_UNITS, parse_duration_s
from .common import MAX_STEPS, Labels, build_trace, parse_floats, provenance, require_rows
from .textlines import iter_lines

OPTIONS: dict[str, Any] = {
    "time_column": "0", "bytes_column": "1", "time_unit": "s", "seq_column": None, "seq_bits": None,
    "send_time_column": None, "interval_s": 1.0,
}
PATTERNS: tuple[str, ...] = ("*.pkts", "*.pkts.csv", "*.packets.csv", "*.packets.txt")

DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab", None: "whitespace"}
MAX_BINS = MAX_STEPS  # 194 days of 1 s bins: bounds memory when a unit or interval is wrong
MAX_MISSING = 1 << 24  # missing sequence numbers; a bigger jump is a wrong column or seq_bits
EXACT_INT = 2**53  # larger integers are not exact in float64
_COLUMN_OPTIONS = ("time_column", "bytes_column", "seq_column", "send_time_column")


def _split(text: str, delim: str | None) -> list[str]:
    return [c.strip() for c in text.split(delim)] if delim else text.split()


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


class _Table:
    """The cells of the chosen columns, gathered while tokenising."""

    def __init__(self) -> None:
        self.n_lines = 0
        self.delim: str | None = None
        self.header: list[str] | None = None
        self.index: dict[str, int] = {}
        self.cells: dict[str, list[str]] = {}
        self.lines: list[int] = []


def _resolve(spec: Any, option: str, header: list[str] | None, ncols: int, path: str) -> int | None:
    if spec is None:
        return None
    text = str(spec).strip()
    if not isinstance(spec, bool) and text.isascii() and text.isdigit():
        i = int(text)
        if i >= ncols:
            raise InputError(f"column {i} does not exist: lines have {ncols} columns (numbered from 0)",
                             path=path, field=option)
        return i
    if header is None:
        raise InputError(f"names column '{text}' but the file has no header line", path=path, field=option,
                         hint="give a 0-based column number instead")
    if text in header:
        return header.index(text)
    folded = [h.lower() for h in header]
    if folded.count(text.lower()) == 1:
        return folded.index(text.lower())
    raise InputError(f"no column named '{text}'", path=path, field=option,
                     hint=f"the header has: {', '.join(header)}")


def _parse(path: Path, options: dict[str, Any]) -> _Table:
    where = str(path)
    tab = _Table()
    others: set[str] = set()
    wanted: list[tuple[str, int]] = []
    ncols = 0
    started = False
    for lineno, text in iter_lines(path):
        tab.n_lines = lineno
        s = text.strip()
        if not s or s.startswith("#"):
            continue
        if not started:
            found = [d for d in (",", ";", "\t") if d in s]
            if len(found) > 1:
                raise InputError(f"mixes delimiters ({' and '.join(DELIMITERS[d] for d in found)})",
                                 path=where, line=lineno, hint="use one delimiter throughout the file")
            tab.delim = found[0] if found else None
            others = {",", ";", "\t"} - {tab.delim} - ({"\t"} if tab.delim is None else set())
            cells = _split(s, tab.delim)
            ncols = len(cells)
            started = True
            if any(c and not _is_number(c) for c in cells):
                tab.header = cells
            for opt in _COLUMN_OPTIONS:
                i = _resolve(options.get(opt), opt, tab.header, ncols, where)
                if i is not None:
                    tab.index[opt] = i
                    tab.cells[opt] = []
                    wanted.append((opt, i))
            if tab.header is not None:
                continue
        else:
            bad = [d for d in others if d in s]
            if bad:
                raise InputError(f"holds a {DELIMITERS[bad[0]]} but the file is {DELIMITERS[tab.delim]}-delimited",
                                 path=where, line=lineno, hint="use one delimiter throughout the file")
            cells = _split(s, tab.delim)
        if len(cells) != ncols:
            raise InputError(f"has {len(cells)} fields, the first line has {ncols}", path=where, line=lineno,
                             hint="every line needs the same columns")
        for opt, i in wanted:
            tab.cells[opt].append(cells[i])
        tab.lines.append(lineno)
    require_rows(len(tab.lines), path, "packet lines")
    return tab


def _options(options: dict[str, Any]) -> tuple[float, float, int | None]:
    unit = options.get("time_unit") or "s"
    if unit not in TIME_UNITS:
        raise InputError(f"unknown time unit '{unit}'", field="time_unit",
                         hint=f"use one of: {', '.join(TIME_UNITS)}")
    given = options.get("interval_s")
    interval = parse_duration_s(1.0 if given is None else given, "interval_s")
    bits = options.get("seq_bits")
    if bits is not None:
        if str(bits).strip() not in ("16", "32"):
            raise InputError(f"seq_bits {bits!r} must be 16 or 32", field="seq_bits",
                             hint="16 for RTP sequence numbers; leave it out for numbers that do not wrap")
        bits = int(str(bits).strip())
    if bits is not None and options.get("seq_column") is None:
        raise InputError("seq_bits needs seq_column", field="seq_bits")
    return TIME_UNITS[unit], interval, bits


def _first_bad(mask: np.ndarray, lines: np.ndarray, path: Path, message, field: str, hint: str) -> None:
    bad = np.flatnonzero(mask)
    if bad.size:
        i = int(bad[0])
        raise InputError(message(i), path=str(path), line=int(lines[i]), field=field, hint=hint)


def _counts(values: np.ndarray, lines: np.ndarray, path: Path, field: str, what: str, hi: float) -> np.ndarray:
    """Check a column of non-negative integers below ``hi``; return it as int64."""
    _first_bad(np.isnan(values), lines, path, lambda i: f"{what} is missing", field, f"every packet needs its {what}")
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(values) | (values < 0) | (values >= hi) | (values != np.floor(values))
    _first_bad(bad, lines, path, lambda i: f"{what} {values[i]:g} is not an integer in 0..{hi - 1:.0f}", field,
               f"{what} is a whole number of at least 0")
    return values.astype(np.int64)


def _bins(path: Path, tab: _Table, scale: float, interval: float, bits: int | None) -> dict[str, Any]:
    lines = np.asarray(tab.lines, dtype=np.int64)
    opt = tab.index
    raw_t = parse_floats(tab.cells["time_column"], path=path, lines=lines, column="time_column")
    _first_bad(np.isnan(raw_t), lines, path, lambda i: "arrival time is missing", "time_column",
               "every packet needs an arrival time")
    _first_bad(np.isinf(raw_t), lines, path, lambda i: "arrival time is infinite", "time_column",
               "arrival times must be finite numbers")
    with np.errstate(over="ignore"):
        back = np.flatnonzero(np.diff(raw_t) < 0)
    if back.size:
        i = int(back[0]) + 1
        raise InputError(f"arrival time {raw_t[i]:g} is before the previous packet's ({raw_t[i - 1]:g})",
                         path=str(path), line=int(lines[i]), field="time_column",
                         hint="packets must be in arrival order; sort the file by arrival time")
    size = _counts(parse_floats(tab.cells["bytes_column"], path=path, lines=lines, column="bytes_column"),
                   lines, path, "bytes_column", "packet size", EXACT_INT)
    with np.errstate(over="ignore", invalid="ignore"):
        rel = (raw_t - raw_t[0]) * scale
    span = float(rel[-1])
    n_all = np.floor(span / interval + 1e-9) + 1 if np.isfinite(span) else np.inf
    if not n_all <= MAX_BINS:
        raise InputError(f"spans {span:g} s, more than {MAX_BINS} bins of {interval:g} s", path=str(path),
                         line=int(lines[-1]), field="time_column", hint="check --time-unit and --interval")
    n_all = int(n_all)
    covered = span - (n_all - 1) * interval
    n = n_all if covered >= interval * (0.5 - 1e-9) else n_all - 1
    if n == 0:
        raise InputError(f"covers {span:g} s, less than half of one {interval:g} s interval", path=str(path),
                         hint="use a smaller --interval")
    b = np.minimum(np.floor(rel / interval + 1e-9).astype(np.int64), n_all - 1)
    kept = b < n
    bandwidth = np.bincount(b[kept], weights=size[kept].astype(np.float64), minlength=n) * 8.0 / interval

    loss = np.full(n, np.nan)
    if "seq_column" in opt:
        seq = _counts(parse_floats(tab.cells["seq_column"], path=path, lines=lines, column="seq_column"),
                      lines, path, "seq_column", "sequence number", float(2**bits) if bits else EXACT_INT)
        if bits:
            mod = 1 << bits
            step = (np.diff(seq) + mod // 2) % mod - mod // 2
            seq = seq[0] + np.concatenate(([0], np.cumsum(step)))
        uniq, first = np.unique(seq, return_index=True)  # first arrival of each distinct number
        gaps = np.diff(uniq) - 1
        if gaps.sum() > MAX_MISSING:
            i = int(first[int(np.argmax(gaps)) + 1])
            raise InputError(f"sequence number jumps by {int(gaps.max()) + 1}", path=str(path),
                             line=int(lines[i]), field="seq_column",
                             hint="is seq_column the right column, and should seq_bits be 16?")
        gap_of = np.repeat(np.arange(gaps.size), gaps)
        k = np.arange(gap_of.size) - np.repeat(np.cumsum(gaps) - gaps, gaps) + 1  # 1..g within each gap
        t_lo, t_hi = rel[first[:-1]][gap_of], rel[first[1:]][gap_of]
        t_missing = t_lo + (t_hi - t_lo) * k / (gaps[gap_of] + 1)
        mb = np.clip(np.floor(t_missing / interval + 1e-9).astype(np.int64), 0, n_all - 1)
        rb = b[first]
        lost = np.bincount(mb[mb < n], minlength=n)
        got = np.bincount(rb[rb < n], minlength=n)
        with np.errstate(invalid="ignore", divide="ignore"):
            loss = np.where(lost + got > 0, lost / (lost + got), np.nan)

    jitter_ms = np.full(n, np.nan)
    if "send_time_column" in opt:
        send = parse_floats(tab.cells["send_time_column"], path=path, lines=lines, column="send_time_column")
        _first_bad(np.isinf(send), lines, path, lambda i: "send time is infinite", "send_time_column",
                   "leave the cell empty for unknown")
        with np.errstate(over="ignore", invalid="ignore"):
            transit = (raw_t - send) * scale  # difference first: both may be large clock readings
        _first_bad(np.isinf(transit), lines, path, lambda i: "arrival minus send time overflows",
                   "send_time_column", "is send_time_column in the same unit as the arrival time?")
        jit = interarrival_jitter(transit)
        known = np.flatnonzero(~np.isnan(jit) & kept)
        if known.size:
            kb = b[known]
            last = known[np.r_[kb[1:] != kb[:-1], True]]  # the last known packet of each bin
            jitter_ms[b[last]] = jit[last] * 1000.0

    if n == 1:  # after the columns' checks, which name a line
        raise InputError(f"covers {span:g} s, a single {interval:g} s interval", path=str(path),
                         line=int(lines[-1]), hint="use a smaller --interval: a trace needs at least two bins")
    # each bin names the line of its first packet (an empty bin: the previous bin's)
    bin_line = np.zeros(n, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, b[1:] != b[:-1]] & kept)
    bin_line[b[starts]] = lines[starts]
    bin_line = np.maximum.accumulate(bin_line)
    return {"t_s": np.arange(n) * interval, "lines": bin_line, "bandwidth_bps": bandwidth, "loss": loss,
            "jitter_ms": jitter_ms, "packets": int(kept.sum()), "bytes": float(size[kept].sum(dtype=np.float64)),
            "dropped_last_bin": n < n_all, "span_s": span, "interval_s": interval}


def _columns_used(tab: _Table) -> dict[str, Any]:
    return {opt: (tab.header[i] if tab.header else i) for opt, i in tab.index.items()}


def _traces(path: Path, labels: Labels, options: dict[str, Any]) -> tuple[_Table, dict[str, Any], Trace]:
    scale, interval, bits = _options(options)
    tab = _parse(path, options)
    c = _bins(path, tab, scale, interval, bits)
    prov = provenance(path, "packets", options, delimiter=DELIMITERS[tab.delim], header=tab.header is not None,
                      columns=_columns_used(tab), packets=c["packets"], dropped_last_bin=c["dropped_last_bin"])
    tr = build_trace(path, labels, prov, t_s=c["t_s"], lines=c["lines"], bandwidth_bps=c["bandwidth_bps"],
                     loss=c["loss"], jitter_ms=c["jitter_ms"])
    return tab, c, tr


def read(path: Path, labels: Labels, **options: Any) -> list[Trace]:
    """Read a per-packet arrival log into one Trace of fixed-width bins."""
    return [_traces(Path(path), labels, {**OPTIONS, **options})[2]]


def describe(path: Path, labels: Labels, **options: Any) -> str:
    """What :func:`read` would produce from ``path``, as text; nothing is stored."""
    tab, c, tr = _traces(Path(path), labels, {**OPTIONS, **options})
    out = [f"{Path(path).name}: packet log, {tab.n_lines} lines, {len(tab.lines)} packets, "
           f"{DELIMITERS[tab.delim]}-delimited, {'with' if tab.header else 'no'} header",
           f"  columns read: {', '.join(f'{k}={v}' for k, v in _columns_used(tab).items())}",
           f"  {c['span_s']:.6g} s of arrivals -> {len(tr)} bins of {c['interval_s']:g} s"
           + (" (last partial bin dropped)" if c["dropped_last_bin"] else ""),
           f"  {c['packets']} packets in the bins, {c['bytes']:.0f} bytes, mean {np.mean(tr['bandwidth_bps']):.6g} bit/s; columns: bandwidth_bps"
           + (", loss" if "seq_column" in tab.index else "")
           + (", jitter_ms" if "send_time_column" in tab.index else "")]
    personal = [h for h in (tab.header or []) if is_personal_field(h)]
    if personal:
        out.append(f"  personal columns not read: {', '.join(personal)}")
    return "\n".join(out)
