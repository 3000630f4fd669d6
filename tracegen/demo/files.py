"""Writing the demo sessions as the files a fleet operator would have, and the ground truth."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from .radio import NTP_UNIX_OFFSET_S
from .world import CITY, TAG_KEYS, Session


# --- writing the files a user would have ----------------------------------------------------------
def _num(a: np.ndarray, fmt: str) -> list[str]:
    return ["" if np.isnan(v) else fmt % v for v in np.asarray(a, dtype=float)]


def _table(header: list[str], cols: list[list[str]], sep: str) -> str:
    return sep.join(header) + "\n" + "".join(sep.join(row) + "\n" for row in zip(*cols))


def _write_csv(s: Session, variant: int) -> str:
    c, ids = s.columns, [s.device_id] * len(s.columns["t_s"])
    note = f"# fleet logger export, {CITY} (invented)\n" if variant % 2 else ""  # some loggers add a comment line
    return note + _table(["time_ms", "throughput_kbps", "rtt_ms", "loss_pct", "serving_cell", "robot_id", "lat", "lon"],
                  [[str(s.start_ms + 1000 * k) for k in range(len(ids))], _num(c["bandwidth_bps"] / 1e3, "%.1f"),
                   _num(c["rtt_ms"], "%.1f"), _num(c["loss"] * 100, "%.2f"), [x or "" for x in c["cell"]], ids,
                   _num(c["lat"], "%.6f"), _num(c["lon"], "%.6f")], ",")


def _write_tsv(s: Session, variant: int) -> str:
    c = s.columns
    zone = "+00:00" if variant % 2 else "Z"  # both are ISO 8601 for UTC
    iso = [x + zone for x in np.datetime_as_string(np.datetime64(s.start_ms, "ms") + np.arange(
        len(c["t_s"])) * np.timedelta64(1000, "ms"), unit="ms")]
    return _table(["timestamp", "device", "cell", "throughput_mbps", "rtt_ms", "loss", "jitter_ms",
                   "latitude", "longitude"],
                  [iso, [s.device_id] * len(iso), [x or "" for x in c["cell"]], _num(c["bandwidth_bps"] / 1e6, "%.3f"),
                   _num(c["rtt_ms"], "%.1f"), _num(c["loss"], "%.4f"), _num(c["jitter_ms"], "%.2f"),
                   _num(c["lat"], "%.6f"), _num(c["lon"], "%.6f")], "\t")


def _write_bytes(s: Session, variant: int) -> str:
    c = s.columns  # each row counts the bytes of the second that ends at its time
    return _table(["t_s", _bytes_column(s), "srtt_us", "loss", "cell", "unit_id"],
                  [_num(c["t_s"] + 1.0, "%.3f"), [str(int(v)) for v in np.rint(c["bandwidth_bps"] / 8.0)],
                   _num(np.rint(c["rtt_ms"] * 1000.0), "%.0f"), _num(c["loss"], "%.4f"),
                   [x or "" for x in c["cell"]], [s.device_id] * len(c["t_s"])], ",")


def rtcp_reports(s: Session, variant: int = 0) -> list[dict[str, Any]]:
    """Receiver reports for the tele-op video uplink, one per connected second (RFC 3550 section 6.4.1).

    The sender's clock stamps each arrival A; the simulated RTT r and a DLSR d are in 1/65536 s, and
    LSR = A - r - d (mod 2^32), so A - LSR - DLSR gives back r exactly.
    """
    c, x = s.columns, s.extra
    k = np.flatnonzero(np.isfinite(c["rtt_ms"]))
    arrival_u = (s.start_ms * 65536) // 1000 + np.rint((k + x["report_offset_s"][k]) * 65536).astype(np.int64)
    ntp_u = arrival_u + NTP_UNIX_OFFSET_S * 65536  # NTP time in 1/65536 s (fraction's low 16 bits are zero)
    middle = ntp_u & 0xFFFFFFFF
    r = np.rint(c["rtt_ms"][k] / 1000.0 * 65536).astype(np.int64)
    dlsr = x["dlsr_units"][k].astype(np.int64)
    lsr = (middle - r - dlsr) & 0xFFFFFFFF
    dlsr = np.where(lsr == 0, dlsr - 1, dlsr)  # LSR 0 means "no SR yet": move one unit to DLSR's side
    lsr = np.where(lsr == 0, 1, lsr)
    bw = c["bandwidth_bps"]
    rate = np.clip(0.85 * np.concatenate(([bw[0]], bw[:-1])), 0.3e6, 5e6)  # the video sender's target
    sent = np.rint(rate / 9600.0).astype(np.int64)  # 1200-byte packets
    lost = np.rint(sent * c["loss"]).astype(np.int64)
    seq, cum = x["seq0"] + np.cumsum(sent) - 1, np.cumsum(lost)
    frac = np.minimum(255, (256 * lost) // np.maximum(sent, 1))
    jitter = np.rint(np.nan_to_num(c["jitter_ms"]) * 90.0).astype(np.int64)
    use_ntp = variant % 2 == 1  # loggers differ: 64-bit NTP arrival stamps or Unix seconds
    out = []
    for j, kk in enumerate(k.tolist()):  # one dict per report line: formatting only
        rec: dict[str, Any] = ({"arrival_ntp": int(ntp_u[j]) << 16} if use_ntp else
                               {"arrival_s": float(arrival_u[j]) / 65536.0})
        rec.update(ssrc=x["ssrc"], fraction_lost=int(frac[kk]), cumulative_lost=int(cum[kk]),
                   ext_highest_seq=int(seq[kk]), jitter=int(jitter[kk]), clock_rate_hz=90000,
                   lsr=int(lsr[j]), dlsr=int(dlsr[j]), bandwidth_bps=int(round(bw[kk])),
                   cname=f"teleop-{s.device_id.lower()}@ops.quillon.example")
        out.append(rec)
    return out


def _ping_time(ms: float) -> str:
    us = int(ms * 1000)  # as iputils prints it: truncated, 3 decimals below 1 ms ... none from 100 ms
    digits = 0 if us >= 100_000 else 1 if us >= 10_000 else 2 if us >= 1000 else 3
    return f"{us // 10 ** (3 - digits) / 10 ** digits:.{digits}f}"


def _write_ping(s: Session, variant: int) -> str:
    c, x = s.columns, s.extra
    host = ("192.0.2.10", "198.51.100.23", "203.0.113.5")[variant % 3]  # RFC 5737 documentation addresses
    ok = np.isfinite(c["rtt_ms"]) & ~x["probe_lost"]
    lines = [f"PING {host} ({host}) 56(84) bytes of data."]
    stamp = variant % 2 == 1  # some were run with -D: a receive timestamp before each reply
    lines += [(f"[{(s.start_ms + 1000 * k + c['rtt_ms'][k]) / 1000.0:.6f}] " if stamp else "")
              + f"64 bytes from {host}: icmp_seq={k + 1} ttl={x['ttl']} time={_ping_time(c['rtt_ms'][k])} ms"
              for k in np.flatnonzero(ok).tolist()]
    n, got = len(ok), int(ok.sum())
    shown = np.array([float(_ping_time(v)) for v in c["rtt_ms"][ok]] or [0.0])
    lines += ["", f"--- {host} ping statistics ---",
              f"{n} packets transmitted, {got} received, {100.0 * (n - got) / n:.4g}% packet loss, "
              f"time {1000 * (n - 1)}ms",
              f"rtt min/avg/max/mdev = {shown.min():.3f}/{shown.mean():.3f}/{shown.max():.3f}/{shown.std():.3f} ms"]
    return "\n".join(lines) + "\n"


_SUFFIX = {"csv": ".csv", "tsv": ".tsv", "bytes": ".csv", "rtcp": ".jsonl", "ping": ".ping"}
_READER = {"csv": "csv", "tsv": "csv", "bytes": "csv", "rtcp": "rtcp", "ping": "ping"}


_OPTIONS: dict[str, dict[str, Any]] = {
    "csv": dict(time_column="time_ms", time_unit="ms", bandwidth_column="throughput_kbps", bandwidth_unit="kbps",
                rtt_column="rtt_ms", loss_column="loss_pct", loss_unit="percent", cell_column="serving_cell",
                group_column="robot_id", lat_column="lat", lon_column="lon"),
    "tsv": dict(time_column="timestamp", time_unit="iso8601", bandwidth_column="throughput_mbps",
                bandwidth_unit="Mbps", rtt_column="rtt_ms", loss_column="loss", jitter_column="jitter_ms",
                cell_column="cell", group_column="device", lat_column="latitude", lon_column="longitude"),
    "bytes": dict(time_column="t_s", bandwidth_unit="bytes", interval_s=1.0, rtt_column="srtt_us", rtt_unit="us",
                  loss_column="loss", cell_column="cell", group_column="unit_id"),
    "rtcp": {}, "ping": {"interval_s": 1.0}}


def _reader_options(s: Session) -> dict[str, Any]:
    extra = {"bandwidth_column": _bytes_column(s)} if s.plan["fmt"] == "bytes" else {}
    return {**_OPTIONS[s.plan["fmt"]], **extra}


def _bytes_column(s: Session) -> str:
    return "rx_bytes" if s.plan["direction"] == "downlink" else "tx_bytes"


def tags_of(s: Session) -> dict[str, str]:
    """The tags a session's file is ingested with."""
    return {k: s.plan[k] for k in TAG_KEYS}


