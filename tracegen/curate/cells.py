"""Condition cells: the bins a corpus is audited, split and widened by.

A *cell* is one combination of bins of a few window features, one bin per *dimension*. Windows are the
tumbling windows of :func:`tracegen.compare.features.window_features` at one scale (60 s by default), so
a trace spans as many cells as its conditions change. The dimensions and their default edges:

============  ===============================================  ==================  ===================
dimension     value of a window                                default edges       bins
============  ===============================================  ==================  ===================
level         geometric mean bandwidth of its non-outage       1M, 5M, 20M bit/s   <1M, 1M-5M, 5M-20M,
              samples, exp(``mean_log_bw``); 0 when all of it                      20M+
              is outage
variability   coefficient of variation ``cv_bw``               0.2, 0.5            <0.2, 0.2-0.5, 0.5+
rtt           median RTT ``rtt_p50_ms``                        50, 150 ms          <50ms, 50ms-150ms,
                                                                                   150ms+
loss          mean loss ``loss_mean``                          1 %, 5 %            <1%, 1%-5%, 5%+
outage        outage share ``outage_share``                    none, 10 %          none, <10%, 10%+
============  ===============================================  ==================  ===================

Bins are right-open, ``[edge_i, edge_i+1)``; ``X+`` reads "X and above". ``outage`` has a bin of its own for exactly 0 ("none") before
its edges. A window whose value is unknown (NaN: no RTT measured, say) is in the bin ``unknown`` of that
dimension. The edges are ours, chosen as round figures that separate what media traffic notices (about
1 Mbit/s for a video call at low resolution, 5 and 20 Mbit/s for HD and beyond, common practice; ITU-T
G.114 puts the comfortable one-way delay for interactive speech at up to 150 ms, from memory, so a round
trip past 150 ms already spends most of it); change them with ``CellScheme.with_edges`` or ``--bins DIM=E1,E2,...``.

A cell's *key* names its bins in the scheme's order: ``level=1M-5M,variability=<0.2,...,outage=none``.
A *partial* key names some dimensions only (a target mix may speak of ``level=<1M`` alone).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np

from ..compare.features import Prepared, WindowTable, prepare, window_features
from ..compare.gap import common_step
from ..errors import TracegenError
from ..trace import Trace

DEFAULT_SCALE_S = 60.0
UNKNOWN = "unknown"
NONE_LABEL = "none"
_SI = (("G", 1e9), ("M", 1e6), ("k", 1e3))
_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([kMG%]|ms)?\s*$")


def _si(x: float) -> str:
    for prefix, factor in _SI:
        if abs(x) >= factor:
            return f"{x / factor:g}{prefix}"
    return f"{x:g}"


def _significant(x: np.ndarray, digits: int = 12) -> np.ndarray:
    """``x`` rounded to ``digits`` significant digits: exp(log(5e6)) is 4999999.999999999, and a flat
    5 Mbit/s trace must land in the bin that starts at 5M."""
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = 10.0 ** (digits - 1 - np.floor(np.log10(np.abs(x))))
        return np.where(np.isfinite(scale) & (x != 0), np.round(x * scale) / scale, x)


@dataclass(frozen=True)
class Dimension:
    """One axis of the cells: which window value it bins (``feature``), where (``edges``, increasing) and
    how its labels print (``unit``: ``bps``, ``ms``, ``share`` or empty). ``zero_bin`` puts exactly 0 in
    a bin of its own ("none") ahead of the edges."""

    name: str
    feature: str
    edges: tuple[float, ...]
    unit: str = ""
    zero_bin: bool = False

    def __post_init__(self) -> None:
        edges = tuple(float(e) for e in self.edges)
        if not edges or any(not math.isfinite(e) for e in edges) or any(b <= a for a, b in zip(edges, edges[1:])):
            raise TracegenError(f"edges {list(self.edges)} must be one or more finite numbers, increasing",
                                field=f"bins.{self.name}", hint="e.g. --bins level=1M,5M,20M")
        if self.zero_bin and edges[0] <= 0:
            raise TracegenError(f"edges {list(self.edges)} must be above 0 (exactly 0 has its own bin 'none')",
                                field=f"bins.{self.name}")
        object.__setattr__(self, "edges", edges)

    def _show(self, x: float) -> str:
        if self.unit == "bps":
            return _si(x)
        if self.unit == "ms":
            return f"{x:g}ms"
        if self.unit == "share":
            return f"{x * 100:g}%"
        return f"{x:g}"

    @property
    def labels(self) -> tuple[str, ...]:
        """The bin labels in order (``unknown`` is not among them)."""
        e = [self._show(x) for x in self.edges]
        out = [f"<{e[0]}"] + [f"{a}-{b}" for a, b in zip(e, e[1:])] + [f"{e[-1]}+"]
        return ((NONE_LABEL,) if self.zero_bin else ()) + tuple(out)

    def values(self, table: WindowTable) -> np.ndarray:
        """This dimension's value for every window of ``table``."""
        v = table.values[:, table.features.index(self.feature)]
        if self.feature == "mean_log_bw":
            all_outage = table.values[:, table.features.index("outage_share")] >= 1.0
            v = np.where(all_outage, 0.0, _significant(np.exp(v)))
        return v

    def codes(self, values: np.ndarray) -> np.ndarray:
        """Bin index of each value (-1 for unknown)."""
        v = np.asarray(values, dtype=np.float64)
        code = np.searchsorted(np.asarray(self.edges), v, side="right")
        if self.zero_bin:
            code = np.where(v == 0.0, 0, code + 1)
        return np.where(np.isnan(v), -1, code).astype(np.int16)

    def label(self, code: int) -> str:
        return UNKNOWN if code < 0 else self.labels[code]

    def code_of(self, label: str, where: str = "cell") -> int:
        if label == UNKNOWN:
            return -1
        try:
            return self.labels.index(label)
        except ValueError:
            raise TracegenError(f"'{label}' is not a bin of {self.name}", field=where,
                                hint=f"bins: {', '.join(self.labels + (UNKNOWN,))}") from None


