"""Selecting traces from a catalog index with small ``field OP value`` expressions.

Grammar (each ``--where`` is one condition; several are combined with AND):
- ``FIELD=VALUE[,VALUE...]`` equal to any of the values; ``FIELD!=VALUE[,...]`` none of them
- ``FIELD<NUMBER``, ``<=``, ``>``, ``>=`` for numeric fields (durations, summary figures, weight)
- ``FIELD~PATTERN`` shell-style wildcard match (``*``, ``?``), e.g. ``source~*.csv``
FIELD is an index column (``id``, ``origin``, ``source``, ``group``, ``duration_s``, ``mean_bw_bps``, ...) or
a tag name (``access``, ``mobility``...); ``tag.NAME`` forces the tag reading. Numbers accept
``5e6``, ``5M`` (decimal prefixes k, M, G) and durations such as ``10min`` for fields ending in ``_s``.
"""

from __future__ import annotations

import fnmatch
import re
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from .errors import SelectionError
from .units import parse_duration_s

_EXPR = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_.\-]*)\s*(<=|>=|!=|=|<|>|~)\s*(.*?)\s*$")
_PREFIX = {"k": 1e3, "M": 1e6, "G": 1e9}


@dataclass(frozen=True)
class Condition:
    """One parsed ``field OP value`` condition."""

    field: str
    op: str
    value: str

    @property
    def is_tag(self) -> bool:
        return self.field.startswith("tag.")


def parse(expression: str) -> Condition:
    """Parse one expression; raise SelectionError saying what is wrong."""
    m = _EXPR.match(expression)
    if not m or m.group(3) == "":
        raise SelectionError(f"cannot read selection '{expression}'", field="where",
                             hint="write FIELD=VALUE, FIELD<NUMBER, FIELD~PATTERN (e.g. access=lte, mean_bw_bps<5e6)")
    return Condition(*m.groups())


def _number(text: str, field: str) -> float:
    t = text.strip()
    if t and t[-1] in _PREFIX:
        try:
            return float(t[:-1]) * _PREFIX[t[-1]]
        except ValueError:
            pass
    try:
        return float(t)
    except ValueError:
        pass
    if field.endswith("_s"):
        try:
            return parse_duration_s(t, field)
        except Exception:
            pass
    raise SelectionError(f"'{text}' is not a number", field=field, hint="e.g. 5e6, 5M, 300 or 10min")


def _column(index: pd.DataFrame, cond: Condition) -> tuple[pd.Series, bool]:
    """The values a condition tests, and whether they are numeric."""
    name = cond.field
    if not cond.is_tag and name in index.columns and name != "tags":
        col = index[name]
        return col, pd.api.types.is_numeric_dtype(col)
    tag = name[4:] if cond.is_tag else name
    tags = index["tags"] if "tags" in index.columns else pd.Series([], dtype=object)
    if not any(tag in t for t in tags):
        known_tags = sorted({k for t in tags for k in t})
        fields = [c for c in index.columns if c not in ("tags", "provenance")]
        raise SelectionError(f"no index field or tag named '{tag}'", field="where",
                             hint=f"fields: {', '.join(fields)}; tags: {', '.join(known_tags) or 'none'}")
    return pd.Series([t.get(tag) for t in tags], index=index.index, dtype=object), False


def mask(index: pd.DataFrame, conditions: Iterable[str | Condition]) -> np.ndarray:
    """Boolean mask of the index rows that meet every condition."""
    keep = np.ones(len(index), dtype=bool)
    for raw in conditions:
        cond = raw if isinstance(raw, Condition) else parse(raw)
        col, numeric = _column(index, cond)
        if cond.op in ("<", "<=", ">", ">="):
            if not numeric:
                raise SelectionError(f"'{cond.field}' is not numeric, so '{cond.op}' does not apply",
                                     field="where", hint="use = or ~ for text fields and tags")
            x = _number(cond.value, cond.field)
            v = col.to_numpy(dtype=float)
            with np.errstate(invalid="ignore"):
                hit = {"<": v < x, "<=": v <= x, ">": v > x, ">=": v >= x}[cond.op]
        elif cond.op == "~":
            hit = np.array([s is not None and fnmatch.fnmatchcase(str(s), cond.value) for s in col])
        else:
            wanted = [w.strip() for w in cond.value.split(",")]
            if numeric:
                nums = np.array([_number(w, cond.field) for w in wanted])
                hit = np.isin(col.to_numpy(dtype=float), nums)
            else:
                hit = np.array([s is not None and str(s) in wanted for s in col], dtype=bool)
            if cond.op == "!=":
                hit = ~hit
        keep &= np.asarray(hit, dtype=bool)
    return keep


def select(index: pd.DataFrame, conditions: Sequence[str | Condition]) -> pd.DataFrame:
    """The index rows that meet every condition (all rows when there are none)."""
    if not conditions:
        return index
    return index[mask(index, conditions)]
