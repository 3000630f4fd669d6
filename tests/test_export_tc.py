"""The tc script without root: its dry-run text against the trace, and its behaviour with a stand-in `tc`
on PATH that records every call (netem missing, cleanup on Ctrl-C)."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest

from tracegen.errors import TracegenError
from tracegen.export.tc import FLOOR_BPS, plan_steps, tc_script, write_tc_script
from tracegen.trace import Trace


def trace(bw, rtt=None, loss=None, step=1.0) -> Trace:
    n = len(bw)
    return Trace.from_columns(np.arange(n) * step, bandwidth_bps=bw, rtt_ms=rtt, loss=loss, source="plan.csv")


def dry_run(script: str, tmp_path: Path, dev: str = "veth9") -> list[str]:
    path = tmp_path / "s.sh"
    path.write_text(script)
    run = subprocess.run(["bash", str(path), dev, "--dry-run"], capture_output=True, text=True, timeout=30)
    assert run.returncode == 0, run.stderr
    return run.stdout.splitlines()


def test_dry_run_plays_every_step(tmp_path):
    bw = [5e6, 5e6, 2e6, 0.0, 8e6]
    lines = dry_run(tc_script(trace(bw, rtt=[40, 40, 60, 60, 50], loss=[0, 0, 0.01, 0.01, 0])), tmp_path)
    rates = [int(m.group(1)) for line in lines if (m := re.search(r"tbf rate (\d+)bit", line))]
    # setup, the first step, then one change per new rate (the repeated 5 Mbit/s is one change)
    assert rates == [5_000_000, 5_000_000, 2_000_000, int(FLOOR_BPS), 8_000_000]
    assert [line for line in lines if line.startswith("# at")] == ["# at 2 s", "# at 3 s", "# at 4 s", "# at 5 s"]
    netem = [line for line in lines if "netem" in line and line.startswith("tc")]
    # delay is half the RTT (one direction), loss in percent; an outage is 100 % loss
    assert netem == ["tc qdisc add dev veth9 parent 1:1 handle 10: netem delay 20ms loss 0%",
                     "tc qdisc change dev veth9 parent 1:1 handle 10: netem delay 30ms loss 1%",
                     "tc qdisc change dev veth9 parent 1:1 handle 10: netem delay 30ms loss 100%",
                     "tc qdisc change dev veth9 parent 1:1 handle 10: netem delay 25ms loss 0%"]
    bursts = {m.group(1) for line in lines if (m := re.search(r"burst (\d+)", line))}
    assert bursts == {str(int(np.ceil(8e6 / 8 * 0.010)))}   # one burst for the whole replay: 10 ms at the top rate


def test_htb_dry_run(tmp_path):
    lines = dry_run(tc_script(trace([3e6, 6e6]), qdisc="htb"), tmp_path)
    assert lines[0] == "tc qdisc replace dev veth9 root handle 1: htb default 1"
    assert lines[1].startswith("tc class add dev veth9 parent 1: classid 1:1 htb rate 3000000bit ceil 3000000bit")
    assert any(line.startswith("tc class change dev veth9 parent 1: classid 1:1 htb rate 6000000bit ceil 6000000bit")
               for line in lines)
    assert not any("netem" in line for line in lines if line.startswith("tc"))   # no RTT or loss: no netem


def test_fine_steps_are_averaged(tmp_path):
    rng = np.random.default_rng(1)
    bw = rng.uniform(1e6, 9e6, 50)                      # 10 ms steps
    steps = plan_steps(trace(bw, step=0.01))
    # the time-weighted mean of each 100 ms bin is the plain mean of its ten equal samples (numpy reference)
    np.testing.assert_allclose(steps.rate_bps, bw.reshape(5, 10).mean(axis=1), rtol=1e-12)
    np.testing.assert_allclose(steps.t_s, np.arange(5) * 0.1, atol=1e-12)
    assert steps.end_s == pytest.approx(0.5)


def test_unknown_bandwidth_rules():
    bw = [np.nan, 4e6, np.nan, np.nan, 0.0, np.nan]
    with pytest.raises(TracegenError, match=r"unknown at 4 of 6 steps, first at t = 0 s"):
        plan_steps(trace(bw))
    held = plan_steps(trace(bw), nan="hold")            # the first known rate before it, the last known after
    assert held.rate_bps.tolist() == [4e6, FLOOR_BPS] and held.t_s.tolist() == [0.0, 4.0]
    zero = plan_steps(trace(bw), nan="zero")
    assert zero.outage.tolist() == [True, False, True] and zero.t_s.tolist() == [0.0, 1.0, 2.0]
    with pytest.raises(TracegenError, match="nothing to replay"):
        plan_steps(trace([np.nan, np.nan]), nan="hold")
    with pytest.raises(TracegenError, match="unknown rule"):
        plan_steps(trace([1e6]), nan="guess")


@pytest.mark.parametrize("mtu, ok", [(67, False), (68, True), (1500, True), (65535, True), (65536, False), (1500.5, False)])
def test_mtu_bounds_of_rfc_791(mtu, ok):
    # RFC 791: every internet module must forward a 68-byte datagram; the total-length field tops at 65535
    if ok:
        assert "tbf rate" in tc_script(trace([1e6, 2e6]), mtu=mtu)
    else:
        with pytest.raises(TracegenError, match="MTU"):
            tc_script(trace([1e6, 2e6]), mtu=mtu)


def test_byte_fields_beyond_32_bits_are_refused():
    # tbf's struct tc_tbf_qopt holds buffer and limit as __u32 (linux/pkt_sched.h, from memory).
    assert "limit 250000000 " in tc_script(trace([1e9, 1e9]), queue_ms=2000)  # 1 Gbit/s x 2 s = 2.5e8 bytes
    with pytest.raises(TracegenError, match="32-bit") as info:
        tc_script(trace([1e9, 1e9]), queue_ms=36e6)  # 10 h of queue
    assert info.value.field == "queue_ms"
    with pytest.raises(TracegenError, match="32-bit") as info:
        tc_script(trace([1e15, 1e15]))
    assert info.value.field == "bandwidth_bps"


def test_script_is_valid_bash_and_refuses_to_overwrite(tmp_path):
    path = write_tc_script(trace([1e6, 2e6, 3e6]), tmp_path / "r.sh")
    assert subprocess.run(["bash", "-n", str(path)]).returncode == 0
    assert os.access(path, os.X_OK)
    with pytest.raises(TracegenError, match="exists already"):
        write_tc_script(trace([1e6]), path)
    write_tc_script(trace([1e6]), path, force=True)


# --------------------------------------------------------------------------------------------------
# a stand-in tc that records its calls


@pytest.fixture()
def fake_tc(tmp_path):
    log = tmp_path / "calls.log"
    tool = tmp_path / "bin" / "tc"
    tool.parent.mkdir()
    tool.write_text(f"""#!/usr/bin/env bash