DIMENSIONS = (
    Dimension("level", "mean_log_bw", (1e6, 5e6, 20e6), "bps"),
    Dimension("variability", "cv_bw", (0.2, 0.5)),
    Dimension("rtt", "rtt_p50_ms", (50.0, 150.0), "ms"),
    Dimension("loss", "loss_mean", (0.01, 0.05), "share"),
    Dimension("outage", "outage_share", (0.1,), "share", zero_bin=True),
)


def parse_number(text: str, where: str) -> float:
    """A bin edge as written on a command line: ``5M``, ``150ms``, ``150``, ``1%`` or ``0.01``."""
    m = _NUMBER.match(str(text))
    if not m:
        raise TracegenError(f"'{text}' is not a number", field=where, hint="e.g. 5M, 150, 150ms, 1% or 0.01")
    x, suffix = float(m.group(1)), m.group(2)
    return x * {"k": 1e3, "M": 1e6, "G": 1e9, "%": 0.01}.get(suffix or "", 1.0)


@dataclass(frozen=True)
class CellScheme:
    """Which dimensions make a cell, and the window length their values are read on."""

    dims: tuple[Dimension, ...] = DIMENSIONS
    scale_s: float = DEFAULT_SCALE_S

    def __post_init__(self) -> None:
        if not self.dims:
            raise TracegenError("a cell needs at least one dimension", field="dims",
                                hint=f"choose from {', '.join(d.name for d in DIMENSIONS)}")
        names = [d.name for d in self.dims]
        if len(set(names)) != len(names):
            raise TracegenError(f"dimensions {names} repeat one", field="dims")
        if not (isinstance(self.scale_s, (int, float)) and math.isfinite(self.scale_s) and self.scale_s > 0):
            raise TracegenError(f"window length {self.scale_s!r} s must be a positive number", field="scale_s")

    @classmethod
    def build(cls, dims: Sequence[str] | str | None = None, bins: Mapping[str, Sequence[float | str]] | Sequence[str]
              | None = None, scale_s: float = DEFAULT_SCALE_S) -> "CellScheme":
        """A scheme from dimension names (default all) and edge overrides, either a mapping
        ``{"level": [1e6, 5e6]}`` or command-line texts ``["level=1M,5M"]``."""
        by_name = {d.name: d for d in DIMENSIONS}
        if isinstance(dims, str):
            dims = [d.strip() for d in dims.split(",") if d.strip()]
        chosen = []
        for name in dims or [d.name for d in DIMENSIONS]:
            if name not in by_name:
                raise TracegenError(f"no dimension named '{name}'", field="dims",
                                    hint=f"choose from {', '.join(by_name)}")
            chosen.append(by_name[name])
        overrides: dict[str, list[float]] = {}
        if isinstance(bins, Mapping):
            overrides = {k: [parse_number(x, f"bins.{k}") if isinstance(x, str) else float(x) for x in v]
                         for k, v in bins.items()}
        else:
            for text in bins or ():
                name, sep, rest = str(text).partition("=")
                if not sep or not rest.strip():
                    raise TracegenError(f"cannot read '{text}'", field="bins", hint="write DIM=EDGE,EDGE,... e.g. level=1M,5M,20M")
                overrides[name.strip()] = [parse_number(x, f"bins.{name.strip()}") for x in rest.split(",") if x.strip()]
        scheme = cls(tuple(chosen), float(scale_s))
        for name, edges in overrides.items():
            scheme = scheme.with_edges(name, edges)
        return scheme

    def with_edges(self, name: str, edges: Sequence[float]) -> "CellScheme":
        """The same scheme with one dimension's edges replaced."""
        names = [d.name for d in self.dims]
        if name not in names:
            raise TracegenError(f"no dimension named '{name}' in this scheme", field="bins",
                                hint=f"dimensions: {', '.join(names)}")
        return replace(self, dims=tuple(replace(d, edges=tuple(edges)) if d.name == name else d for d in self.dims))

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(d.name for d in self.dims)

    def codes(self, table: WindowTable) -> np.ndarray:
        """``(windows, dims)`` bin indices of every window of ``table`` (-1 for unknown)."""
        if not self.dims:
            return np.zeros((len(table), 0), dtype=np.int16)
        return np.stack([d.codes(d.values(table)) for d in self.dims], axis=1) if len(table) else \
            np.zeros((0, len(self.dims)), dtype=np.int16)

    def key(self, code_row: Sequence[int]) -> str:
        """The key of one cell from its bin indices."""
        return ",".join(f"{d.name}={d.label(int(c))}" for d, c in zip(self.dims, code_row))

    def keys(self, codes: np.ndarray) -> tuple[np.ndarray, list[str]]:
        """Cell number of each row of ``codes`` and the keys of the cells that occur, sorted by key."""
        if codes.shape[0] == 0:
            return np.zeros(0, dtype=np.int64), []
        uniq, inverse = np.unique(codes, axis=0, return_inverse=True)
        keys = [self.key(row) for row in uniq]
        order = np.argsort(np.array(keys, dtype=object).astype(str), kind="stable")
        rank = np.empty_like(order)
        rank[order] = np.arange(order.size)
        return rank[inverse.reshape(-1)], [keys[i] for i in order]

    def parse_key(self, key: str, where: str = "cell") -> dict[str, int]:
        """A full or partial key as ``{dimension: bin index}``; TracegenError naming what is wrong."""
        by_name = {d.name: d for d in self.dims}
        out: dict[str, int] = {}
        for part in str(key).split(","):
            name, sep, label = part.strip().partition("=")
            name, label = name.strip(), label.strip()
            if not sep or not name or not label:
                raise TracegenError(f"cannot read cell '{key}'", field=where,
                                    hint="write DIM=BIN[,DIM=BIN...], e.g. level=<1M,outage=none")
            if name not in by_name:
                raise TracegenError(f"no dimension named '{name}' in cell '{key}'", field=where,
                                    hint=f"dimensions: {', '.join(by_name)}")
            if name in out:
                raise TracegenError(f"cell '{key}' names {name} twice", field=where)
            out[name] = by_name[name].code_of(label, where)
        return out

    def matches(self, codes: np.ndarray, partial: Mapping[str, int]) -> np.ndarray:
        """Which rows of ``codes`` fall in a (partial) cell."""
        hit = np.ones(codes.shape[0], dtype=bool)
        for name, code in partial.items():
            hit &= codes[:, self.names.index(name)] == code
        return hit

    def describe(self) -> dict[str, object]:
        """The scheme as plain data (for JSON)."""
        return {"scale_s": self.scale_s,
                "dims": [{"name": d.name, "feature": d.feature, "edges": list(d.edges), "unit": d.unit,
                          "bins": list(d.labels)} for d in self.dims]}


