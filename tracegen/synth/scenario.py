"""Scenario files: everything one synthesis run needs, as TOML, validated into a :class:`Plan`.

Top-level keys: ``model`` (a model file, relative to the scenario file), ``name`` (the run's label in
trace sources and tags; default the model file's stem), ``count``, ``duration_s`` and ``step_s``
(seconds, or text such as "10min" and "100ms"; the step at least 10 ms), ``seed``. Sections:

* ``[output]``: ``dir`` (one file per trace) or ``catalog`` (add to a catalog), ``format`` (parquet or
  csv), ``force`` (replace files), ``manifest`` (where the per-trace weight table goes; default
  ``DIR/manifest.csv`` for ``dir`` output). Relative paths are relative to the scenario file.
* ``[cross_traffic]``, ``[bottleneck]``, ``[handover]``, ``[tilt]``: the fields of CrossTraffic,
  Bottleneck, HandoverPlan and Tilt (``tracegen scenario keys`` lists them with their defaults).
* ``[tags]``: free ``key = "value"`` labels put on every trace.

The command line reaches every key: the options in :data:`OPTION_KEYS` set the common ones, and
``--set section.key=value`` (the value read as TOML) sets any key; each option names its key in its
help. Options win over the file.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from ..errors import TracegenError, check_seed
from ..units import parse_duration_s
from .bottleneck import Bottleneck
from .crosstraffic import CrossTraffic
from .events import HandoverPlan
from .sampler import check_trace_size
from .tilt import Tilt

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

MIN_STEP_S = 0.01
FORMATS = ("parquet", "csv")
TOP_LEVEL: dict[str, type] = {"model": str, "name": str, "count": int, "duration_s": float, "step_s": float,
                              "seed": int}
OUTPUT_KEYS: dict[str, type] = {"dir": str, "catalog": str, "format": str, "force": bool, "manifest": str}
SECTIONS: dict[str, type] = {"cross_traffic": CrossTraffic, "bottleneck": Bottleneck, "handover": HandoverPlan,
                             "tilt": Tilt}
DEFAULTS: dict[str, Any] = {"count": 1, "duration_s": 600.0, "step_s": 1.0, "seed": 0}
# CLI option (without the dashes) -> scenario key; every other key is reached with --set.
OPTION_KEYS: dict[str, str] = {
    "count": "count", "duration": "duration_s", "step": "step_s", "seed": "seed", "name": "name",
    "out": "output.dir", "format": "output.format", "catalog": "output.catalog", "force": "output.force",
    "manifest": "output.manifest",
    "cross-flows-per-s": "cross_traffic.flow_rate_per_s", "buffer-ms": "bottleneck.buffer_ms",
    "policy": "bottleneck.policy", "handovers-per-min": "handover.rate_per_min",
    "handover-at": "handover.times_s", "tilt-states": "tilt.state_weights",
    "tilt-handovers": "tilt.handover_rate_factor", "tag": "tags",
}


class ScenarioError(TracegenError):
    """A scenario that cannot be run as written."""


def all_keys() -> dict[str, Any]:
    """Every scenario key (``section.key`` for sections) with its default; ``tags.*`` is free."""
    keys: dict[str, Any] = {k: DEFAULTS.get(k) for k in TOP_LEVEL}
    keys.update({f"output.{k}": None for k in OUTPUT_KEYS})
    for name, cls in SECTIONS.items():
        for f in dataclasses.fields(cls):
            default = f.default if f.default is not dataclasses.MISSING else f.default_factory()  # type: ignore[misc]
            keys[f"{name}.{f.name}"] = default
    keys["tags.*"] = None
    return keys


@dataclass(frozen=True)
class Plan:
    """A validated synthesis plan (a scenario file with the command line's settings applied)."""

    model_path: Path
    name: str
    count: int = 1
    duration_s: float = 600.0
    step_s: float = 1.0
    seed: int = 0
    output_dir: Path | None = None
    output_catalog: Path | None = None
    output_format: str = "parquet"
    force: bool = False
    manifest: Path | None = None
    cross_traffic: CrossTraffic | None = None
    bottleneck: Bottleneck | None = None
    handover: HandoverPlan | None = None
    tilt: Tilt | None = None
    tags: Mapping[str, str] = field(default_factory=dict)
    source: str = ""

    def options(self) -> dict[str, Any]:
        """Keyword arguments for :func:`tracegen.synth.synth` / ``iter_synth``."""
        return {"cross_traffic": self.cross_traffic, "bottleneck": self.bottleneck, "handover": self.handover,
                "tilt": self.tilt, "name": self.name, "tags": dict(self.tags), "scenario": self.to_dict()}

    def to_dict(self) -> dict[str, Any]:
        """The resolved plan as plain values (goes into each trace's provenance). The count is left out,
        so trace i is the same bytes in a run of any size (run.json records it)."""
        out: dict[str, Any] = {"model": self.model_path.name, "name": self.name,
                               "duration_s": self.duration_s, "step_s": self.step_s, "seed": self.seed}
        if self.source:
            out["scenario_file"] = Path(self.source).name
        for name in SECTIONS:
            part = getattr(self, name)
            if part is not None:
                out[name] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in dataclasses.asdict(part).items()}
        if self.tags:
            out["tags"] = dict(self.tags)
        return json.loads(json.dumps(out))

    def describe(self) -> str:
        """The resolved plan as text (what ``tracegen scenario check`` prints)."""
        where = (f"{self.output_dir} ({self.output_format} files)" if self.output_dir else
                 f"catalog {self.output_catalog}" if self.output_catalog else "(not set: give --out or --catalog)")
        out = [f"model         {self.model_path}",
               f"name          {self.name}",
               f"traces        {self.count} x {self.duration_s:g} s at {self.step_s:g} s steps, seed {self.seed}",
               f"output        {where}"]
        if self.manifest:
            out.append(f"manifest      {self.manifest}")
        for name in SECTIONS:
            part = getattr(self, name)
            if part is None:
                out.append(f"{name:13} none")
                continue
            values = ", ".join(f"{k}={_show(v)}" for k, v in dataclasses.asdict(part).items()
                               if v not in (None, (), [], {}))
            out.append(f"{name:13} {values}")
        if self.handover is not None and self.handover.rate_per_s is not None:
            out.append(f"{'':13} -> {self.handover.rate_per_s * 60:.3g} handovers per minute")
        if self.tags:
            out.append(f"{'tags':13} " + ", ".join(f"{k}={v}" for k, v in sorted(self.tags.items())))
        return "\n".join(out)


