"""A per-packet delivery schedule derived from a trace's bandwidth, for packet-level emulators and simulators.

The trace's bandwidth is piecewise constant: each sample holds from its own time until the next
sample's, the last for one nominal step (``Trace.step_s``). Sample times are taken to the nearest whole
microsecond from the trace's first sample, the schedule's resolution. With packets of S bytes, packet k
(k = 1, 2, ...) is delivered when the bits the path has carried since the start, the integral of the
bandwidth, first reach k * S * 8. An outage (0 bit/s) delivers nothing; the bits left over at the end,
less than one packet, are not delivered. So over every sample's holding interval the delivered bits
differ from the planned ones by less than one packet, and up to any interval's end the schedule is
behind the plan by less than one packet and never ahead.

Delivery times are rounded up to the whole microsecond (a packet is not delivered before its last bit
has arrived), except that a time less than ``TIME_TOLERANCE_US`` (1e-7 us) past a whole microsecond
counts as that microsecond, so float rounding does not push an exact time one microsecond late. The
figure is ours, set by experiment against exact integer arithmetic: at rates from bit/s to tens of
Mbit/s the float error stayed below it, while 1e-6 us already rounded genuine times down.

A long silence between two samples is held like any other interval; to have it count as unknown
instead, resample the trace first (``Trace.resample`` makes such gaps NaN) and pick a rule below.

Unknown bandwidth (NaN) follows the rule ``nan``:

* ``error`` (the default): refuse, naming the first unknown sample's time and how many there are;
* ``hold``: keep the last known rate (unknown samples before the first known one take that one; a
  trace with no known rate at all is refused);
* ``zero``: count unknown as an outage.

Columns (format ``tracegen-delivery-schedule``, version 1):

=============  =====  ==========================================================================
packet         int64  sequence number k, from 1
delivery_us    int64  delivery time in whole microseconds from the trace's first sample
bytes          int32  packet size S
sample         int32  index (from 0) of the trace sample whose interval delivered the packet, to
                      join the trace's other columns (RTT, loss, ...)
=============  =====  ==========================================================================

Parquet files carry the schedule's metadata as JSON under the schema key ``tracegen_schedule``
(:meth:`Schedule.metadata`); CSV files hold a header row and the columns only.
"""

from __future__ import annotations

import json
import math
import numbers
import re
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import TracegenError
from ..trace import Trace
from .plain import write_atomic

FORMAT = "tracegen-delivery-schedule"
FORMAT_VERSION = 1
METADATA_KEY = b"tracegen_schedule"
COLUMNS = ("packet", "delivery_us", "bytes", "sample")
NAN_RULES = ("error", "hold", "zero")
FORMATS = ("parquet", "csv")
# RFC 791 (from memory): every internet module must forward a 68-octet datagram without fragmenting it,
# the smallest IPv4 MTU; the 16-bit total-length field stops at 65535.
MIN_PACKET_BYTES, MAX_PACKET_BYTES = 68, 65535
TIME_TOLERANCE_US = 1e-7          # see the module docstring
ROW_GROUP_PACKETS = 1 << 20
_CHUNK_PACKETS = 1 << 22          # packets placed per pass, to bound the temporary arrays
MAX_PACKETS = 1 << 30             # about 12 GiB of schedule in memory


@dataclass(frozen=True, eq=False)
class Schedule:
    """Packet delivery times for one trace; ``packet`` and ``bytes`` follow from the arrays' order and size."""

    delivery_us: np.ndarray       # int64, non-decreasing
    sample: np.ndarray            # int32
    packet_bytes: int
    trace_id: str
    direction: str
    nan_rule: str
    duration_us: int              # the span the trace covers: the end of its last sample's interval

    def __len__(self) -> int:
        return len(self.delivery_us)

    def metadata(self) -> dict[str, Any]:
        """What the Parquet schema carries: format, version, packet size, source trace, direction, rule."""
        return {"format": FORMAT, "version": FORMAT_VERSION, "packet_bytes": self.packet_bytes,
                "trace_id": self.trace_id, "direction": self.direction, "nan_rule": self.nan_rule,
                "packets": len(self), "duration_us": self.duration_us, "time_unit": "us",
                "time_origin": "the trace's first sample"}

    def to_arrow(self):
        """The schedule as an Arrow table with :data:`COLUMNS` and the metadata under ``tracegen_schedule``."""
        import pyarrow as pa

        n = len(self)
        schema = pa.schema([("packet", pa.int64()), ("delivery_us", pa.int64()), ("bytes", pa.int32()),
                            ("sample", pa.int32())],
                           metadata={METADATA_KEY: json.dumps(self.metadata(), sort_keys=True).encode()})
        arrays = [np.arange(1, n + 1, dtype=np.int64), self.delivery_us,
                  np.full(n, self.packet_bytes, dtype=np.int32), self.sample]
        return pa.Table.from_arrays([pa.array(a) for a in arrays], schema=schema)

    def to_pandas(self):
        """The schedule as a pandas DataFrame with :data:`COLUMNS`."""
        import pandas as pd

        n = len(self)
        return pd.DataFrame({"packet": np.arange(1, n + 1, dtype=np.int64), "delivery_us": self.delivery_us,
                             "bytes": np.full(n, self.packet_bytes, dtype=np.int32), "sample": self.sample})


