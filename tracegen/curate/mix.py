"""A target mix: the share of windows a corpus should have in each cell, and of hours per tag value.

A TOML file with up to two kinds of table::

    [cells]                 # share of windows per (partial) cell; every key names the same dimensions
    "level=<1M" = 0.10
    "level=1M-5M" = 0.30
    "level=5M-20M" = 0.40
    "level=>=20M" = 0.20

    [tags.access]           # share of hours per value of one tag (one table per tag)
    lte = 0.7
    wifi = 0.3

Each table's shares must sum to 1 (within 1e-6). A cell the ``[cells]`` table leaves out has a target of
0. Keys are checked against the cell scheme (dimension and bin names) and tags against the traces.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from ..errors import TracegenError

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from .cells import CellScheme

SUM_TOLERANCE = 1e-6


@dataclass(frozen=True)
class TargetMix:
    """Target shares: ``cells`` maps partial cell keys (over the dimensions ``cell_dims``) to shares of
    windows; ``tags`` maps a tag name to its values' shares of hours. ``path`` names the file read."""

    cells: Mapping[str, float] = field(default_factory=dict)
    cell_dims: tuple[str, ...] = ()
    tags: Mapping[str, Mapping[str, float]] = field(default_factory=dict)
    path: str | None = None


def _shares(table: Any, where: str, path: str | None) -> dict[str, float]:
    if not isinstance(table, Mapping) or not table:
        raise TracegenError("must be a table of NAME = SHARE lines", field=where, path=path)
    out: dict[str, float] = {}
    for key, value in table.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
            raise TracegenError(f"share of '{key}' must be a number >= 0, got {value!r}", field=f"{where}.{key}",
                                path=path)
        out[str(key)] = float(value)
    total = sum(out.values())
    if abs(total - 1.0) > SUM_TOLERANCE:
        raise TracegenError(f"shares sum to {total:.6g}, not 1", field=where, path=path,
                            hint="make the shares of this table add up to 1")
    return out


def parse_mix(raw: Mapping[str, Any], scheme: CellScheme, path: str | None = None) -> TargetMix:
    """Check a mix read from TOML (module docstring) against a cell scheme."""
    unknown = sorted(set(raw) - {"cells", "tags"})
    if unknown:
        raise TracegenError(f"unknown table{'s' if len(unknown) > 1 else ''} {', '.join(unknown)}", path=path,
                            field=unknown[0], hint="a target mix has [cells] and [tags.NAME] tables")
    if not raw.get("cells") and not raw.get("tags"):
        raise TracegenError("names no target", path=path, hint="add a [cells] or a [tags.NAME] table")
    cells: dict[str, float] = {}
    dims: tuple[str, ...] = ()
    if "cells" in raw:
        shares = _shares(raw["cells"], "cells", path)
        for key, share in shares.items():
            parsed = scheme.parse_key(key, where=f"cells.{key}")
            these = tuple(n for n in scheme.names if n in parsed)
            if dims and these != dims:
                raise TracegenError(f"names {', '.join(these)} but the first key names {', '.join(dims)}",
                                    field=f"cells.{key}", path=path,
                                    hint="name the same dimensions in every key so the cells do not overlap")
            dims = these
            canonical = ",".join(f"{n}={scheme.dims[scheme.names.index(n)].label(parsed[n])}" for n in dims)
            if canonical in cells:
                raise TracegenError("repeats a cell", field=f"cells.{key}", path=path)
            cells[canonical] = share
    tags: dict[str, dict[str, float]] = {}
    if "tags" in raw:
        if not isinstance(raw["tags"], Mapping) or not raw["tags"]:
            raise TracegenError("must hold one [tags.NAME] table per tag", field="tags", path=path)
        for tag, table in raw["tags"].items():
            tags[str(tag)] = _shares(table, f"tags.{tag}", path)
    return TargetMix(cells, dims, tags, path)


def read_mix(path: str | Path, scheme: CellScheme) -> TargetMix:
    """Read and check a target mix file."""
    p = Path(path)
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TracegenError("no such file", path=p, hint="give a TOML target mix") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise TracegenError(f"cannot be read ({exc})", path=p) from None
    except tomllib.TOMLDecodeError as exc:
        raise TracegenError(f"is not valid TOML ({exc})", path=p) from None
    return parse_mix(raw, scheme, str(p))


__all__ = ["TargetMix", "parse_mix", "read_mix"]
