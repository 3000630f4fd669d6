"""RTCP receiver-report logs as JSON lines (``--format rtcp``).

One JSON object per line, one reception report block (RFC 3550 section 6.4) as received by the media
sender. Blank lines and lines starting with ``#`` are skipped. Keys (a key with value ``null`` counts as
absent; integers must be JSON integers):

- ``arrival_ntp``: 64-bit NTP timestamp at which the report arrived (integer), or
- ``arrival_s``: the same as Unix seconds (number, 0 <= x < 2^32). Exactly one of the two is required.
- ``ssrc``: the reporting source (integer 0..2^32-1). A log with several SSRCs gives one trace per SSRC
  (part ``ssrc-<8 hex digits>``); if any line has one, every line must.
- ``fraction_lost``: 8-bit fixed-point loss fraction, 0..255.
- ``cumulative_lost``: 24-bit signed packet count, -8388608..8388607.
- ``ext_highest_seq``: extended highest sequence number received, 0..2^32-1, non-decreasing per SSRC.
- ``jitter``: interarrival jitter in RTP timestamp units, 0..2^32-1.
- ``clock_rate_hz``: RTP clock rate (number > 0); per line, else the reader option ``clock_rate_hz``.
  Required when ``jitter`` is present.
- ``lsr``: middle 32 bits of the last sender report's NTP timestamp, 0..2^32-1 (0 = no SR yet).
- ``dlsr``: delay since that SR, units of 1/65536 s, 0..2^32-1. ``lsr`` and ``dlsr`` come together.
- ``bandwidth_bps``: a receive-rate estimate from the logger, if it has one (number >= 0).
Other keys are ignored.

What is computed, per SSRC:
- ``t_s``: arrival time minus the first arrival; must strictly increase.
- ``rtt_ms``: (A - LSR - DLSR) mod 2^32 in 1/65536 s (RFC 3550 section 6.4.1), A being the middle 32
  bits of the arrival NTP time. Unknown when LSR is 0, and when the difference is 0 (below the
  1/65536 s resolution). A difference that is negative as a signed 32-bit number is an error.
- ``loss``: from consecutive reports, (delta cumulative_lost) / (delta ext_highest_seq), clipped to 0..1
  (RFC 3550 appendix A.3); ``fraction_lost / 256`` for the first report, when the sequence did not
  advance, or when either report lacks the counts. A report's loss covers the interval since the
  previous report, so it is stored on the previous report's sample (a Trace rate holds from its time
  on): the first report's figure (about the time before the log starts) is dropped and the last
  sample's loss is unknown.
- ``jitter_ms``: jitter / clock rate * 1000.
- ``bandwidth_bps``: copied from the key (moved to the interval's start like loss), else unknown.

Personal data: keys that look personal (``cname``, addresses, host names, device or user ids, ...) are
never stored; only their names are listed in provenance. With ``keep_personal`` their distinct values
go into provenance under ``personal``.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..privacy import is_personal_field
from ..trace import Trace
from .common import Labels, build_trace, provenance, require_rows
from .textlines import iter_lines

OPTIONS: dict[str, Any] = {"clock_rate_hz": None}
PATTERNS: tuple[str, ...] = ("*.jsonl", "*.ndjson", "*.rtcp.json")

NTP_UNIX_OFFSET_S = 2208988800  # seconds from 1900-01-01 (NTP era 0) to 1970-01-01 (RFC 868)
_U32 = 2**32 - 1

_INT_KEYS: dict[str, tuple[int, int, str]] = {
    "arrival_ntp": (0, 2**64 - 1, "the 64-bit NTP timestamp of the report's arrival"),
    "ssrc": (0, _U32, "the 32-bit SSRC of the reporting source"),
    "fraction_lost": (0, 255, "the 8-bit fixed-point fraction lost (256 = 100%)"),
    "cumulative_lost": (-(2**23), 2**23 - 1, "the 24-bit signed cumulative number of packets lost"),
    "ext_highest_seq": (0, _U32, "the 32-bit extended highest sequence number received"),
    "jitter": (0, _U32, "the 32-bit interarrival jitter in RTP timestamp units"),
    "lsr": (0, _U32, "the middle 32 bits of the last SR's NTP timestamp"),
    "dlsr": (0, _U32, "the 32-bit delay since the last SR in units of 1/65536 s"),
}
# name -> (lower bound, lower bound allowed, upper bound exclusive or None, meaning)
_NUM_KEYS: dict[str, tuple[float, bool, float | None, str]] = {
    "arrival_s": (0.0, True, float(2**32), "arrival time in Unix seconds"),
    "clock_rate_hz": (0.0, False, None, "the RTP clock rate in Hz"),
    "bandwidth_bps": (0.0, True, None, "a receive-rate estimate in bit/s"),
}
KEYS = tuple(_INT_KEYS) + tuple(_NUM_KEYS)


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not a JSON number")


def _int_value(value: Any, key: str, path: str, line: int) -> int:
    lo, hi, meaning = _INT_KEYS[key]
    if isinstance(value, bool) or not isinstance(value, int):
        raise InputError(f"{_show(value)} is not an integer", path=path, line=line, field=key,
                         hint=f"{key} is {meaning}, a JSON integer")
    if not lo <= value <= hi:
        raise InputError(f"{_show(value)} is outside {lo}..{hi}", path=path, line=line, field=key,
                         hint=f"{key} is {meaning}")
    return value


def _num_value(value: Any, key: str, path: str, line: int) -> float:
    lo, lo_ok, hi, meaning = _NUM_KEYS[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(f"{_show(value)} is not a number", path=path, line=line, field=key,
                         hint=f"{key} is {meaning}")
    x = float(value) if not isinstance(value, int) or abs(value) < 2**1000 else math.inf
    ok = math.isfinite(x) and (x >= lo if lo_ok else x > lo) and (hi is None or x < hi)
    if not ok:
        bound = f"{'>=' if lo_ok else '>'} {lo:g}" + ("" if hi is None else f" and < {hi:g}")
        raise InputError(f"{_show(value)} is not a finite number {bound}", path=path, line=line,
                         field=key, hint=f"{key} is {meaning}")
    return x


def _show(value: Any) -> str:
    text = json.dumps(value) if not isinstance(value, float) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


class _Records:
    """Columns collected from the report lines (None where a key is absent)."""

    def __init__(self) -> None:
        self.lines: list[int] = []
        self.values: dict[str, list[Any]] = {k: [] for k in KEYS}
        self.ignored: set[str] = set()
        self.personal_keys: set[str] = set()
        self.personal: list[dict[str, Any]] = []
        self.n_lines = 0


def _parse(path: Path, keep_personal: bool) -> _Records:
    rec = _Records()
    where = str(path)
    for lineno, text in iter_lines(path):
        rec.n_lines = lineno
        s = text.strip()
        if not s or s.startswith("#"):
            continue
        try:
            obj = json.loads(s, parse_constant=_reject_constant)
        except RecursionError:
            raise InputError("JSON is nested too deeply", path=where, line=lineno,
                             hint="each line must be one flat JSON object") from None
        except ValueError as exc:
            why = f"{exc.msg} at column {exc.colno}" if isinstance(exc, json.JSONDecodeError) else str(exc)
            raise InputError(f"is not valid JSON ({why})", path=where, line=lineno,
                             hint="each line must be one JSON object; comment lines start with #") from None
        if not isinstance(obj, dict):
            raise InputError(f"is a JSON {type(obj).__name__}, not an object", path=where, line=lineno,
                             hint="each line must be one JSON object such as {\"arrival_s\": ...}")
        row = {k: obj.get(k) for k in KEYS}
        if row["arrival_ntp"] is None and row["arrival_s"] is None:
            raise InputError("has no arrival time", path=where, line=lineno, field="arrival_ntp",
                             hint="every report needs arrival_ntp (NTP timestamp) or arrival_s (Unix seconds)")
        if row["arrival_ntp"] is not None and row["arrival_s"] is not None:
            raise InputError("has both arrival_ntp and arrival_s", path=where, line=lineno,
                             field="arrival_s", hint="give one arrival time per report")
        for key, value in row.items():
            if value is not None:
                row[key] = (_int_value if key in _INT_KEYS else _num_value)(value, key, where, lineno)
        rec.lines.append(lineno)
        for key, value in row.items():
            rec.values[key].append(value)
        extra = {k: v for k, v in obj.items() if k not in row}
        personal = {k: v for k, v in extra.items() if is_personal_field(k)}
        rec.personal_keys.update(personal)
        rec.ignored.update(k for k in extra if k not in personal)
        if keep_personal:
            rec.personal.append(personal)
    require_rows(len(rec.lines), path, "RTCP reports")
    return rec


def _column(values: list[Any], dtype: type) -> tuple[np.ndarray, np.ndarray]:
    """Values and a presence mask (absent values become 0)."""
    has = np.array([v is not None for v in values], dtype=bool)
    return np.array([0 if v is None else v for v in values], dtype=dtype), has


def _fail_at(mask: np.ndarray, lines: np.ndarray, path: Path, message: Any, field: str, hint: str) -> None:
    bad = np.flatnonzero(mask)
    if bad.size:
        i = int(bad[0])
        text = message(i) if callable(message) else message
        raise InputError(text, path=str(path), line=int(lines[i]), field=field, hint=hint)


def _clock_rate(option: Any) -> float | None:
    if option is None:
        return None
    try:
        rate = float(option)
    except (TypeError, ValueError):
        raise InputError(f"'{option}' is not a number", field="clock_rate_hz",
                         hint="give the RTP clock rate in Hz, e.g. 90000 for video, 48000 for Opus") from None
    if isinstance(option, bool) or not (math.isfinite(rate) and rate > 0):
        raise InputError(f"clock rate {option!r} must be a positive number", field="clock_rate_hz")
    return rate


def _compute(path: Path, rec: _Records, clock_rate_hz: float | None) -> list[dict[str, Any]]:
    """Per-SSRC columns: one dict per SSRC with t_s, rtt_ms, loss, jitter_ms, bandwidth_bps, lines."""
    v = rec.values
    lines = np.asarray(rec.lines, dtype=np.int64)
    ntp, has_ntp = _column(v["arrival_ntp"], np.uint64)
    unix = np.array([np.nan if x is None else x for x in v["arrival_s"]], dtype=np.float64)
    # one clock for both ways of giving the arrival: integer NTP seconds and 32-bit fraction
    whole = np.floor(np.where(has_ntp, 0.0, unix))
    frac_s = np.round((np.where(has_ntp, 0.0, unix) - whole) * 2.0**32).astype(np.int64)
    carry = frac_s >> 32
    sec = np.where(has_ntp, (ntp >> np.uint64(32)).astype(np.int64),
                   whole.astype(np.int64) + carry + NTP_UNIX_OFFSET_S)
    frac = np.where(has_ntp, (ntp & np.uint64(_U32)).astype(np.int64), frac_s & _U32)
    middle = ((sec & 0xFFFF) << 16) | (frac >> 16)  # A: NTP short format, 16.16 fixed point

    ssrc, has_ssrc = _column(v["ssrc"], np.int64)
    if has_ssrc.any():
        _fail_at(~has_ssrc, lines, path, "has no ssrc while other lines do", "ssrc",
                 "give every report its ssrc, or none of them")
    lsr, has_lsr = _column(v["lsr"], np.int64)
    dlsr, has_dlsr = _column(v["dlsr"], np.int64)
    _fail_at(has_lsr & ~has_dlsr, lines, path, "has lsr but no dlsr", "dlsr",
             "RTT needs both lsr and dlsr from the same report block")
    _fail_at(has_dlsr & ~has_lsr, lines, path, "has dlsr but no lsr", "lsr",
             "RTT needs both lsr and dlsr from the same report block")
    with_sr = has_lsr & (lsr != 0)
    delay = (middle - lsr - dlsr) & _U32
    _fail_at(with_sr & (delay >= 2**31), lines, path,
             lambda i: f"DLSR {dlsr[i] / 65536:.6g} s ends after the report arrived "
                       f"(A - LSR - DLSR = {(int(delay[i]) - 2**32) / 65536:.6g} s)", "dlsr",
             "the arrival time, lsr or dlsr is wrong; arrival must be the time this report was received")
    rtt_ms = np.where(with_sr & (delay > 0), delay / 65536.0 * 1000.0, np.nan)

    jitter, has_jitter = _column(v["jitter"], np.float64)
    rate_line = np.array([np.nan if x is None else x for x in v["clock_rate_hz"]], dtype=np.float64)
    rate = np.where(np.isnan(rate_line), np.nan if clock_rate_hz is None else clock_rate_hz, rate_line)
    _fail_at(has_jitter & np.isnan(rate), lines, path, "jitter needs an RTP clock rate", "clock_rate_hz",
             "add clock_rate_hz to the line or pass --clock-rate-hz, e.g. 90000 for video, 48000 for Opus")
    jitter_ms = np.where(has_jitter, jitter / rate * 1000.0, np.nan)

    fraction, has_fraction = _column(v["fraction_lost"], np.float64)
    cum, has_cum = _column(v["cumulative_lost"], np.int64)
    ext, has_ext = _column(v["ext_highest_seq"], np.int64)
    bandwidth = np.array([np.nan if x is None else x for x in v["bandwidth_bps"]], dtype=np.float64)
    field_arrival = np.where(has_ntp, "arrival_ntp", "arrival_s")

    keys, first, inverse = np.unique(ssrc, return_index=True, return_inverse=True)
    out = []
    for g in np.argsort(first):  # one pass per SSRC, in order of first appearance
        idx = np.flatnonzero(inverse == g)
        ln = lines[idx]
        t = (sec[idx] - sec[idx[0]]) + (frac[idx] - frac[idx[0]]) / 2.0**32
        back = np.diff(t) <= 0
        if back.any():
            i = int(np.flatnonzero(back)[0]) + 1
            what = "repeats" if t[i] == t[i - 1] else "is before"
            raise InputError(f"arrival time {what} the previous report's (line {ln[i - 1]})", path=str(path),
                             line=int(ln[i]), field=str(field_arrival[idx[i]]),
                             hint="reports of one SSRC must be in arrival order, one per arrival")
        known = np.flatnonzero(has_ext[idx])
        down = np.diff(ext[idx][known]) < 0
        if down.any():
            i = int(known[np.flatnonzero(down)[0] + 1])
            raise InputError(f"ext_highest_seq {ext[idx][i]} is below the previous report's", path=str(path),
                             line=int(ln[i]), field="ext_highest_seq",
                             hint="the extended highest sequence number never decreases within one SSRC")
        loss = np.where(has_fraction[idx], fraction[idx] / 256.0, np.nan)
        both = has_cum[idx] & has_ext[idx]
        pair = both[1:] & both[:-1]
        d_seq = np.diff(ext[idx])
        d_lost = np.diff(cum[idx])
        with np.errstate(divide="ignore", invalid="ignore"):
            interval = np.clip(d_lost / d_seq, 0.0, 1.0)
        loss[1:] = np.where(pair & (d_seq > 0), interval, loss[1:])
        out.append({
            "ssrc": int(keys[g]) if has_ssrc.any() else None,
            "rows": idx, "t_s": t, "lines": ln, "rtt_ms": rtt_ms[idx], "loss": _to_interval_start(loss),
            "jitter_ms": jitter_ms[idx], "bandwidth_bps": _to_interval_start(bandwidth[idx]),
        })
    return out


def _to_interval_start(per_report: np.ndarray) -> np.ndarray:
    """A report's figure covers the interval since the previous report; a Trace rate holds from its
    sample's time on. So report i's figure goes to sample i-1; the last sample's interval is unknown."""
    out = np.full(len(per_report), np.nan)
    out[:-1] = per_report[1:]
    return out