def check_packet_bytes(packet_bytes: Any) -> int:
    """The packet size as an int, or a TracegenError naming the field and the allowed range."""
    whole = (isinstance(packet_bytes, numbers.Integral) and not isinstance(packet_bytes, bool)) or (
        isinstance(packet_bytes, float) and packet_bytes.is_integer())
    if not whole or not MIN_PACKET_BYTES <= packet_bytes <= MAX_PACKET_BYTES:
        raise TracegenError(f"packet size {packet_bytes!r} must be a whole number of bytes from {MIN_PACKET_BYTES} "
                            f"(the smallest IPv4 MTU, RFC 791) to {MAX_PACKET_BYTES} (the IPv4 total-length limit)",
                            field="packet_bytes", hint="1500 is the usual Ethernet size")
    return int(packet_bytes)


def known_bandwidth(trace: Trace, nan: str = "error") -> np.ndarray:
    """The trace's bandwidth with unknown samples resolved by the rule ``nan`` (module docstring)."""
    if nan not in NAN_RULES:
        raise TracegenError(f"unknown rule '{nan}' for unknown bandwidth", field="nan",
                            hint=f"choose one of {', '.join(NAN_RULES)}")
    bw = np.asarray(trace["bandwidth_bps"], dtype=np.float64)
    unknown = np.isnan(bw)
    if not unknown.any():
        return bw
    where = trace.source or None
    if nan == "zero":
        return np.where(unknown, 0.0, bw)
    if nan == "error":
        first = int(np.flatnonzero(unknown)[0])
        raise TracegenError(f"bandwidth of trace {trace.id} is unknown at {int(unknown.sum())} of {bw.size} "
                            f"samples, first at t = {trace['t_s'][first]:g} s", path=where, field="bandwidth_bps",
                            hint="choose a rule: --nan hold (keep the last known rate) or --nan zero (an outage)")
    known = np.flatnonzero(~unknown)
    if not known.size:
        raise TracegenError(f"bandwidth of trace {trace.id} is unknown everywhere: there is no rate to hold",
                            path=where, field="bandwidth_bps", hint="use --nan zero for an empty schedule")
    last = np.maximum.accumulate(np.where(unknown, -1, np.arange(bw.size)))
    return bw[np.where(last < 0, known[0], last)]


def interval_edges_us(trace: Trace) -> np.ndarray:
    """The samples' holding intervals as n + 1 edges in whole microseconds from the first sample."""
    t = np.asarray(trace["t_s"], dtype=np.float64)
    if t.size == 0:
        raise TracegenError(f"trace {trace.id or '?'} has no samples", path=trace.source or None, field="t_s")
    step = trace.step_s
    if not math.isfinite(step):
        raise TracegenError(f"trace {trace.id} has one sample, so nothing says how long its rate holds",
                            path=trace.source or None, field="t_s", hint="a schedule needs at least two samples")
    edges = np.empty(t.size + 1, dtype=np.int64)
    edges[:-1] = np.rint((t - t[0]) * 1e6)
    edges[-1] = edges[-2] + round(step * 1e6)
    return edges