echo "$*" >> {log}
case "$*" in *netem*) echo "Error: Specified qdisc kind is unknown." >&2; exit 2;; esac
exit 0
""")
    tool.chmod(0o755)
    env = {**os.environ, "PATH": f"{tool.parent}:{os.environ['PATH']}"}
    return env, log


def test_missing_netem_is_said_and_bandwidth_still_plays(tmp_path, fake_tc):
    env, log = fake_tc
    path = write_tc_script(trace([2e6, 4e6, 1e6], rtt=[30, 30, 30], step=0.1), tmp_path / "r.sh")
    run = subprocess.run(["bash", str(path), "dev0"], capture_output=True, text=True, env=env, timeout=30)
    assert run.returncode == 0, run.stderr
    assert "netem is missing in this kernel" in run.stderr and "bandwidth only" in run.stderr
    calls = log.read_text().splitlines()
    assert sum("netem" in c for c in calls) == 1                       # tried once, never changed afterwards
    assert [c for c in calls if "tbf rate" in c][-1].startswith("qdisc change dev dev0 root handle 1: tbf rate 1000000bit")
    assert calls[-1] == "qdisc del dev dev0 root"                       # removed at the end
    assert "tracegen-replay start" in run.stdout and "tracegen-replay end" in run.stdout


def test_ctrl_c_removes_the_qdisc(tmp_path, fake_tc):
    env, log = fake_tc
    path = write_tc_script(trace(np.full(60, 3e6) * (1 + np.arange(60) % 2)), tmp_path / "r.sh")
    # Ctrl-C as at a terminal: a shell started in the background (`cmd &`, e.g. a CI step) hands SIGINT on
    # ignored, and bash cannot trap a signal ignored on entry (bash manual, Signals)
    proc = subprocess.Popen(["bash", str(path), "dev0"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            text=True, start_new_session=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    time.sleep(1.5)
    os.killpg(proc.pid, signal.SIGINT)
    proc.communicate(timeout=10)
    assert proc.returncode == 130
    calls = log.read_text().splitlines()
    assert calls[-1] == "qdisc del dev dev0 root" and len(calls) < 10


def test_a_coarse_step_that_does_not_divide_the_trace_ends_with_it():
    # 60 one-second samples played at 45 s: two steps, the second the mean of seconds 45-59 (hand computed).
    bw = np.arange(1, 61) * 1e5
    steps = plan_steps(trace(bw), min_step_s=45.0)
    np.testing.assert_allclose(steps.t_s, [0.0, 45.0])
    np.testing.assert_allclose(steps.rate_bps, [np.mean(bw[:45]), np.mean(bw[45:])])
    assert steps.end_s == 60.0
    assert plan_steps(trace(bw), min_step_s=7.0).end_s == 60.0  # not 63: the replay is as long as the trace
    assert plan_steps(trace(bw)).end_s == 60.0
