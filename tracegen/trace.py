"""The Trace value: one network path's conditions over time, the one schema every module uses.

Columns carry their units in their names. ``t_s`` is seconds from the trace's start, strictly increasing.
A rate sample (bandwidth, loss, cross traffic) holds from its own time until the next sample, and the
last one for one nominal step; a point sample (RTT, jitter) is a measurement taken at its time.
Unknown is NaN, never 0: a bandwidth of 0 is an outage.
"""

from __future__ import annotations

import hashlib
import json
import platform
from dataclasses import dataclass, field, replace
from typing import Any, Mapping

import numpy as np
import pyarrow as pa

from .errors import InputError

SCHEMA_VERSION = 1

# name -> (kind, meaning). kind: "float" (float64, NaN for unknown), "int" (int64), "str" (null for unknown).
COLUMNS: dict[str, tuple[str, str]] = {
    "t_s": ("float", "seconds from the trace's start, strictly increasing"),
    "bandwidth_bps": ("float", "available bandwidth in bit/s, >= 0 (0 is an outage)"),
    "rtt_ms": ("float", "round-trip time in milliseconds, > 0"),
    "loss": ("float", "fraction of packets lost in the interval, 0..1"),
    "jitter_ms": ("float", "interarrival jitter in milliseconds, >= 0"),
    "cell": ("str", "serving cell or access-point label"),
    "lat_deg": ("float", "latitude in degrees (coarsened on ingest unless asked otherwise)"),
    "lon_deg": ("float", "longitude in degrees (coarsened on ingest unless asked otherwise)"),
    "state": ("int", "hidden state of the generating model (synthetic traces)"),
    "cross_bps": ("float", "cross traffic on the bottleneck in bit/s (synthetic traces)"),
    "queue_ms": ("float", "bottleneck queueing delay in milliseconds (synthetic traces)"),
    "event": ("str", "event marker such as 'handover' or 'outage' (synthetic traces)"),
}
CORE_COLUMNS = ("t_s", "bandwidth_bps", "rtt_ms", "loss", "jitter_ms")
RATE_COLUMNS = ("bandwidth_bps", "loss", "cross_bps", "queue_ms")
POINT_COLUMNS = ("rtt_ms", "jitter_ms", "lat_deg", "lon_deg")
HELD_COLUMNS = ("cell", "state")
ORIGINS = ("measured", "synthetic")

# Below this a sample counts as an outage in the summary figures (common practice: a path carrying
# under 10 kbit/s is not usable for media; the figure is ours).
OUTAGE_FLOOR_BPS = 10_000.0
# A sample followed by a silence longer than this many nominal steps holds for one step only.
GAP_FACTOR = 3.0


def _as_float(values: Any, n: int) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        arr = arr.reshape(-1)
    return arr


def _as_str_slow(values: Any) -> np.ndarray:
    out = np.empty(len(values), dtype=object)
    for i, v in enumerate(values):  # the general definition; _as_str takes it only for unusual input
        out[i] = None if v is None or (isinstance(v, float) and np.isnan(v)) else str(v)
    return out


_NONE_ADDRESS = id(None)
_CPYTHON = platform.python_implementation() == "CPython"


def _none_mask(arr: np.ndarray) -> np.ndarray:
    """True where a 1-D object array holds None.

    On CPython an object's id is its address and an object array stores addresses, so the array's raw
    bytes compared with id(None) answer at memory speed (no object is touched); elsewhere, or if numpy
    ever refuses the raw bytes of an object array, an elementwise comparison."""
    if _CPYTHON:
        try:
            raw = memoryview(arr).cast("B") if arr.flags.c_contiguous else arr.tobytes()
            return np.frombuffer(raw, dtype=np.uintp) == _NONE_ADDRESS
        except (TypeError, ValueError, BufferError):  # pragma: no cover - no such numpy yet
            pass
    return np.array([v is None for v in arr], dtype=bool)  # pragma: no cover - other interpreters


