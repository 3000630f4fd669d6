"""What every reader shares: the user's labels for a file, provenance, and building the Traces."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import InputError
from ..trace import Trace
from .textlines import file_sha256


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
                **columns: Any) -> Trace:
    """Validate columns into a Trace with the labels applied.

    ``part`` names one run inside a file that holds several (a segment, an SSRC); it joins the default
    source and goes into provenance. ``group`` overrides the default group (e.g. from a device column).
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
    return Trace.from_columns(t_s, path=str(path), lines=lines, origin="measured", source=source, tags=tags,
                              group=labels.group or group or p.stem, provenance=prov, **columns)


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