def _personal_values(rec: _Records, rows: np.ndarray) -> dict[str, list[str]]:
    seen: dict[str, set[str]] = {}
    for i in rows:  # only with keep_personal: gathering strings, no computation
        for k, val in rec.personal[i].items():
            seen.setdefault(k, set()).add(val if isinstance(val, str) else json.dumps(val, sort_keys=True))
    return {k: sorted(vals) for k, vals in sorted(seen.items())}


def _traces(path: Path, labels: Labels, options: dict[str, Any]) -> tuple[_Records, list[dict], list[Trace]]:
    rate = _clock_rate(options.get("clock_rate_hz"))
    rec = _parse(path, labels.keep_personal)
    parts = _compute(path, rec, rate)
    traces = []
    for p in parts:
        part = None if p["ssrc"] is None else f"ssrc-{p['ssrc']:08x}"
        extra: dict[str, Any] = {"reports": int(len(p["rows"])),
                                 "ignored_keys": sorted(rec.ignored),
                                 "dropped_personal_keys": [] if labels.keep_personal else sorted(rec.personal_keys)}
        personal = _personal_values(rec, p["rows"]) if labels.keep_personal else {}
        if personal:
            extra["personal"] = personal
        prov = provenance(path, "rtcp", {"clock_rate_hz": rate}, **extra)
        traces.append(build_trace(path, labels, prov, t_s=p["t_s"], lines=p["lines"], part=part,
                                  bandwidth_bps=p["bandwidth_bps"], rtt_ms=p["rtt_ms"], loss=p["loss"],
                                  jitter_ms=p["jitter_ms"]))
    return rec, parts, traces


