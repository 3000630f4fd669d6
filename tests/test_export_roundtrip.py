"""Round trip through the real kernel shaper: a 40 s trace with a new rate every second is exported as a
tc script, played on one end of a veth pair between two network namespaces (`ip netns`), a bulk TCP flow
(Python sockets) crosses it, the receiver's per-second throughput is written as CSV, read back through the
ordinary CSV reader, and compared with the planned trace.

Needs root and iproute2 (`ip`, `tc`) with the tbf qdisc: CI runs as root; elsewhere the test skips and
says why. Every step has a timeout and the namespaces are deleted afterwards, whatever happens."""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from tracegen.export.replay import RECV_ADDRESS, NamespacePair, missing_requirements, start_script
from tracegen.export.tc import tc_script
from tracegen.ingest import read_file
from tracegen.trace import Trace

WHY = missing_requirements()
pytestmark = pytest.mark.skipif(WHY is not None, reason=f"round trip through tc skipped: {WHY}")

DURATION_S = 40
PORT = 5301
RECEIVER = textwrap.dedent("""
    import socket, sys, time
    host, port, limit, out = sys.argv[1], int(sys.argv[2]), float(sys.argv[3]), sys.argv[4]
    srv = socket.socket()
    srv.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    srv.bind((host, port)); srv.listen(1); srv.settimeout(limit)
    conn, _ = srv.accept(); conn.settimeout(5.0)
    stamps, sizes, stop = [], [], time.time() + limit
    while time.time() < stop:
        try:
            chunk = conn.recv(1 << 16)
        except socket.timeout:
            break
        if not chunk:
            break
        stamps.append(time.time()); sizes.append(len(chunk))
    with open(out, "w") as f:
        f.write("\\n".join(f"{t:.6f} {n}" for t, n in zip(stamps, sizes)))
""")
SENDER = textwrap.dedent("""
    import socket, sys, time
    host, port, seconds = sys.argv[1], int(sys.argv[2]), float(sys.argv[3])
    for _ in range(50):
        try:
            s = socket.create_connection((host, port), timeout=2.0); break
        except OSError:
            time.sleep(0.1)
    s.settimeout(5.0)
    block, stop = bytes(1 << 16), time.time() + seconds
    while time.time() < stop:
        try:
            s.sendall(block)
        except socket.timeout:
            pass
    s.close()
""")


def planned_trace() -> Trace:
    """40 one-second steps between 2 and 20 Mbit/s: a seeded random walk in log rate (invented values)."""
    rng = np.random.default_rng(20261202)
    log_rate = np.log(6e6) + np.cumsum(rng.normal(0.0, 0.35, DURATION_S))
    rate = np.exp(np.clip(log_rate, np.log(2e6), np.log(20e6)))
    return Trace.from_columns(np.arange(DURATION_S, dtype=float), bandwidth_bps=rate, origin="synthetic",
                              source="round-trip")


def per_second_csv(arrivals: Path, start_epoch: float, out: Path) -> None:
    """Receiver bytes per second of trace time (second k holds arrivals in [k, k+1) after the script's
    start), written as the CSV a measuring tool would produce."""
    raw = np.loadtxt(arrivals, ndmin=2)
    t, size = raw[:, 0] - start_epoch, raw[:, 1]
    keep = (t >= 0) & (t < DURATION_S)
    bits = np.bincount(np.floor(t[keep]).astype(int), weights=size[keep] * 8, minlength=DURATION_S)
    out.write_text("time_s,throughput_bps\n" + "\n".join(f"{k},{b:.0f}" for k, b in enumerate(bits)) + "\n")


@pytest.mark.parametrize("qdisc", ["tbf", "htb"])
def test_kernel_delivers_the_planned_rates(tmp_path, qdisc):
    plan = planned_trace()
    script = tc_script(plan, qdisc=qdisc)
    arrivals = tmp_path / "arrivals.txt"
    with NamespacePair("tgrt") as pair, tempfile.TemporaryDirectory() as work:
        receiver = subprocess.Popen(pair.exec_argv("recv", [sys.executable, "-c", RECEIVER, RECV_ADDRESS, str(PORT),
                                                            str(DURATION_S + 15), str(arrivals)]))
        time.sleep(0.5)
        shaper = start_script(pair, script, Path(work))
        sender = subprocess.Popen(pair.exec_argv("send", [sys.executable, "-c", SENDER, RECV_ADDRESS, str(PORT),
                                                          str(DURATION_S + 1)]))
        try:
            out, err = shaper.communicate(timeout=DURATION_S + 20)
            sender.wait(timeout=15)
            receiver.wait(timeout=DURATION_S + 20)
        finally:
            for p in (shaper, sender, receiver):
                if p.poll() is None:
                    p.kill()
        assert shaper.returncode == 0, err
    start = float(out.split("tracegen-replay start ")[1].split()[0])
    measured_csv = tmp_path / "measured.csv"
    per_second_csv(arrivals, start, measured_csv)
    (measured,) = read_file(measured_csv, "csv", time_column="time_s", bandwidth_column="throughput_bps",
                            bandwidth_unit="bps")
    got = np.asarray(measured["bandwidth_bps"])[1:]          # second 0 holds TCP's slow start
    want = np.asarray(plan["bandwidth_bps"])[1:]
    corr = float(np.corrcoef(got, want)[0, 1])
    mae_share = float(np.mean(np.abs(got - want)) / np.mean(want))
    figures = {"correlation": round(corr, 4), "mae_share_of_mean": round(mae_share, 4),
               "mean_planned_bps": round(float(want.mean())), "mean_measured_bps": round(float(got.mean()))}
    print(f"round trip ({qdisc}):", json.dumps(figures))
    # the acceptance figures: correlation >= 0.9, mean absolute error <= 15 % of the mean rate
    assert corr >= 0.9, figures
    assert mae_share <= 0.15, figures


def test_namespaces_are_gone_afterwards():
    with NamespacePair("tgrt2") as pair:
        listed = subprocess.run(["ip", "netns", "list"], capture_output=True, text=True).stdout
        assert pair.send in listed and pair.recv in listed
    listed = subprocess.run(["ip", "netns", "list"], capture_output=True, text=True).stdout
    assert "tgrt2-send" not in listed and "tgrt2-recv" not in listed