def _show(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, tuple):
        return "[" + ", ".join(_show(x) for x in v) + "]"
    return str(v)


def _unknown(key: str, known: list[str], where: str, path: str | None) -> ScenarioError:
    close = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
    hint = f"did you mean '{close[0]}'?" if close else f"known keys: {', '.join(sorted(known))}"
    return ScenarioError(f"unknown key '{key}'", field=where, path=path, hint=hint)


def _typed(value: Any, typ: type, where: str, path: str | None) -> Any:
    if typ is float and isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    if typ is int and isinstance(value, int) and not isinstance(value, bool):
        return value
    if typ in (str, bool) and isinstance(value, typ):
        return value
    raise ScenarioError(f"must be {'a number' if typ is float else typ.__name__}, got {value!r}", field=where,
                        path=path)


def _seconds(value: Any, where: str, path: str | None) -> float:
    if isinstance(value, str):
        try:
            return parse_duration_s(value, where)
        except TracegenError as exc:
            raise ScenarioError(exc.message, field=where, path=path, hint=exc.hint) from None
    return _typed(value, float, where, path)


def _build_section(name: str, cls: type, values: Any, path: str | None) -> Any:
    if not isinstance(values, Mapping):
        raise ScenarioError("must be a table of keys", field=name, path=path)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for key in values:
        if key not in fields:
            raise _unknown(key, list(fields), f"{name}.{key}", path)
    kwargs = {}
    for key, v in values.items():
        if isinstance(v, bool) and fields[key].type not in ("bool", bool):
            raise ScenarioError(f"must be a number or text, got {v!r}", field=f"{name}.{key}", path=path)
        kwargs[key] = tuple(v) if isinstance(v, list) else v
    try:
        return cls(**kwargs)
    except TracegenError as exc:
        raise ScenarioError(exc.message, field=exc.field or name, path=path, hint=exc.hint) from None
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"cannot be used: {exc}", field=name, path=path) from None


