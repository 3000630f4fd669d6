"""Linux iputils ping transcripts (``--format ping``).

Reads what ``ping`` prints: the ``PING host (address) ...`` header, echo replies
(``64 bytes from ...: icmp_seq=N ttl=T time=X ms``), each optionally prefixed by ``[unix seconds]``
(``-D``), error replies (``From ... icmp_seq=N <message>``), ``no answer yet for icmp_seq=N`` (``-O``),
``Request timeout for icmp_seq N``, and the closing statistics. ``(DUP!)`` replies are ignored, and so
are ``(BAD CHECKSUM)`` replies, which ping itself does not count as received. Lines starting with
``ping:``, ``Warning:``/``WARNING:`` or ``#``, ``wrong data byte`` reports and progress lines
(``N/M packets, ...``) are skipped; any other line is an error. Each ``PING`` header starts a new run
(one trace each, part ``run-<k>`` when a file holds several).

One sample per probe sequence number, from the first seen (from 1, as ping numbers its probes, when
the statistics give ``N packets transmitted``; then up to N) to the last:
- ``t_s`` = (seq - first seq) * interval. The interval is the option ``interval_s``; without it, the
  median of (time difference / sequence difference) between consecutive replies' ``-D`` timestamps;
  without those, 1 s (ping's default). icmp_seq is 16-bit and wraps 65535 -> 0; it is unwrapped.
- ``rtt_ms`` from the reply, unknown for a probe without one (and for ``time=0.000 ms``, below
  ping's 1 us resolution).
- ``loss`` 0 for an answered probe, 1 for a probe slot without a reply.
- ``jitter_ms``: the RFC 3550 appendix A.8 estimator run on the RTT series of answered probes. Ping has
  no one-way times, so this is RTT variation used as a proxy for one-way transit variation.
- ``bandwidth_bps`` unknown.

Personal data: the destination host name and address (header, replies, statistics) and the addresses
in error replies are never stored, and ``-D`` calendar times are kept to the day. With
``keep_personal`` the header line goes into provenance as ``destination`` and the first timestamp in full.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..jitter import interarrival_jitter
from ..privacy import calendar_start, scrub_text
from ..trace import Trace
from ..units import parse_duration_s
from .common import Labels, build_trace, provenance
from .textlines import iter_lines

OPTIONS: dict[str, Any] = {"interval_s": None}
PATTERNS: tuple[str, ...] = ("*.ping", "*.ping.txt")

SEQ_MOD = 65536
MAX_SLOTS = 1 << 24  # 194 days of 1 s probes; far beyond one transcript, bounds memory on bad input
DEFAULT_INTERVAL_S = 1.0

_STAMP = re.compile(r"^\[(\d+(?:\.\d*)?)\]\s*(.*)$")
_REPLY = re.compile(r"^\d+ bytes from .+?: icmp_[rs]eq=(\d+)(?:\s+(.*))?$")
_TIME = re.compile(r"(?:^|\s)time=(\d+(?:\.\d+)?) ms(?:\s|$)")
_ERROR = re.compile(r"^From .+? icmp_[rs]eq=(\d+)(?:\s.*)?$")
_NO_ANSWER = re.compile(r"^no answer yet for icmp_[rs]eq=(\d+)$")
_TIMEOUT = re.compile(r"^Request timeout for icmp_[rs]eq[= ](\d+)$")
_STATS_HEAD = re.compile(r"^--- .* ping statistics ---$")
_TRANSMITTED = re.compile(r"^(\d+) packets transmitted, (\d+) (?:packets )?received\b(.*)$")
_LOSS = re.compile(r"(\d+(?:\.\d+)?)% packet loss")
_SKIP = re.compile(r"^(?:ping: |ping6: |warning: |#|wrong data byte |\d+/\d+ packets, |pipe \d+)", re.I)
_SUMMARY_RTT = re.compile(r"^(?:rtt|round-trip) min/avg/(?:max/mdev|max/stddev|max)\s*=\s*[\d./]+ ms")

REPLY, NO_REPLY = 0, 1


class _Run:
    """Events of one ping run, gathered while tokenising."""

    def __init__(self, header: tuple[int, str] | None) -> None:
        self.header = header
        self.seq: list[int] = []
        self.kind: list[int] = []
        self.rtt: list[float] = []
        self.stamp_whole: list[int] = []
        self.stamp_frac: list[float] = []
        self.line: list[int] = []
        self.duplicates = 0
        self.corrupted = 0
        self.transmitted: tuple[int, int] | None = None  # (count, line)
        self.summary: dict[str, Any] = {}
        self.closed = False

    def empty(self) -> bool:
        return not self.seq and self.transmitted is None

    def add(self, seq_text: str, kind: int, rtt: float, stamp: tuple[int, float] | None, lineno: int,
            path: str) -> None:
        seq = int(seq_text) if len(seq_text) <= 6 else SEQ_MOD
        if seq >= SEQ_MOD:
            raise InputError(f"icmp_seq {seq_text[:12]} is beyond 65535", path=path, line=lineno,
                             field="icmp_seq", hint="iputils sequence numbers are 16-bit; is this ping output?")
        if self.closed:
            raise InputError("probe line after the statistics", path=path, line=lineno,
                             hint="a new run must start with its PING header")
        self.seq.append(seq)
        self.kind.append(kind)
        self.rtt.append(rtt)
        self.stamp_whole.append(-1 if stamp is None else stamp[0])
        self.stamp_frac.append(np.nan if stamp is None else stamp[1])
        self.line.append(lineno)


def _parse(path: Path) -> tuple[list[_Run], int]:
    where = str(path)
    runs: list[_Run] = [_Run(None)]
    n_lines = 0
    for lineno, text in iter_lines(path):
        n_lines = lineno
        s = text.strip()
        if not s:
            continue
        stamp: tuple[int, float] | None = None
        m = _STAMP.match(s)
        if m:
            # whole seconds and fraction apart: a float of ~1.7e9 s would keep only ~0.2 us
            whole, _, fraction = m.group(1).partition(".")
            if len(whole) > 12:
                raise InputError(f"timestamp [{m.group(1)[:20]}] is not Unix seconds", path=where, line=lineno,
                                 hint="ping -D prints [seconds.microseconds] since 1970")
            stamp = (int(whole), float("0." + (fraction or "0")))
            s = m.group(2)
        run = runs[-1]
        if s.startswith("PING "):
            if run.empty() and run.header is None:
                run.header = (lineno, s)
            else:
                runs.append(_Run((lineno, s)))
            continue
        m = _REPLY.match(s)
        if m:
            rest = m.group(2) or ""
            if "(DUP!)" in rest:
                run.duplicates += 1
                continue
            if "(BAD CHECKSUM" in rest:  # the probe was sent, but ping does not count this reply
                run.corrupted += 1
                run.add(m.group(1), NO_REPLY, np.nan, stamp, lineno, where)
                continue
            t = _TIME.search(" " + rest)
            rtt = float(t.group(1)) if t else np.nan
            if (t is None and "time" in rest) or (t is not None and not np.isfinite(rtt)):
                raise InputError("reply time is not 'time=<number> ms'", path=where, line=lineno, field="time",
                                 hint="iputils prints e.g. time=11.2 ms; is this another ping's output?")
            run.add(m.group(1), REPLY, rtt if rtt > 0 else np.nan, stamp, lineno, where)
            continue
        m = _ERROR.match(s) or _NO_ANSWER.match(s) or _TIMEOUT.match(s)
        if m:
            run.add(m.group(1), NO_REPLY, np.nan, stamp, lineno, where)
            continue
        if _STATS_HEAD.match(s):
            run.closed = True
            continue
        m = _TRANSMITTED.match(s)
        if m:
            if run.transmitted is not None:
                raise InputError("second statistics line in one run", path=where, line=lineno,
                                 hint="each run must start with its PING header")
            run.closed = True
            count = int(m.group(1)) if len(m.group(1)) <= 12 else MAX_SLOTS + 1
            run.transmitted = (count, lineno)
            loss = _LOSS.search(m.group(3))
            run.summary = {"transmitted": count, "received": int(m.group(2)[:12]),
                           "loss_percent": float(loss.group(1)) if loss else None}
            continue
        if _SUMMARY_RTT.match(s) or _SKIP.match(s):
            continue
        raise InputError(f"'{scrub_text(s)[:60]}' is not iputils ping output", path=where, line=lineno,
                         hint="expected replies, 'From ...' errors, 'no answer yet' or the statistics")
    return [r for r in runs if not r.empty()], n_lines


def _interval(option: Any) -> float | None:
    return None if option is None else parse_duration_s(option, "interval_s")


def _estimate_interval(useq: np.ndarray, kind: np.ndarray, stamp: np.ndarray) -> float | None:
    """Median of time step / sequence step between consecutive timestamped replies (else other lines)."""
    for mask in (kind == REPLY, np.ones(len(kind), dtype=bool)):
        ok = mask & np.isfinite(stamp)
        order = np.flatnonzero(ok)[np.argsort(useq[ok], kind="stable")]
        d_seq = np.diff(useq[order])
        d_t = np.diff(stamp[order])
        good = d_seq > 0
        if good.any():
            est = float(np.median(d_t[good] / d_seq[good]))
            if np.isfinite(est) and est > 0:
                return est
    return None


def _columns(path: Path, run: _Run, interval_opt: float | None) -> dict[str, Any]:
    where = str(path)
    last_line = run.transmitted[1] if run.transmitted else run.line[-1] if run.line else 0
    if not run.seq:
        count = run.transmitted[0] if run.transmitted else 0
        if count == 0:
            raise InputError("holds no probes", path=where, line=last_line,
                             hint="the transcript has no replies, no lost probes and no statistics")
    seq = np.asarray(run.seq, dtype=np.int64)
    kind = np.asarray(run.kind, dtype=np.int64)
    lines = np.asarray(run.line, dtype=np.int64)
    whole = np.asarray(run.stamp_whole, dtype=np.int64)
    frac = np.asarray(run.stamp_frac, dtype=np.float64)
    has_stamp = whole >= 0
    base = int(whole[has_stamp][0]) if has_stamp.any() else 0
    stamp = np.where(has_stamp, (whole - base) + frac, np.nan)  # seconds after the first stamp's second
    rtt = np.asarray(run.rtt, dtype=np.float64)
    # unwrap the 16-bit icmp_seq: each step is the shortest way round the circle
    if seq.size:
        step = (np.diff(seq) + SEQ_MOD // 2) % SEQ_MOD - SEQ_MOD // 2
        useq = seq[0] + np.concatenate(([0], np.cumsum(step)))
    else:
        useq = seq
    if run.transmitted:
        count, t_line = run.transmitted
        first, last = 1, count
        outside = (useq < first) | (useq > last)
        if outside.any():
            i = int(np.flatnonzero(outside)[0])
            raise InputError(f"icmp_seq {seq[i]} is outside the {count} probes the statistics report",
                             path=where, line=int(lines[i]), field="icmp_seq",
                             hint="the statistics do not belong to these replies; remove them or fix the transcript")
    else:
        first, last = int(useq.min()), int(useq.max())
        t_line = int(lines[-1])
    n = last - first + 1
    if n > MAX_SLOTS:
        raise InputError(f"spans {n} probe sequence numbers, more than {MAX_SLOTS}", path=where, line=t_line,
                         field="icmp_seq", hint="this does not look like one ping run")

    slot = useq - first
    answered = np.zeros(n, dtype=bool)
    rtt_ms = np.full(n, np.nan)
    slot_line = np.zeros(n, dtype=np.int64)
    # the first mention of a slot names its line; the first reply of a slot gives its RTT and line
    uniq, at = np.unique(slot, return_index=True)
    slot_line[uniq] = lines[at]
    rep = np.flatnonzero(kind == REPLY)
    r_slots, r_first = np.unique(slot[rep], return_index=True)
    answered[r_slots] = True
    rtt_ms[r_slots] = rtt[rep[r_first]]
    slot_line[r_slots] = lines[rep[r_first]]
    # a slot never mentioned takes the line of the previous mentioned slot (else the statistics line)
    held = np.maximum.accumulate(np.where(slot_line > 0, np.arange(n), 0))
    slot_line = np.where(slot_line[held] > 0, slot_line[held], t_line)

    if interval_opt is not None:
        interval, how = interval_opt, "option"
    else:
        est = _estimate_interval(useq, kind, stamp)
        interval, how = (est, "timestamps") if est is not None else (DEFAULT_INTERVAL_S, "default")
    first_stamp = None
    if has_stamp.any():
        first_stamp = base + float(frac[has_stamp][0])
    return {
        "t_s": np.arange(n) * interval, "lines": slot_line, "rtt_ms": rtt_ms,
        "loss": np.where(answered, 0.0, 1.0), "jitter_ms": interarrival_jitter(rtt_ms),
        "interval_s": interval, "interval_from": how, "first_seq": first,
        "answered": int(answered.sum()),
        "first_stamp": first_stamp,
    }


def _start_text(stamp: float | None, keep_personal: bool) -> str | None:
    if stamp is None or not stamp < 2**33:
        return None
    iso = dt.datetime.fromtimestamp(stamp, tz=dt.timezone.utc).isoformat()
    return calendar_start(iso, keep_personal)


def _traces(path: Path, labels: Labels, options: dict[str, Any]):
    interval_opt = _interval(options.get("interval_s"))
    runs, n_lines = _parse(path)
    if not runs:
        raise InputError("holds no ping replies or probes", path=str(path),
                         hint="is this the output of iputils ping?")
    results = []
    for k, run in enumerate(runs, start=1):
        c = _columns(path, run, interval_opt)
        part = f"run-{k}" if len(runs) > 1 else None
        extra: dict[str, Any] = {
            "interval_s": c["interval_s"], "interval_from": c["interval_from"],
            "duplicates_ignored": run.duplicates, "corrupted_ignored": run.corrupted,
            "summary": run.summary or None,
        }
        start = _start_text(c["first_stamp"], labels.keep_personal)
        if start:
            extra["start"] = start
        if labels.keep_personal and run.header:
            extra["destination"] = run.header[1]
        prov = provenance(path, "ping", {"interval_s": interval_opt}, **extra)
        tr = build_trace(path, labels, prov, t_s=c["t_s"], lines=c["lines"], part=part,
                         rtt_ms=c["rtt_ms"], loss=c["loss"], jitter_ms=c["jitter_ms"])
        results.append((run, c, tr))
    return results, n_lines


def read(path: Path, labels: Labels, **options: Any) -> list[Trace]:
    """Read an iputils ping transcript: one Trace per run, one sample per probe."""
    return [tr for _, _, tr in _traces(Path(path), labels, options)[0]]


def describe(path: Path, labels: Labels, **options: Any) -> str:
    """What :func:`read` would produce from ``path``, as text; nothing is stored."""
    results, n_lines = _traces(Path(path), labels, options)
    out = [f"{Path(path).name}: iputils ping, {n_lines} lines, {len(results)} run(s)"]
    for run, c, tr in results:
        out.append(f"  run: {len(tr)} probes (icmp_seq from {c['first_seq'] % SEQ_MOD}), {c['answered']} answered, "
                   f"{len(tr) - c['answered']} lost, {run.duplicates} duplicates ignored; "
                   f"interval {c['interval_s']:.6g} s ({c['interval_from']}); span {tr['t_s'][-1]:.3f} s")
    out.append("  columns: rtt_ms, loss, jitter_ms (RTT variation)")
    out.append("  destination host and address: " + ("kept in provenance (keep_personal)" if labels.keep_personal
                                                     else "dropped"))
    return "\n".join(out)