def _str_values(vals: np.ndarray) -> bool:
    """True when every element of a 1-D object array (no None) is a str: pyarrow infers ``string`` only
    then (bytes, numbers and NaN give another type or an error)."""
    if vals.size <= 32:
        return all(isinstance(v, str) for v in vals.tolist())
    try:
        return pa.array(vals).type == pa.string()
    except (pa.ArrowException, TypeError, ValueError, OverflowError):
        return False


def _as_str(values: Any) -> np.ndarray:
    """An object array of str and None: None or a float NaN give None, anything else ``str(v)``.

    Fast path (no Python per sample): when every value is None or a str, the values are kept as they
    are (a str subclass stays itself; it compares and hashes as its text)."""
    if isinstance(values, np.ndarray) and values.ndim != 1:
        return _as_str_slow(values)
    try:
        if isinstance(values, np.ndarray):
            arr = values.astype(object)  # a copy: the Trace must not share (and freeze) the caller's array
        else:
            arr = np.fromiter(values, dtype=object, count=len(values))
    except (TypeError, ValueError):
        return _as_str_slow(values)
    null = _none_mask(arr)
    if null.all() or _str_values(arr[~null]):
        return arr
    return _as_str_slow(arr)


def _locate(index: int, path: str | None, lines: np.ndarray | None) -> dict[str, Any]:
    if lines is not None and 0 <= index < len(lines):
        return {"path": path, "line": int(lines[index])}
    return {"path": path, "hint_index": index}


def _fail(message: str, index: int, column: str, path: str | None, lines: np.ndarray | None,
          hint: str) -> InputError:
    loc = _locate(index, path, lines)
    if "hint_index" in loc:
        message = f"{message} (sample {loc.pop('hint_index')})"
    return InputError(message, field=column, hint=hint, **loc)


def validate_columns(data: Mapping[str, np.ndarray], *, path: str | None = None,
                     lines: np.ndarray | None = None) -> None:
    """Check the Trace invariants; raise InputError naming the first offending sample.

    ``lines`` maps sample index to the source file's line number so the error can name the line.
    """
    unknown = sorted(set(data) - set(COLUMNS))
    if unknown:
        raise InputError(f"unknown column(s) {unknown}", path=path,
                         hint=f"known columns: {', '.join(COLUMNS)}")
    t = data["t_s"]
    n = len(t)
    if n == 0:
        raise InputError("no samples", path=path, hint="the file holds no data rows")
    for name, arr in data.items():
        if len(arr) != n:
            raise InputError(f"has {len(arr)} values but t_s has {n}", field=name, path=path)
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        raise _fail("time is missing or not finite", int(bad[0]), "t_s", path, lines,
                    "every sample needs a time")
    if n > 1:
        dt = np.diff(t)
        bad = np.flatnonzero(dt <= 0)
        if bad.size:
            i = int(bad[0]) + 1
            what = "repeats the previous time" if dt[i - 1] == 0 else "goes back in time"
            raise _fail(f"time {t[i]:g} s {what} ({t[i - 1]:g} s)", i, "t_s", path, lines,
                        "times must strictly increase: sort the file or drop duplicate rows")
    checks = (
        ("bandwidth_bps", lambda a: a < 0, "is negative", "bandwidth must be >= 0; use an empty cell for unknown"),
        ("bandwidth_bps", np.isinf, "is infinite", "use an empty cell for unknown"),
        ("rtt_ms", lambda a: a <= 0, "is not positive", "RTT must be > 0; use an empty cell for unknown"),
        ("rtt_ms", np.isinf, "is infinite", "use an empty cell for unknown"),
        ("loss", lambda a: (a < 0) | (a > 1), "is outside 0..1",
         "loss is a fraction; if the file has percent, say so with the loss unit"),
        ("jitter_ms", lambda a: (a < 0) | np.isinf(a), "is negative or infinite", "jitter must be >= 0"),
        ("cross_bps", lambda a: a < 0, "is negative", "cross traffic must be >= 0"),
        ("queue_ms", lambda a: a < 0, "is negative", "queueing delay must be >= 0"),
        ("lat_deg", lambda a: np.abs(a) > 90, "is outside -90..90", "latitude is in degrees"),
        ("lon_deg", lambda a: np.abs(a) > 180, "is outside -180..180", "longitude is in degrees"),
    )
    with np.errstate(invalid="ignore"):
        for name, test, what, hint in checks:
            if name not in data:
                continue
            arr = data[name]
            bad = np.flatnonzero(test(arr))
            if bad.size:
                i = int(bad[0])
                raise _fail(f"value {arr[i]:g} {what}", i, name, path, lines, hint)


