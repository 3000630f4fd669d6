"""A Linux traffic-control script that replays a trace on a network device.

The script is plain bash around ``tc``: it puts a rate limiter at the device's root, a token bucket
(``tbf``) or a hierarchical token bucket class (``htb``), and changes its rate at every step of the
trace, on time (each change sleeps until its due time from the start, so the delay of one ``tc`` call
does not add up). Delay and loss go to a ``netem`` qdisc under the rate limiter where the kernel has
one: the script tries to attach it and, when the kernel says the qdisc kind is unknown, says so on
standard error and replays the bandwidth alone. Run it as root: ``bash SCRIPT DEVICE``; ``bash SCRIPT
DEVICE --dry-run`` prints the commands with their times instead (no root, nothing changed). It removes
its qdisc when it ends, fails or is interrupted (trap on EXIT, INT and TERM).

What is replayed, per step:

* rate: the trace's bandwidth, averaged onto steps of at least ``min_step_s`` (0.1 s: a ``tc`` call
  takes milliseconds, so finer changes would not land on time); consecutive equal rates are one
  change. An outage (0 bit/s) cannot be a token-bucket rate: it becomes ``floor_bps`` (8 kbit/s, one
  1500-byte packet per 1.5 s) plus 100 % loss where netem is present.
* delay: ``delay_share`` (0.5) of the RTT, since a script shapes one direction; play it on the reverse
  path too for the other half. Jitter is not replayed: netem's jitter reorders packets.
* loss: the trace's loss fraction as netem's random loss.

Unknown bandwidth (NaN) follows ``nan``: ``error`` (the default) names the first unknown sample; ``hold``
keeps the last known rate (the first known one before it); ``zero`` makes it an outage. Unknown delay
or loss keeps netem's last setting.

Bucket sizes (common practice, figures ours): ``burst`` holds 10 ms at the trace's highest rate and at
least two MTUs (the kernel needs at least rate / HZ bytes to reach a rate), and stays the same at every
step: a token bucket never sends a packet bigger than its burst, and the kernel cuts large offloaded
packets to the burst when they are queued, so a burst that shrank with the rate would strand the
packets queued before the change (seen on veth: the flow stops for good). The queue ``limit`` holds
``queue_ms`` (200 ms) at the step's rate and at least two bursts (a smaller queue than the largest
packet drops every large packet, and TCP then runs well under the rate). 200 ms is a deep buffer, as
cellular links have; with one TCP flow a 50 ms queue delivered 12 % under the planned rates in the round
trip test and 200 ms 4 %: a shallow queue empties at each rate drop while TCP backs off.
"""

from __future__ import annotations

import math
import shlex
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__
from ..errors import TracegenError
from ..trace import Trace

QDISCS = ("tbf", "htb")
NAN_RULES = ("error", "hold", "zero")
MIN_STEP_S = 0.1
FLOOR_BPS = 8_000.0
BURST_S = 0.010
QUEUE_MS = 200.0
MIN_MTU, MAX_MTU = 68, 65535   # RFC 791: every IPv4 host handles 68-byte datagrams; 65535 is the length field's top


@dataclass(frozen=True)
class Steps:
    """What the script plays: from ``t_s[i]`` on, ``rate_bps[i]``, ``delay_ms[i]`` and ``loss[i]`` (NaN:
    keep netem's last setting; None when the trace has no such column); the script ends at ``end_s``."""

    t_s: np.ndarray
    rate_bps: np.ndarray
    delay_ms: np.ndarray | None
    loss: np.ndarray | None
    outage: np.ndarray
    end_s: float


def _fill(bw: np.ndarray, nan: str, t: np.ndarray, source: str) -> np.ndarray:
    unknown = np.isnan(bw)
    if not unknown.any():
        return bw
    if nan == "error":
        first = int(np.flatnonzero(unknown)[0])
        raise TracegenError(f"bandwidth is unknown at {int(unknown.sum())} of {bw.size} steps, first at "
                            f"t = {t[first]:g} s", path=source or None, field="bandwidth_bps",
                            hint="choose a rule: --nan hold (keep the last known rate) or --nan zero (an outage)")
    if nan == "zero":
        return np.where(unknown, 0.0, bw)
    known = np.flatnonzero(~unknown)
    if not known.size:
        raise TracegenError("bandwidth is unknown everywhere: there is nothing to replay", path=source or None,
                            field="bandwidth_bps")
    idx = np.maximum.accumulate(np.where(unknown, -1, np.arange(bw.size)))
    return bw[np.where(idx < 0, known[0], idx)]