def read(path: Path, labels: Labels, **options: Any) -> list[Trace]:
    """Read an RTCP receiver-report JSON-lines log: one Trace per SSRC."""
    return _traces(Path(path), labels, options)[2]


def describe(path: Path, labels: Labels, **options: Any) -> str:
    """What :func:`read` would produce from ``path``, as text; nothing is stored."""
    rec, parts, traces = _traces(Path(path), labels, options)
    out = [f"{Path(path).name}: RTCP receiver reports, {rec.n_lines} lines, {len(rec.lines)} reports, "
           f"{len(traces)} trace(s)"]
    for p, tr in zip(parts, traces):
        name = "no ssrc" if p["ssrc"] is None else f"ssrc 0x{p['ssrc']:08x}"
        cols = [c for c in ("bandwidth_bps", "rtt_ms", "loss", "jitter_ms") if not np.isnan(tr[c]).all()]
        out.append(f"  {name}: {len(tr)} reports over {tr['t_s'][-1]:.3f} s; columns: "
                   f"{', '.join(cols) or 'none known'}")
    if rec.ignored:
        out.append(f"  keys ignored: {', '.join(sorted(rec.ignored))}")
    if rec.personal_keys:
        fate = "kept in provenance (keep_personal)" if labels.keep_personal else "dropped"
        out.append(f"  personal keys {fate}: {', '.join(sorted(rec.personal_keys))}")
    return "\n".join(out)
