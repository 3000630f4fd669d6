"""Replaying a trace through the kernel's shaper in network namespaces tracegen creates and removes.

``NamespacePair(name)`` makes two namespaces, ``NAME-send`` and ``NAME-recv``, joined by a veth pair
(``NAME-s`` at 10.201.0.1/24 in the sender, ``NAME-r`` at 10.201.0.2/24 in the receiver), and deletes
both on leaving the ``with`` block, on an exception, on Ctrl-C and on SIGTERM (deleting a namespace
removes its devices and their qdiscs). ``replay(trace, ...)`` writes the trace's tc script (tc.py),
plays it on the sender's veth (so traffic from sender to receiver is shaped), optionally runs a command
meanwhile, and cleans up. Needs root and the ``ip`` and ``tc`` programs (iproute2).
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from ..errors import TracegenError
from ..trace import Trace
from .tc import tc_script

SEND_ADDRESS, RECV_ADDRESS = "10.201.0.1", "10.201.0.2"
_NAME = re.compile(r"^[a-z][a-z0-9]{0,9}$")   # veth names are NAME-s / NAME-r: at most 15 bytes in Linux
COMMAND_TIMEOUT_S = 10.0


def missing_requirements() -> str | None:
    """Why replay cannot run here (None when it can): root and iproute2's ip and tc are needed."""
    if os.name != "posix" or not hasattr(os, "geteuid") or os.geteuid() != 0:
        return "replay needs root (network namespaces and qdiscs are privileged): run it with sudo"
    for tool in ("ip", "tc"):
        if shutil.which(tool) is None:
            return f"replay needs the '{tool}' program (package iproute2)"
    return None


def _ip(*args: str, check: bool = True) -> subprocess.CompletedProcess:
    run = subprocess.run(["ip", *args], capture_output=True, text=True, timeout=COMMAND_TIMEOUT_S)
    if check and run.returncode != 0:
        raise TracegenError(f"'ip {' '.join(args)}' failed: {run.stderr.strip()}", field="replay",
                            hint="is a namespace of that name left over? pick another --name")
    return run


class NamespacePair:
    """Two network namespaces joined by a veth pair (module docstring); a context manager."""

    def __init__(self, name: str = "tgr") -> None:
        if not _NAME.match(name):
            raise TracegenError(f"name '{name}' must be 1-10 lower-case letters or digits, starting with a letter",
                                field="name")
        self.name = name
        self.send, self.recv = f"{name}-send", f"{name}-recv"
        self.send_dev, self.recv_dev = f"{name}-s", f"{name}-r"
        self._old: dict[int, object] = {}
        self._made: list[str] = []

    def __enter__(self) -> "NamespacePair":
        why = missing_requirements()
        if why:
            raise TracegenError(why, field="replay")
        existing = _ip("netns", "list").stdout
        for ns in (self.send, self.recv):
            if re.search(rf"^{re.escape(ns)}(\s|$)", existing, re.M):
                raise TracegenError(f"network namespace '{ns}' exists already", field="name",
                                    hint=f"remove it (ip netns del {ns}) or pick another --name")
        self._old = {sig: signal.getsignal(sig) for sig in (signal.SIGTERM,)}
        signal.signal(signal.SIGTERM, _raise_exit)
        try:
            for ns in (self.send, self.recv):
                _ip("netns", "add", ns)
                self._made.append(ns)
            _ip("link", "add", self.send_dev, "netns", self.send, "type", "veth", "peer", "name", self.recv_dev,
                "netns", self.recv)
            _ip("-n", self.send, "addr", "add", f"{SEND_ADDRESS}/24", "dev", self.send_dev)
            _ip("-n", self.recv, "addr", "add", f"{RECV_ADDRESS}/24", "dev", self.recv_dev)
            for ns, dev in ((self.send, self.send_dev), (self.recv, self.recv_dev)):
                _ip("-n", ns, "link", "set", dev, "up")
                _ip("-n", ns, "link", "set", "lo", "up")
        except BaseException:
            self.close()
            raise
        return self

    def close(self) -> None:
        """Delete the namespaces made (their veth ends and qdiscs go with them)."""
        for ns in reversed(self._made):
            _ip("netns", "del", ns, check=False)
        self._made.clear()
        for sig, handler in self._old.items():
            signal.signal(sig, handler)
        self._old = {}

    def __exit__(self, *exc: object) -> None:
        self.close()

    def exec_argv(self, side: str, argv: Sequence[str]) -> list[str]:
        """``argv`` run inside the sender's (``send``) or receiver's (``recv``) namespace."""
        ns = {"send": self.send, "recv": self.recv}[side]
        return ["ip", "netns", "exec", ns, *argv]


def _raise_exit(signum, frame) -> None:  # SIGTERM: unwind through the finally blocks that clean up
    raise SystemExit(128 + signum)


@dataclass(frozen=True)
class ReplayReport:
    """What a replay did: the script's start and end (Unix time, from its own output), its exit status,
    and the command's exit status (None without a command)."""

    start_epoch_s: float | None
    end_epoch_s: float | None
    script_status: int
    command_status: int | None
    stderr: str


def start_script(pair: NamespacePair, script: str, workdir: Path) -> subprocess.Popen:
    """Write ``script`` into ``workdir`` and start it on the sender's veth; returns the running process."""
    path = workdir / "replay.sh"
    path.write_text(script, encoding="utf-8")
    return subprocess.Popen(pair.exec_argv("send", ["bash", str(path), pair.send_dev]), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def _epochs(out: str) -> tuple[float | None, float | None]:
    start = re.search(r"tracegen-replay start ([0-9.]+)", out)
    end = re.search(r"tracegen-replay end ([0-9.]+)", out)
    return (float(start.group(1)) if start else None, float(end.group(1)) if end else None)


def replay(trace: Trace, *, name: str = "tgr", command: Sequence[str] | None = None, **script_options) -> ReplayReport:
    """Play ``trace`` on a fresh namespace pair (module docstring), running ``command`` meanwhile (in the
    calling namespace: use ``ip netns exec NAME-send ...`` inside it); everything is removed afterwards."""
    script = tc_script(trace, **script_options)
    with NamespacePair(name) as pair, tempfile.TemporaryDirectory(prefix="tracegen-replay-") as tmp:
        proc = start_script(pair, script, Path(tmp))
        cmd_status = None
        try:
            if command:
                cmd_status = subprocess.run(list(command)).returncode
            out, err = proc.communicate()
        finally:
            if proc.poll() is None:
                proc.terminate()
                try:
                    proc.communicate(timeout=COMMAND_TIMEOUT_S)
                except subprocess.TimeoutExpired:
                    proc.kill()
        start, end = _epochs(out or "")
        return ReplayReport(start, end, proc.returncode, cmd_status, err or "")


__all__ = ["NamespacePair", "replay", "start_script", "missing_requirements", "ReplayReport", "SEND_ADDRESS",
           "RECV_ADDRESS"]