def plan_steps(trace: Trace, *, min_step_s: float = MIN_STEP_S, nan: str = "error", delay_share: float = 0.5) -> Steps:
    """The steps of a trace as the script plays them (module docstring)."""
    if not isinstance(trace, Trace):
        raise TracegenError(f"expected a Trace, got {type(trace).__name__}", field="trace")
    if nan not in NAN_RULES:
        raise TracegenError(f"unknown rule '{nan}' for unknown bandwidth", field="nan", hint=f"one of {', '.join(NAN_RULES)}")
    if not (math.isfinite(min_step_s) and min_step_s > 0):
        raise TracegenError(f"{min_step_s!r} must be a positive number of seconds", field="min_step_s")
    if not (math.isfinite(delay_share) and 0 <= delay_share <= 1):
        raise TracegenError(f"{delay_share!r} must be between 0 and 1", field="delay_share")
    if len(trace) == 0:
        raise TracegenError("the trace has no samples", field="trace")
    step = trace.step_s if len(trace) > 1 else min_step_s
    own_end = float(trace["t_s"][-1] - trace["t_s"][0]) + step  # played at a coarser step, it still ends here
    original = None
    if len(trace) > 1 and step < min_step_s * (1 - 1e-9):
        original, trace = trace, trace.resample(min_step_s)
        step = min_step_s
    t = np.asarray(trace["t_s"]) - float(trace["t_s"][0])
    bw = np.array(trace["bandwidth_bps"], dtype=np.float64)
    loss = np.array(trace["loss"], dtype=np.float64)
    if original is not None:  # a last bin the trace only partly covers: the mean of what it covers
        tail = np.asarray(original["t_s"]) >= float(trace["t_s"][-1])
        for values, name in ((bw, "bandwidth_bps"), (loss, "loss")):
            part = np.asarray(original[name], dtype=np.float64)[tail]
            if np.isnan(values[-1]) and np.isfinite(part).any():
                values[-1] = np.nanmean(part)
    bw = _fill(bw, nan, t, trace.source)
    delay = np.asarray(trace["rtt_ms"]) * delay_share
    has_delay, has_loss = bool(np.isfinite(delay).any()), bool(np.isfinite(loss).any())
    outage = bw < FLOOR_BPS
    rate = np.maximum(bw, FLOOR_BPS)
    keys = [rate, outage.astype(float)] + ([np.nan_to_num(delay, nan=-1.0)] if has_delay else []) \
        + ([np.nan_to_num(loss, nan=-1.0)] if has_loss else [])
    same = np.ones(t.size - 1, dtype=bool)
    for k in keys:
        same &= k[1:] == k[:-1]
    change = np.concatenate(([True], ~same))
    end = min(float(t[-1] + step), own_end)
    return Steps(t[change], rate[change], delay[change] if has_delay else None, loss[change] if has_loss else None,
                 outage[change], end)


TC_MAX_BYTES = 2**32 - 1  # tbf and htb take burst and limit as u32 bytes (linux/pkt_sched.h)


def _check(qdisc: str, mtu: int, floor_bps: float, queue_ms: float) -> None:
    if qdisc not in QDISCS:
        raise TracegenError(f"unknown qdisc '{qdisc}'", field="qdisc", hint=f"one of {', '.join(QDISCS)}")
    if isinstance(mtu, bool) or not isinstance(mtu, (int, np.integer)) or not MIN_MTU <= mtu <= MAX_MTU:
        raise TracegenError(f"MTU {mtu!r} must be a whole number of bytes from {MIN_MTU} (the IPv4 minimum, "
                            f"RFC 791) to {MAX_MTU}", field="mtu")
    if not (math.isfinite(floor_bps) and floor_bps > 0):
        raise TracegenError(f"{floor_bps!r} must be a positive rate in bit/s", field="floor_bps")
    if not (math.isfinite(queue_ms) and queue_ms > 0):
        raise TracegenError(f"{queue_ms!r} must be a positive number of milliseconds", field="queue_ms")