def write_sources(sessions: list[Session], sources: Path) -> dict[str, list[Path]]:
    """Write each session's file and truth.json under ``sources``; return the paths by reader format."""
    sources.mkdir(parents=True, exist_ok=True)
    for old in sources.glob("qn[0-9][0-9]-*"):  # files of an earlier demo run
        old.unlink()
    written: dict[str, list[Path]] = {}
    truth, variants = {}, {}
    for s in sessions:
        fmt = s.plan["fmt"]
        path = sources / f"{s.name}{_SUFFIX[fmt]}"
        variant = variants[fmt] = variants.get(fmt, -1) + 1  # the n-th file of its kind: vary its conventions
        if fmt == "rtcp":
            text = "".join(json.dumps(r, separators=(",", ":")) + "\n" for r in rtcp_reports(s, variant))
        else:
            text = {"csv": _write_csv, "tsv": _write_tsv, "bytes": _write_bytes, "ping": _write_ping}[fmt](s, variant)
        path.write_bytes(text.encode())
        written.setdefault(_READER[fmt], []).append(path)
        truth[path.name] = dict(s.truth)
    (sources / "truth.json").write_bytes((json.dumps(
        {"world": f"{CITY} (invented)", "files": truth}, indent=1, sort_keys=True) + "\n").encode())
    return written