def delivery_schedule(trace: Trace, packet_bytes: int = 1500, nan: str = "error") -> Schedule:
    """The per-packet delivery schedule of ``trace`` (module docstring); vectorised, no pass per packet."""
    size = check_packet_bytes(packet_bytes)
    bw = known_bandwidth(trace, nan)
    edges = interval_edges_us(trace)
    bits = size * 8
    # multiply before dividing so whole-number rates and durations give exact bit counts
    interval_bits = bw * np.diff(edges).astype(np.float64) / 1e6
    expected = float(interval_bits.sum()) / bits
    if expected > MAX_PACKETS:
        raise TracegenError(f"trace {trace.id} would give {expected:.3g} packets of {size} bytes, more than "
                            f"{MAX_PACKETS}", path=trace.source or None, field="packet_bytes",
                            hint="use larger packets or a shorter part of the trace")
    whole, frac = _cumulative_bits(interval_bits)
    done = _packets_completed(whole, frac, bits)
    counts = np.diff(done)
    total = int(done[-1])
    delivery = np.empty(total, dtype=np.int64)
    sample = np.empty(total, dtype=np.int32)
    # intervals in blocks of about _CHUNK_PACKETS packets each, to bound the temporary arrays
    cuts = np.unique(np.concatenate(
        ([0], np.searchsorted(done, np.arange(_CHUNK_PACKETS, total, _CHUNK_PACKETS)), [counts.size])))
    for a, b in zip(cuts[:-1].tolist(), cuts[1:].tolist()):
        lo, hi = int(done[a]), int(done[b])
        idx = np.repeat(np.arange(a, b, dtype=np.int32), counts[a:b])
        k = np.arange(lo + 1, hi + 1, dtype=np.int64)
        left_bits = (k * bits - whole[idx]).astype(np.float64) - frac[idx]   # bits still to come at the start
        offset_us = left_bits * 1e6 / bw[idx]
        start = edges[idx]
        t = start + np.ceil(offset_us - TIME_TOLERANCE_US).astype(np.int64)
        delivery[lo:hi] = np.clip(t, start, edges[idx + 1])
        sample[lo:hi] = idx
    delivery.setflags(write=False)
    sample.setflags(write=False)
    return Schedule(delivery, sample, size, trace.id, str(trace.tags.get("direction", "")), nan, int(edges[-1]))