def _buckets(rate_bps: np.ndarray, mtu: int, queue_ms: float) -> tuple[np.ndarray, np.ndarray]:
    burst = np.full(rate_bps.size, max(int(np.ceil(rate_bps.max() / 8 * BURST_S)), 2 * mtu), dtype=np.int64)
    limit = np.maximum(np.ceil(rate_bps / 8 * queue_ms / 1000.0), 2 * burst).astype(np.int64)
    if burst.max(initial=0) > TC_MAX_BYTES:
        raise TracegenError(f"the highest rate, {rate_bps.max():.4g} bit/s, needs a {int(burst[0])}-byte burst, more "
                            f"than tc's 32-bit byte fields hold ({TC_MAX_BYTES})", field="bandwidth_bps",
                            hint="check the trace's bandwidth unit")
    if limit.max(initial=0) > TC_MAX_BYTES:
        raise TracegenError(f"a {queue_ms:g} ms queue at {rate_bps.max():.4g} bit/s is {int(limit.max())} bytes, more "
                            f"than tc's 32-bit byte fields hold ({TC_MAX_BYTES})", field="queue_ms",
                            hint="give a shorter queue")
    return burst, limit


_HEAD = r'''#!/usr/bin/env bash
# Written by tracegen {version}: replays trace {id} ({source}) on a network device with tc.
# {n} changes over {end:g} s; rate by {qdisc}{netem_note}.
# Run as root: bash THIS_FILE DEVICE    Print the commands instead: bash THIS_FILE DEVICE --dry-run
set -u
export LC_ALL=C
DEV=${{1:?usage: bash $0 DEVICE [--dry-run]}}
DRY=0
[ "${{2:-}}" = "--dry-run" ] && DRY=1
NETEM=0
run() {{ if [ "$DRY" = 1 ]; then echo "tc $*"; else tc "$@"; fi; }}
cleanup() {{ [ "$DRY" = 1 ] || tc qdisc del dev "$DEV" root 2>/dev/null; }}
# no command substitution in the timing: a child forked just as Ctrl-C arrives can take the interrupt as
# handled (bash's wait-and-cooperative-exit), and the script would play on
now_us() {{ local t=$EPOCHREALTIME; NOW=$((10#${{t/./}})); }}
at() {{  # at SECONDS MICROSECONDS: wait until that long after the start
  if [ "$DRY" = 1 ]; then echo "# at $1 s"; return; fi
  now_us
  local left=$((START + $2 - NOW)) frac
  # sleep in the background and wait for it: a trapped INT or TERM ends `wait` at once (bash manual,
  # Signals), where a foreground sleep can swallow it and leave the script playing on
  if [ "$left" -gt 0 ]; then
    printf -v frac %06d $((left % 1000000))
    sleep "$((left / 1000000)).$frac" & SLEEPER=$!
    wait "$SLEEPER"; SLEEPER=
  fi
}}
'''

_TBF = r'''rate() {{  # rate BIT/S BURST_BYTES LIMIT_BYTES
  run qdisc change dev "$DEV" root handle 1: tbf rate "$1bit" burst "$2" limit "$3" || exit 1
}}
setup() {{
  run qdisc replace dev "$DEV" root handle 1: tbf rate {rate}bit burst {burst} limit {limit} || exit 1
}}
'''

_HTB = r'''rate() {{  # rate BIT/S BURST_BYTES LIMIT_BYTES (the limit is the tbf one; htb queues in its leaf)
  run class change dev "$DEV" parent 1: classid 1:1 htb rate "$1bit" ceil "$1bit" burst "$2" cburst "$2" || exit 1
}}
setup() {{
  run qdisc replace dev "$DEV" root handle 1: htb default 1 || exit 1
  run class add dev "$DEV" parent 1: classid 1:1 htb rate {rate}bit ceil {rate}bit burst {burst} cburst {burst} || exit 1
}}
'''

_NETEM = r'''netem() {{  # netem DELAY_MS LOSS_PERCENT
  [ "$NETEM" = 1 ] && run qdisc change dev "$DEV" parent 1:1 handle 10: netem delay "$1ms" loss "$2%"
  return 0
}}
netem_setup() {{
  if [ "$DRY" = 1 ]; then
    echo "# (dry run: netem assumed present)"; NETEM=1
  elif err=$(tc qdisc add dev "$DEV" parent 1:1 handle 10: netem delay {delay}ms loss {loss}% 2>&1); then
    NETEM=1
  else
    echo "tracegen: netem is missing in this kernel ($err): replaying bandwidth only, without delay and loss" >&2
  fi
  [ "$DRY" = 1 ] && echo "tc qdisc add dev $DEV parent 1:1 handle 10: netem delay {delay}ms loss {loss}%"
  return 0
}}
'''

