"""What every reader shares: the user's labels for a file, provenance, and building the Traces."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import InputError
from ..trace import GAP_FACTOR, Trace
from .textlines import file_sha256

# Analysis puts a trace on a regular grid of its nominal step (the median spacing), so a trace may span at
# most this many of its steps: one glitched time or a wrong unit would otherwise mean a grid of gigabytes
# (the packets reader bounds its bins by the same number: 194 days of 1 s steps).
MAX_STEPS = 1 << 24
# and at most this long (about 136 years): no measurement does; a longer span is a wrong unit or a glitch
MAX_SPAN_S = float(2**32)


@dataclass(frozen=True)
class Labels:
    """What the user says about the files of one ingest: applied to every trace read.

    ``group`` defaults to the file's name without suffix (one file = one session), ``source`` to the
    file's name. ``keep_personal`` turns off dropping and coarsening of personal fields.
    """

    tags: Mapping[str, str] = field(default_factory=dict)
    group: str | None = None
    source: str | None = None
    keep_personal: bool = False


def provenance(path: str | Path, reader: str, options: Mapping[str, Any], **extra: Any) -> dict[str, Any]:
    """Provenance for a trace read from ``path``: reader, file name (not its directory), sha256, options."""
    from .. import __version__

    p = Path(path)
    out = {"reader": reader, "file": p.name, "file_sha256": file_sha256(p),
           "options": {k: v for k, v in sorted(options.items()) if v is not None},
           "tracegen_version": __version__}
    out.update(extra)
    return out


def build_trace(path: str | Path, labels: Labels, prov: Mapping[str, Any], *, t_s: np.ndarray,
                lines: np.ndarray | None = None, part: str | None = None,
                extra_tags: Mapping[str, str] | None = None, group: str | None = None,
                time_field: str | None = None, **columns: Any) -> Trace:
    """Validate columns into a Trace with the labels applied.

    ``part`` names one run inside a file that holds several (a segment, an SSRC); it joins the default
    source and goes into provenance. ``group`` overrides the default group (e.g. from a device column).
    ``time_field`` names the times in errors from :func:`check_extent`.
    """
    p = Path(path)
    source = labels.source or p.name
    if part is not None and not labels.source:
        source = f"{p.name}#{part}"
    tags = dict(extra_tags or {})
    tags.update(labels.tags)  # what the user says on the command line wins over what the file says
    prov = dict(prov)
    if part is not None:
        prov["part"] = part
    tr = Trace.from_columns(t_s, path=str(path), lines=lines, origin="measured", source=source, tags=tags,
                            group=labels.group or group or p.stem, provenance=prov, **columns)
    check_extent(tr, path=path, lines=lines, part=part, field=time_field)
    return tr


def check_extent(tr: Trace, *, path: str | Path, lines: np.ndarray | None = None, part: str | None = None,
                 field: str | None = None) -> None:
    """Refuse a trace (times validated: finite, strictly increasing) that is no usable trace: fewer than two
    samples (no step), or a span of more than MAX_STEPS nominal steps or MAX_SPAN_S seconds.

    The error names the line of the first sample past the bound and, when one jump makes most of the
    span, the line before that jump.
    """
    def line(i: int) -> int | None:
        return None if lines is None else int(lines[i])

    t = tr["t_s"]
    which = "" if part is None else f" ({part})"
    if len(t) < 2:
        raise InputError(f"holds a single sample{which}", path=str(path), line=line(0), field=field,
                         hint="a trace needs at least two samples (their spacing is its step); add rows or leave "
                              "this one out")
    step = tr.step_s
    rel = t - t[0]
    limit = min(MAX_STEPS * step, MAX_SPAN_S)
    if rel[-1] <= limit:
        return
    i = int(np.argmax(rel > limit))  # the first sample past the bound
    dt = np.diff(t[:i + 1])
    j = int(np.argmax(dt))  # the largest jump up to it: from sample j to j + 1
    bound = (f"more than {MAX_SPAN_S:.6g} s (136 years)" if limit == MAX_SPAN_S
             else f"more than {MAX_STEPS} steps of its {step:.6g} s step")
    days = rel[i] / 86400
    reach = f"{rel[i]:.6g} s" if days < 1 else f"{days:,.0f} days" if days < 1e9 else f"{days:.3g} days"
    if dt[j] > GAP_FACTOR * step and dt[j] >= 0.5 * rel[i]:
        where = "" if line(j) is None else f" after line {line(j)}"
        message = f"time jumps by {dt[j]:.6g} s{where}: the trace{which} reaches {reach}, {bound}"
    else:
        message = f"time reaches {reach} after the first sample{which}, {bound}"
    raise InputError(message, path=str(path), line=line(i), field=field,
                     hint="a glitched time or the wrong time unit? fix or drop the bad row, or split the file "
                          "into shorter traces")


def require_rows(n: int, path: str | Path, what: str = "data rows") -> None:
    """Raise when a file yielded nothing to read."""
    if n == 0:
        raise InputError(f"holds no {what}", path=str(path), hint="is this the right file and format?")


def parse_floats(cells: list[str], *, path: str | Path, lines: np.ndarray, column: str) -> np.ndarray:
    """Convert text cells to float64; empty, 'nan', 'NA' and '-' mean unknown (NaN).

    Raises InputError naming the first line whose cell is not a number.
    """
    arr = np.asarray(cells, dtype=object)
    stripped = np.char.strip(arr.astype(str))
    missing = np.isin(np.char.lower(stripped), ["", "nan", "na", "n/a", "null", "none", "-"])
    work = np.where(missing, "nan", stripped)
    try:
        return work.astype(np.float64)
    except ValueError:
        pass
    out = np.empty(len(work))
    for i, cell in enumerate(work):  # only reached on bad input, to find the offending line
        try:
            out[i] = float(cell)
        except ValueError:
            raise InputError(f"'{cell[:40]}' is not a number", path=str(path), line=int(lines[i]),
                             field=column, hint="leave the cell empty for unknown") from None
    return out
