"""Exports for test benches and emulators, and replay through the kernel's shaper.

``export(traces, to, out_dir)`` writes every trace into a folder it creates (an existing folder is
refused unless ``force``):

* ``csv``, ``parquet``, ``jsonl``: the trace in tracegen's own schema (plain.py), ``ID.csv`` ...;
* ``schedule``: per-packet delivery times derived from the bandwidth (schedule.py), ``ID.schedule.parquet``
  (or ``.csv``), up- and down-link of one group named as a pair;
* ``tc``: a bash script of ``tc`` commands that replays the trace on a device (tc.py), ``ID.tc.sh``.

``replay.replay(trace)`` plays a trace in a pair of network namespaces it creates and removes.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any, Sequence

from ..errors import TracegenError
from ..trace import Trace

FORMATS = ("tc", "schedule", "csv", "parquet", "jsonl")
SCHEDULE_FORMATS = ("parquet", "csv")


def _out_folder(out_dir: str | Path, force: bool) -> Path:
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise TracegenError("is a file, not a folder", path=out, hint="give --out a folder to write into")
    if out.exists() and not force:
        raise TracegenError("exists already", path=out, hint="pass --force to write into it, or choose another --out")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise TracegenError(f"cannot be created ({exc.strerror})", path=out) from None
    return out


def export(traces: Sequence[Trace], to: str, out_dir: str | Path, *, force: bool = False, packet_bytes: int = 1500,
           nan: str = "error", schedule_format: str = "parquet", **tc_options: Any) -> list[Path]:
    """Write ``traces`` as ``to`` into ``out_dir`` (module docstring); returns the files written.

    Everything that can be checked is checked before the folder is made: a failed export leaves no
    folder behind (one it made) and no partial file."""
    from . import plain, schedule, tc

    traces = list(traces)
    if to not in FORMATS:
        raise TracegenError(f"unknown export '{to}'", field="to", hint=f"one of {', '.join(FORMATS)}")
    if not traces:
        raise TracegenError("no traces to export", field="traces")
    if schedule_format not in SCHEDULE_FORMATS:
        raise TracegenError(f"unknown schedule format '{schedule_format}'", field="schedule_format",
                            hint="parquet or csv")
    scripts: list[str] = []
    if to == "tc":
        scripts = [tc.tc_script(t, nan=nan, **tc_options) for t in traces]   # every check before any file
    elif to == "schedule":
        schedule.check_packet_bytes(packet_bytes)
        for t in traces:
            schedule.known_bandwidth(t, nan)
    made = not Path(out_dir).exists()
    out = _out_folder(out_dir, force)
    try:
        if to == "schedule":
            written = schedule.write_schedules(traces, out, packet_bytes=packet_bytes, nan=nan, fmt=schedule_format,
                                               force=force)
            return [w.path for w in written]
        paths = []
        for i, t in enumerate(traces):  # a loop over traces
            if to == "tc":
                from ..files import write_text_atomic

                path = out / f"{t.id}.tc.sh"
                if path.exists() and not force:
                    raise TracegenError("exists already", path=path, hint="pass --force to replace it")
                write_text_atomic(path, scripts[i]).chmod(0o755)
                paths.append(path)
            else:
                writer = {"csv": plain.write_csv, "parquet": plain.write_parquet, "jsonl": plain.write_jsonl}[to]
                paths.append(writer(t, out / f"{t.id}.{to}", force=force))
        return paths
    except BaseException:
        if made:
            shutil.rmtree(out, ignore_errors=True)
        raise


__all__ = ["export", "FORMATS"]