_START = r'''SLEEPER=
trap cleanup EXIT
trap '[ -n "$SLEEPER" ] && kill "$SLEEPER" 2>/dev/null; exit 130' INT
trap '[ -n "$SLEEPER" ] && kill "$SLEEPER" 2>/dev/null; exit 143' TERM
setup
{netem_setup}now_us
START=$NOW
echo "tracegen-replay start $EPOCHREALTIME"
'''


def _num(x: float, digits: int = 3) -> str:
    return f"{x:.{digits}f}".rstrip("0").rstrip(".") if math.isfinite(x) else "0"


def tc_script(trace: Trace, *, qdisc: str = "tbf", mtu: int = 1500, min_step_s: float = MIN_STEP_S,
              nan: str = "error", delay_share: float = 0.5, floor_bps: float = FLOOR_BPS, queue_ms: float = QUEUE_MS,
              netem: bool = True) -> str:
    """The bash script that replays ``trace`` (module docstring); ``netem=False`` leaves delay and loss out."""
    _check(qdisc, mtu, floor_bps, queue_ms)
    steps = plan_steps(trace, min_step_s=min_step_s, nan=nan, delay_share=delay_share)
    rate = np.maximum(steps.rate_bps, floor_bps)
    rate_i = np.ceil(rate).astype(np.int64)
    burst, limit = _buckets(rate, mtu, queue_ms)
    use_netem = netem and (steps.delay_ms is not None or steps.loss is not None or bool(steps.outage.any()))
    n = steps.t_s.size
    delay = steps.delay_ms if steps.delay_ms is not None else np.zeros(n)
    loss = steps.loss if steps.loss is not None else np.zeros(n)
    loss_pct = np.where(steps.outage, 100.0, np.clip(loss, 0.0, 1.0) * 100.0)
    first_delay = float(delay[np.isfinite(delay)][0]) if np.isfinite(delay).any() else 0.0
    first_loss = float(loss_pct[np.isfinite(loss_pct)][0]) if np.isfinite(loss_pct).any() else 0.0
    netem_note = "; delay and loss by netem where the kernel has it" if use_netem else ""
    out = [_HEAD.format(version=__version__, id=trace.id, source=shlex.quote(trace.source or "unnamed"), n=n,
                        end=steps.end_s, qdisc=qdisc, netem_note=netem_note)]
    out.append((_TBF if qdisc == "tbf" else _HTB).format(rate=rate_i[0], burst=burst[0], limit=limit[0]))
    if use_netem:
        out.append(_NETEM.format(delay=_num(first_delay), loss=_num(first_loss, 4)))
    out.append(_START.format(netem_setup="netem_setup\n" if use_netem else ""))
    us = np.rint(steps.t_s * 1e6).astype(np.int64)
    lines = []
    last_delay, last_loss = first_delay, first_loss
    for i in range(n):  # one line of text per change: writing the script, not replaying it
        parts = [f"at {_num(steps.t_s[i], 6)} {us[i]}"] if i else []
        parts.append(f"rate {rate_i[i]} {burst[i]} {limit[i]}")
        if use_netem:
            d = float(delay[i]) if math.isfinite(delay[i]) else last_delay
            lp = float(loss_pct[i]) if math.isfinite(loss_pct[i]) else last_loss
            if i and (d != last_delay or lp != last_loss):
                parts.append(f"netem {_num(d)} {_num(lp, 4)}")
            last_delay, last_loss = d, lp
        lines.append("; ".join(parts))
    out.append("\n".join(lines) + "\n")
    out.append(f"at {_num(steps.end_s, 6)} {int(round(steps.end_s * 1e6))}\n")
    out.append('echo "tracegen-replay end $EPOCHREALTIME"\n')
    return "".join(out)


def write_tc_script(trace: Trace, path: str | Path, *, force: bool = False, **options: Any) -> Path:
    """Write :func:`tc_script` to ``path`` (executable), refusing an existing file unless ``force``."""
    from ..files import write_text_atomic

    path = Path(path)
    if path.exists() and not force:
        raise TracegenError("exists already", path=path, hint="pass --force to replace it")
    write_text_atomic(path, tc_script(trace, **options))
    path.chmod(0o755)
    return path


__all__ = ["tc_script", "write_tc_script", "plan_steps", "Steps", "QDISCS", "NAN_RULES", "MIN_MTU", "MAX_MTU"]