@dataclass(frozen=True)
class CellTable:
    """Every window of a set of traces with its cell: ``cell[i]`` indexes ``keys``; ``trace[i]`` indexes the
    traces given; ``codes[i]`` holds the bin of each dimension."""

    scheme: CellScheme
    step_s: float
    trace: np.ndarray
    start_s: np.ndarray
    codes: np.ndarray
    cell: np.ndarray
    keys: list[str]
    windows: WindowTable
    notes: tuple[str, ...]

    def __len__(self) -> int:
        return int(self.trace.size)

    def counts(self, n_traces: int) -> np.ndarray:
        """``(n_traces, len(keys))`` windows of each trace in each cell."""
        out = np.zeros((n_traces, len(self.keys)), dtype=np.int64)
        np.add.at(out, (self.trace, self.cell), 1)
        return out


def cell_table(traces: Sequence[Trace] | Prepared, scheme: CellScheme | None = None,
               step_s: float | None = None) -> CellTable:
    """The cells of every window of ``traces``, put on ``step_s`` (default: their median step rounded to two
    significant digits, as the coverage report does)."""
    scheme = scheme or CellScheme()
    if isinstance(traces, Prepared):
        prep = traces
    else:
        traces = list(traces)
        prep = prepare(traces, step_s if step_s is not None else common_step(traces, traces))
    table = window_features(prep, scheme.scale_s)
    codes = scheme.codes(table)
    cell, keys = scheme.keys(codes)
    return CellTable(scheme, prep.step_s, table.trace, table.start_s, codes, cell, keys, table,
                     prep.notes + table.notes)


def trace_cell_counts(traces: Sequence[Trace], scheme: CellScheme | None = None,
                      step_s: float | None = None) -> tuple[list[str], np.ndarray]:
    """Cell keys and the ``(n_traces, n_cells)`` window counts of each trace in each cell."""
    table = cell_table(traces, scheme, step_s)
    return table.keys, table.counts(len(traces))


__all__ = ["Dimension", "DIMENSIONS", "CellScheme", "CellTable", "cell_table", "trace_cell_counts", "parse_number",
           "DEFAULT_SCALE_S", "UNKNOWN"]