def _canonical_bytes(name: str, arr: np.ndarray) -> bytes:
    """The bytes a column contributes to the content id (definition; ``_canonical_chunks`` gives the
    same bytes faster)."""
    return b"".join(_canonical_chunks(name, arr))


def _canonical_chunks(name: str, arr: np.ndarray) -> list[Any]:
    """Buffers whose concatenation is the column's canonical bytes:

    * float: little-endian float64 with one NaN pattern and no -0.0;
    * int: little-endian int64;
    * str: ``json.dumps([None if v is None else str(v) for v in arr]).encode()`` (``_json_str_chunks``).
    """
    kind = COLUMNS[name][0]
    if kind == "float":
        if isinstance(arr, np.ndarray) and arr.dtype == np.float64:
            a = arr + 0.0                                     # no -0.0
            nan = np.isnan(a)
            if nan.any():
                a[nan] = np.nan                               # one NaN pattern
            return [a if a.dtype.str == "<f8" else a.astype("<f8")]
        a = np.where(np.isnan(arr), np.nan, arr + 0.0).astype("<f8")
        return [a]
    if kind == "int":
        return [np.ascontiguousarray(arr, dtype="<i8")]
    return _json_str_chunks(arr)


def _json_str_slow(values: Any) -> list[bytes]:
    return [json.dumps([None if v is None else str(v) for v in values]).encode()]


def _json_str_chunks(values: Any) -> list[Any]:
    """``_json_str_slow``'s bytes without a Python pass over the samples: json's C encoder over
    ``tolist()`` when every value is None or a str; for a column of few labels among unknowns (event
    marks) the runs of ``null`` are repeated bytes and only the labelled samples are visited."""
    if not (isinstance(values, np.ndarray) and values.dtype == object and values.ndim == 1):
        return _json_str_slow(values)
    n = values.size
    null = _none_mask(values)
    where = np.flatnonzero(~null)
    labels = values[where]
    if labels.size and not _str_values(labels):
        return _json_str_slow(values)
    if where.size * 32 >= n:
        return [json.dumps(values.tolist()).encode()]
    gaps = (np.diff(np.concatenate(([-1], where, [n]))) - 1).tolist()
    body = [b"null, " * gaps[0]]
    for label, gap in zip(labels.tolist(), gaps[1:]):  # a loop over labelled samples (under 1 in 32)
        body += [json.dumps(label).encode() + b", ", b"null, " * gap]
    text = b"".join(body)
    return [b"[", text[:-2], b"]"] if text else [b"[]"]