def _cumulative_bits(interval_bits: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bits carried up to each interval edge, as a whole part (int64, summed exactly) and a fraction
    part (float64, a sum of values below 1).

    One float sum of an hour at 50 Mbit/s reaches 1.8e11 bits and drifts by hundredths of a bit,
    which would move exact delivery times by a microsecond; split, the drift is far below that."""
    whole_parts = np.floor(interval_bits)
    whole = np.zeros(interval_bits.size + 1, dtype=np.int64)
    frac = np.zeros(interval_bits.size + 1)
    np.cumsum(whole_parts.astype(np.int64), out=whole[1:])
    np.cumsum(interval_bits - whole_parts, out=frac[1:])
    return whole, frac


def _packets_completed(whole: np.ndarray, frac: np.ndarray, bits: int) -> np.ndarray:
    """For each cumulative bit count (whole + frac), the number of whole packets in it: the largest m
    with m * bits <= whole + frac. Packet k then lands in the first interval whose edge count reaches k."""
    q, r = np.divmod(whole, bits)
    rest = r + frac                                  # bits beyond q packets: small, so exact enough
    m = np.floor(rest / bits)
    m += (m + 1) * bits <= rest                      # where the division rounded across a whole number
    m -= m * bits > rest
    return q + m.astype(np.int64)


def write_schedule(trace: Trace, path: str | Path, *, packet_bytes: int = 1500, nan: str = "error",
                   force: bool = False) -> Schedule:
    """Write the schedule of ``trace`` to ``path`` (``.parquet`` or ``.csv``); returns the schedule."""
    path = Path(path)
    fmt = _format_of(path)
    if path.exists() and not path.is_dir() and not force:  # refuse before computing
        raise TracegenError("exists already", path=path, hint="pass --force to replace it")
    schedule = delivery_schedule(trace, packet_bytes, nan)
    _write(schedule, path, fmt, force=force)
    return schedule


@dataclass(frozen=True)
class WrittenSchedule:
    """One file :func:`write_schedules` wrote."""

    path: Path
    trace_id: str
    direction: str
    packets: int


def schedule_file_names(traces: list[Trace], fmt: str = "parquet") -> list[str]:
    """File names for ``traces``: ``GROUP.downlink.schedule.FMT`` / ``GROUP.uplink...`` for a group holding
    exactly one trace tagged direction=downlink and one tagged direction=uplink, else ``ID.schedule.FMT``."""
    by_group: dict[str, list[int]] = {}
    for i, tr in enumerate(traces):
        if tr.group:
            by_group.setdefault(tr.group, []).append(i)
    names = [f"{tr.id}.schedule.{fmt}" for tr in traces]
    for group, members in by_group.items():
        directions = sorted(str(traces[i].tags.get("direction", "")) for i in members)
        if directions != ["downlink", "uplink"]:
            continue
        for i in members:
            names[i] = f"{_safe(group)}.{traces[i].tags['direction']}.schedule.{fmt}"
    return names


def write_schedules(traces: Iterable[Trace], out_dir: str | Path, *, packet_bytes: int = 1500, nan: str = "error",
                    fmt: str = "parquet", force: bool = False) -> list[WrittenSchedule]:
    """Write one schedule file per trace into ``out_dir`` (names from :func:`schedule_file_names`).

    Everything is checked before anything is written: two traces on one name, an existing file (unless
    ``force``), unknown bandwidth the rule refuses. Returns what was written, in the traces' order."""
    if fmt not in FORMATS:
        raise TracegenError(f"unknown schedule format '{fmt}'", field="format", hint=f"use {' or '.join(FORMATS)}")
    check_packet_bytes(packet_bytes)
    traces = list(traces)
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise TracegenError("is not a folder", path=out_dir, hint="give a folder to write the schedules into")
    names = schedule_file_names(traces, fmt)
    seen: dict[str, int] = {}
    for i, name in enumerate(names):
        if name in seen:
            raise TracegenError(f"traces {seen[name] + 1} and {i + 1} (ids {traces[seen[name]].id}, {traces[i].id}) "
                                f"would both be written to {name}",
                                path=out_dir, hint="drop the duplicate trace or give the groups distinct names")
        seen[name] = i
    if not force:
        taken = [name for name in names if (out_dir / name).exists()]
        if taken:
            raise TracegenError(f"holds {len(taken)} file(s) this would replace, first {taken[0]}", path=out_dir,
                                hint="pass --force to replace them, or choose another folder")
    for tr in traces:              # refuse unknown bandwidth or a single sample before writing anything
        known_bandwidth(tr, nan)
        interval_edges_us(tr)
    written = []
    for tr, name in zip(traces, names):
        schedule = delivery_schedule(tr, packet_bytes, nan)
        path = _write(schedule, out_dir / name, fmt, force=True)
        written.append(WrittenSchedule(path, tr.id, schedule.direction, len(schedule)))
    return written


def _format_of(path: Path) -> str:
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in FORMATS:
        raise TracegenError(f"cannot tell the format from the name's ending '{path.suffix}'", path=path,
                            hint="name the file .parquet or .csv")
    return fmt


def _write(schedule: Schedule, path: Path, fmt: str, *, force: bool) -> Path:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    table = schedule.to_arrow()
    if fmt == "parquet":
        # times and sequence numbers rise steadily: delta encoding stores them in a few bits each
        def write(tmp: Path) -> None:
            pq.write_table(table, tmp, compression="zstd", row_group_size=ROW_GROUP_PACKETS, use_dictionary=False,
                           column_encoding={"packet": "DELTA_BINARY_PACKED", "delivery_us": "DELTA_BINARY_PACKED"})
    else:
        def write(tmp: Path) -> None:
            with open(tmp, "wb") as out:
                out.write((",".join(COLUMNS) + "\n").encode())
                pacsv.write_csv(table.replace_schema_metadata(None), out, pacsv.WriteOptions(include_header=False))
    return write_atomic(path, write, force=force)


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._") or "group"


__all__ = [
    "COLUMNS",
    "FORMAT",
    "FORMAT_VERSION",
    "MAX_PACKET_BYTES",
    "METADATA_KEY",
    "MIN_PACKET_BYTES",
    "NAN_RULES",
    "Schedule",
    "WrittenSchedule",
    "check_packet_bytes",
    "delivery_schedule",
    "interval_edges_us",
    "known_bandwidth",
    "schedule_file_names",
    "write_schedule",
    "write_schedules",
]