def set_key(raw: dict[str, Any], assignment: str) -> None:
    """Apply one ``section.key=value`` (or ``key=value``) override; the value is read as TOML
    (a bare word counts as text)."""
    key, sep, text = assignment.partition("=")
    if not sep or not key.strip():
        raise ScenarioError(f"'{assignment}' is not KEY=VALUE", field="--set", hint="e.g. bottleneck.buffer_ms=50")
    try:
        value = tomllib.loads(f"v = {text.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = text.strip()
    put(raw, key.strip(), value)


def put(raw: dict[str, Any], key: str, value: Any) -> None:
    """Set ``key`` (``name`` or ``section.name``) in a raw scenario mapping."""
    parts = key.split(".")
    if len(parts) > 2 or not all(parts):
        raise ScenarioError(f"'{key}' is not a key", field=key, hint="write KEY or SECTION.KEY")
    node = raw
    if len(parts) == 2:
        node = raw.setdefault(parts[0], {})
        if not isinstance(node, dict):
            raise ScenarioError(f"'{parts[0]}' is not a section", field=key)
    node[parts[-1]] = value


def read_scenario(path: str | Path) -> dict[str, Any]:
    """The raw TOML mapping of a scenario file (ScenarioError on a missing or malformed file)."""
    try:
        return tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ScenarioError("no such scenario file", path=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ScenarioError(f"cannot be read ({exc})", path=str(path)) from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"is not valid TOML ({exc})", path=str(path)) from None


def load_scenario(path: str | Path | None, settings: Mapping[str, Any] | None = None,
                  assignments: tuple[str, ...] = ()) -> Plan:
    """Read a scenario file (or none), apply ``settings`` (scenario key -> value, None = not given) and
    ``--set`` assignments, and validate everything; ScenarioError names the file and the key."""
    raw: dict[str, Any] = {}
    where = None
    base = Path.cwd()
    if path is not None:
        where = str(path)
        raw = read_scenario(path)
        base = Path(path).resolve().parent
    cli_paths = set()
    for key, value in (settings or {}).items():
        if value is not None:
            put(raw, key, value)
            if key in ("model", "output.dir", "output.catalog", "output.manifest"):
                cli_paths.add(key)
    for item in assignments:
        set_key(raw, item)
    known = list(TOP_LEVEL) + ["output", "tags"] + list(SECTIONS)
    for key in raw:
        if key not in known:
            raise _unknown(key, known, key, where)
    if "model" not in raw:
        raise ScenarioError("no model given", field="model", path=where,
                            hint='set model = "FILE.json" in the scenario or pass MODEL_FILE')

    def resolve(key: str, p: str) -> Path:
        q = Path(p).expanduser()
        return q if q.is_absolute() or key in cli_paths else base / q

    top: dict[str, Any] = {}
    for k in ("model", "name", "count", "seed"):
        if k in raw:
            top[k] = _typed(raw[k], TOP_LEVEL[k], k, where)
    for k in ("duration_s", "step_s"):
        if k in raw:
            top[k] = _seconds(raw[k], k, where)
    model_path = resolve("model", top["model"])
    count, seed = top.get("count", DEFAULTS["count"]), top.get("seed", DEFAULTS["seed"])
    duration, step = top.get("duration_s", DEFAULTS["duration_s"]), top.get("step_s", DEFAULTS["step_s"])
    if count < 1:
        raise ScenarioError(f"must be at least 1, got {count}", field="count", path=where)
    if not (math.isfinite(duration) and duration > 0):
        raise ScenarioError(f"must be positive, got {duration}", field="duration_s", path=where)
    if not (math.isfinite(step) and step >= MIN_STEP_S - 1e-12):
        raise ScenarioError(f"must be at least {MIN_STEP_S} s (10 ms), got {step:g}", field="step_s", path=where,
                            hint="dwell times are in seconds, so any step from 10 ms up works")
    if step > duration:
        raise ScenarioError(f"step {step:g} s is longer than the duration {duration:g} s", field="step_s",
                            path=where)
    try:
        check_seed(seed)
        check_trace_size(duration, step)
    except TracegenError as exc:
        raise ScenarioError(exc.message, field=exc.field, path=where, hint=exc.hint) from None
    out = raw.get("output") or {}
    if not isinstance(out, Mapping):
        raise ScenarioError("must be a table", field="output", path=where)
    for key in out:
        if key not in OUTPUT_KEYS:
            raise _unknown(key, list(OUTPUT_KEYS), f"output.{key}", where)
    o = {k: _typed(v, OUTPUT_KEYS[k], f"output.{k}", where) for k, v in out.items()}
    fmt = o.get("format", "parquet")
    if fmt not in FORMATS:
        close = difflib.get_close_matches(fmt, FORMATS, n=1)
        raise ScenarioError(f"format '{fmt}' is not one of {', '.join(FORMATS)}", field="output.format", path=where,
                            hint=f"did you mean '{close[0]}'?" if close else None)
    if o.get("dir") and o.get("catalog"):
        raise ScenarioError("give output.dir or output.catalog, not both", field="output", path=where,
                            hint="--out writes files, --catalog adds to a catalog")
    out_dir = resolve("output.dir", o["dir"]) if o.get("dir") else None
    manifest = resolve("output.manifest", o["manifest"]) if o.get("manifest") else (
        out_dir / "manifest.csv" if out_dir else None)
    tags = raw.get("tags") or {}
    if not isinstance(tags, Mapping) or not all(isinstance(v, (str, int, float)) and not isinstance(v, bool)
                                                for v in tags.values()):
        raise ScenarioError("must be a table of key = \"value\" labels", field="tags", path=where)
    parts = {name: (_build_section(name, cls, raw[name], where) if name in raw else None)
             for name, cls in SECTIONS.items()}
    return Plan(model_path, top.get("name") or model_path.stem, count, float(duration), float(step), seed, out_dir,
                resolve("output.catalog", o["catalog"]) if o.get("catalog") else None, fmt,
                bool(o.get("force", False)), manifest, parts["cross_traffic"], parts["bottleneck"],
                parts["handover"], parts["tilt"], {str(k): str(v) for k, v in tags.items()}, where or "")


__all__ = ["Plan", "ScenarioError", "load_scenario", "read_scenario", "set_key", "put", "all_keys", "OPTION_KEYS",
           "SECTIONS", "TOP_LEVEL", "OUTPUT_KEYS", "MIN_STEP_S"]