@dataclass(frozen=True, eq=False)
class Trace:
    """Samples of one path over time plus what is known about where they came from.

    Build with :meth:`from_columns`, which validates. ``id`` is a content hash of the samples and origin,
    so the same data always gets the same id whatever file or tags it arrived with.
    """

    data: Mapping[str, np.ndarray]
    origin: str = "measured"
    source: str = ""
    tags: Mapping[str, str] = field(default_factory=dict)
    group: str = ""
    provenance: Mapping[str, Any] = field(default_factory=dict)
    weight: float = 1.0

    @classmethod
    def from_columns(cls, t_s: Any, *, bandwidth_bps: Any = None, rtt_ms: Any = None, loss: Any = None,
                     jitter_ms: Any = None, path: str | None = None, lines: Any = None,
                     origin: str = "measured", source: str = "", tags: Mapping[str, str] | None = None,
                     group: str = "", provenance: Mapping[str, Any] | None = None, weight: float = 1.0,
                     **optional: Any) -> "Trace":
        """Build and validate a Trace. Optional columns (``cell``, ``state``, ...) go in as keywords."""
        t = _as_float(t_s, 0)
        n = len(t)
        data: dict[str, np.ndarray] = {"t_s": t}
        for name, values in (("bandwidth_bps", bandwidth_bps), ("rtt_ms", rtt_ms), ("loss", loss),
                             ("jitter_ms", jitter_ms)):
            data[name] = _as_float(values, n)
        for name, values in optional.items():
            if values is None:
                continue
            if name not in COLUMNS:
                raise InputError(f"unknown column '{name}'", path=path,
                                 hint=f"known columns: {', '.join(COLUMNS)}")
            kind = COLUMNS[name][0]
            if kind == "float":
                data[name] = _as_float(values, n)
            elif kind == "int":
                data[name] = np.asarray(values, dtype=np.int64)
            else:
                data[name] = _as_str(values)
        if origin not in ORIGINS:
            raise InputError(f"origin '{origin}' is not one of {ORIGINS}", path=path)
        if not (np.isfinite(weight) and weight >= 0):
            raise InputError(f"weight {weight} must be finite and >= 0", path=path, field="weight")
        validate_columns(data, path=path, lines=None if lines is None else np.asarray(lines))
        for arr in data.values():
            arr.setflags(write=False)
        return cls(data=data, origin=origin, source=source, tags=dict(tags or {}), group=group,
                   provenance=dict(provenance or {}), weight=float(weight))

    # --- identity and shape -------------------------------------------------------------------
    @property
    def id(self) -> str:
        cached = self.__dict__.get("_id")
        if cached is None:
            h = hashlib.sha256(f"tracegen-trace-v{SCHEMA_VERSION}\0{self.origin}\0".encode())
            for name in sorted(self.data):
                h.update(name.encode() + b"\0")
                for chunk in _canonical_chunks(name, self.data[name]):
                    h.update(chunk)
            cached = h.hexdigest()[:16]
            object.__setattr__(self, "_id", cached)
        return cached

    def __len__(self) -> int:
        return len(self.data["t_s"])

    def __getitem__(self, name: str) -> np.ndarray:
        return self.data[name]

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(name for name in COLUMNS if name in self.data)

    @property
    def step_s(self) -> float:
        """Nominal sampling step: the median spacing (NaN for a single sample)."""
        t = self.data["t_s"]
        return float(np.median(np.diff(t))) if len(t) > 1 else float("nan")

    @property
    def duration_s(self) -> float:
        """Time covered: first sample to last plus one step."""
        t = self.data["t_s"]
        step = self.step_s
        return float(t[-1] - t[0] + (step if np.isfinite(step) else 0.0))

    def with_meta(self, **changes: Any) -> "Trace":
        """A copy with metadata replaced (samples and id unchanged unless origin changes)."""
        clone = replace(self, **changes)
        clone.__dict__.pop("_id", None)
        return clone

    # --- figures ----------------------------------------------------------------------------
    def summary(self) -> dict[str, float]:
        """Summary figures stored in the catalog index and usable in selections."""
        bw = self.data["bandwidth_bps"]
        known = bw[~np.isnan(bw)]
        rtt = self.data["rtt_ms"][~np.isnan(self.data["rtt_ms"])]
        jit = self.data["jitter_ms"][~np.isnan(self.data["jitter_ms"])]
        loss = self.data["loss"][~np.isnan(self.data["loss"])]

        def q(a: np.ndarray, p: float) -> float:
            return float(np.quantile(a, p)) if a.size else float("nan")

        cells = self.data.get("cell")
        changes = float("nan")
        if cells is not None:
            labels = cells[~_none_mask(np.asarray(cells, dtype=object))]
            changes = float(np.count_nonzero(labels[1:] != labels[:-1])) if labels.size > 1 else 0.0
        return {
            "samples": float(len(self)),
            "mean_bw_bps": float(known.mean()) if known.size else float("nan"),
            "median_bw_bps": q(known, 0.5),
            "p5_bw_bps": q(known, 0.05),
            "p95_bw_bps": q(known, 0.95),
            "outage_share": float(np.mean(known < OUTAGE_FLOOR_BPS)) if known.size else float("nan"),
            "bw_known_share": float(known.size / len(self)),
            "median_rtt_ms": q(rtt, 0.5),
            "p95_rtt_ms": q(rtt, 0.95),
            "mean_loss": float(loss.mean()) if loss.size else float("nan"),
            "median_jitter_ms": q(jit, 0.5),
            "cell_changes": changes,
        }

    # --- resampling -------------------------------------------------------------------------
    def resample(self, step_s: float, *, point: str = "mean", max_gap_s: float | None = None) -> "Trace":
        """The trace on a regular grid of ``step_s`` seconds starting at its first sample.

        Rates (bandwidth, loss, cross traffic, queue delay) are time-weighted means over each bin; a bin
        less than half covered by known samples is NaN. Point measurements (RTT, jitter, location) are
        the ``point`` ("mean" or "last") of the samples inside the bin; a bin with none holds the previous
        sample while that sample's interval lasts. Labels (cell, state) take the sample in force at the
        bin's start. A silence longer than ``max_gap_s`` (default three nominal steps) is a gap: the
        sample before it holds for one nominal step only.
        """
        if not (np.isfinite(step_s) and step_s > 0):
            raise InputError(f"resampling step {step_s} s must be a positive number", field="step_s")
        if point not in ("mean", "last"):
            raise InputError(f"point rule '{point}' must be 'mean' or 'last'", field="point")
        t = self.data["t_s"]
        nominal = self.step_s if len(t) > 1 else step_s
        gap = GAP_FACTOR * nominal if max_gap_s is None else float(max_gap_s)
        starts = t
        nxt = np.append(t[1:], t[-1] + nominal)
        ends = np.where(nxt - starts > gap, starts + nominal, nxt)
        span = ends[-1] - t[0]
        nbins = max(1, int(np.ceil(span / step_s - 1e-9)))
        edges = t[0] + step_s * np.arange(nbins + 1)
        out: dict[str, np.ndarray] = {"t_s": edges[:-1].copy()}

        knots = np.empty(2 * len(t))
        knots[0::2] = starts
        knots[1::2] = ends

        def rate(values: np.ndarray) -> np.ndarray:
            known = ~np.isnan(values)
            width = ends - starts
            inc_a = np.zeros(2 * len(t))
            inc_k = np.zeros(2 * len(t))
            inc_a[1::2] = np.where(known, values, 0.0) * width
            inc_k[1::2] = known * width
            cum_a = np.cumsum(inc_a)
            cum_k = np.cumsum(inc_k)
            a = np.diff(np.interp(edges, knots, cum_a))
            k = np.diff(np.interp(edges, knots, cum_k))
            with np.errstate(invalid="ignore", divide="ignore"):
                v = a / k
            return np.where(k >= 0.5 * step_s - 1e-12, v, np.nan)

        bin_of = np.minimum(((t - t[0]) / step_s + 1e-9).astype(np.int64), nbins - 1)
        # the sample in force at each bin's start, and whether its interval still covers that start
        holder = np.searchsorted(starts, edges[:-1], side="right") - 1
        holds = ends[holder] > edges[:-1]

        def point_values(values: np.ndarray) -> np.ndarray:
            known = ~np.isnan(values)
            if point == "mean":
                s = np.bincount(bin_of[known], weights=values[known], minlength=nbins)
                c = np.bincount(bin_of[known], minlength=nbins)
                with np.errstate(invalid="ignore", divide="ignore"):
                    v = s / c
            else:
                v = np.full(nbins, np.nan)
                idx = np.flatnonzero(known)
                v[bin_of[idx]] = values[idx]  # later samples overwrite earlier ones: the last wins
                c = np.bincount(bin_of[known], minlength=nbins)
            held = np.where(holds, values[holder], np.nan)
            return np.where(c > 0, v, held)

        for name, arr in self.data.items():
            if name == "t_s":
                continue
            if name in RATE_COLUMNS:
                out[name] = rate(arr)
                if name == "loss":  # a mean of fractions is a fraction; keep rounding from stepping past 1
                    out[name] = np.clip(out[name], 0.0, 1.0)
            elif name in POINT_COLUMNS:
                out[name] = point_values(arr)
            elif name == "state":
                out[name] = arr[holder]
            elif name == "cell":
                out[name] = np.where(holds, arr[holder], None)
            elif name == "event":
                ev = np.full(nbins, None, dtype=object)
                marked = np.flatnonzero(~_none_mask(arr))
                for b, e in zip(bin_of[marked], arr[marked]):  # events are rare: a loop over events only
                    ev[b] = e if ev[b] is None else f"{ev[b]};{e}"
                out[name] = ev
        prov = dict(self.provenance)
        prov["resampled"] = {"step_s": step_s, "point": point, "max_gap_s": gap}
        optional = {k: v for k, v in out.items() if k not in CORE_COLUMNS}
        return Trace.from_columns(
            out["t_s"], bandwidth_bps=out["bandwidth_bps"], rtt_ms=out["rtt_ms"], loss=out["loss"],
            jitter_ms=out["jitter_ms"], origin=self.origin, source=self.source, tags=self.tags,
            group=self.group, provenance=prov, weight=self.weight, **optional)

    # --- Arrow ------------------------------------------------------------------------------
    def meta(self) -> dict[str, Any]:
        """Metadata as plain JSON-able values."""
        return {"schema_version": SCHEMA_VERSION, "origin": self.origin, "source": self.source,
                "tags": dict(self.tags), "group": self.group, "provenance": dict(self.provenance),
                "weight": self.weight}

    def to_arrow(self) -> pa.Table:
        """Samples as an Arrow table; metadata travels in the schema under ``tracegen``."""
        arrays, fields = [], []
        for name in self.columns:
            kind = COLUMNS[name][0]
            typ = {"float": pa.float64(), "int": pa.int64(), "str": pa.string()}[kind]
            values = self.data[name]
            arrays.append(pa.array(values, type=typ, from_pandas=kind == "float"))
            fields.append(pa.field(name, typ))
        meta = json.dumps(self.meta(), sort_keys=True, default=_json_default).encode()
        schema = pa.schema(fields, metadata={b"tracegen": meta})
        return pa.Table.from_arrays(arrays, schema=schema)

    @classmethod
    def from_arrow(cls, table: pa.Table, *, path: str | None = None) -> "Trace":
        """Rebuild (and validate) a Trace written by :meth:`to_arrow`."""
        raw = (table.schema.metadata or {}).get(b"tracegen")
        if raw is None:
            raise InputError("has no tracegen metadata", path=path,
                             hint="only tables written by tracegen can be read back as traces")
        try:
            meta = json.loads(raw)
        except json.JSONDecodeError as exc:
            raise InputError(f"tracegen metadata is not JSON ({exc})", path=path) from None
        version = meta.get("schema_version")
        if version != SCHEMA_VERSION:
            raise InputError(f"trace schema version {version!r} is not {SCHEMA_VERSION}", path=path,
                             hint="upgrade tracegen or re-ingest the source")
        cols: dict[str, Any] = {}
        for name in table.column_names:
            if name not in COLUMNS:
                raise InputError(f"unknown column '{name}'", path=path)
            col = table.column(name)
            kind = COLUMNS[name][0]
            if kind == "str":
                cols[name] = col.to_pylist()
            else:
                cols[name] = col.to_numpy(zero_copy_only=False).astype(
                    np.float64 if kind == "float" else np.int64)
        if "t_s" not in cols:
            raise InputError("has no t_s column", path=path)
        t = cols.pop("t_s")
        core = {k: cols.pop(k, None) for k in CORE_COLUMNS[1:]}
        return cls.from_columns(t, **core, path=path, origin=meta.get("origin", "measured"),
                                source=meta.get("source", ""), tags=meta.get("tags") or {},
                                group=meta.get("group", ""), provenance=meta.get("provenance") or {},
                                weight=meta.get("weight", 1.0), **cols)

    def to_pandas(self):
        """Samples as a pandas DataFrame (a copy)."""
        import pandas as pd

        return pd.DataFrame({name: np.array(self.data[name]) for name in self.columns})


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot store {type(value).__name__} in trace metadata")
