"""Scenario files: everything one synthesis run needs, as TOML, validated into a Plan.

Top-level keys: ``model`` (path, relative to the scenario file), ``count``, ``duration_s``, ``step_s``
(>= 0.01), ``seed``. Sections: ``[output]`` (``dir``, ``catalog``, ``format`` = parquet|csv),
``[cross_traffic]``, ``[bottleneck]`` and ``[tilt]`` (their keys are the fields of CrossTraffic,
Bottleneck and Tilt), ``[handover]`` (``rate_per_min``; or ``speed_m_s`` with ``cell_size_m``;
``times_s``). The command line sets the same keys: ``--count`` etc. for the top level and
``--set section.key=value`` for any key, so every scenario key has an option and the reverse.
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

from ..errors import TracegenError
from .events import HandoverPlan

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

MIN_STEP_S = 0.01
TOP_LEVEL = {"model": str, "count": int, "duration_s": float, "step_s": float, "seed": int}
OUTPUT_KEYS = {"dir": str, "catalog": str, "format": str}
FORMATS = ("parquet", "csv")


class ScenarioError(TracegenError):
    """A scenario that cannot be run as written."""


@dataclass(frozen=True)
class Plan:
    """A validated synthesis plan (a scenario file, options applied)."""

    model_path: Path
    count: int = 1
    duration_s: float = 600.0
    step_s: float = 1.0
    seed: int = 0
    output_dir: Path | None = None
    output_catalog: Path | None = None
    output_format: str = "parquet"
    cross_traffic: Any = None
    bottleneck: Any = None
    handover: HandoverPlan | None = None
    tilt: Any = None
    source: str = ""
    raw: Mapping[str, Any] = field(default_factory=dict)

    def describe(self) -> str:
        """The resolved plan as text (what ``tracegen scenario check`` prints)."""
        out = [f"model      {self.model_path}",
               f"traces     {self.count} x {self.duration_s:g} s at {self.step_s:g} s steps, seed {self.seed}",
               f"output     {self.output_dir or self.output_catalog or '(none: give --out or --catalog)'}"
               f" as {self.output_format if self.output_dir else 'catalog traces'}"]
        for name in ("cross_traffic", "bottleneck", "handover", "tilt"):
            part = getattr(self, name)
            if part is None:
                out.append(f"{name:10} none")
            else:
                values = ", ".join(f"{k}={v}" for k, v in dataclasses.asdict(part).items()
                                   if v not in (None, (), [], {}))
                out.append(f"{name:10} {values}")
        return "\n".join(out)

    def to_dict(self) -> dict[str, Any]:
        """The plan as plain values (goes into each trace's provenance)."""
        return json.loads(json.dumps(self.raw, default=str))


def _sections() -> dict[str, type]:
    from .bottleneck import Bottleneck
    from .crosstraffic import CrossTraffic
    from .tilt import Tilt

    return {"cross_traffic": CrossTraffic, "bottleneck": Bottleneck, "tilt": Tilt, "handover": HandoverPlan}


def _unknown(key: str, known: list[str], where: str, path: str | None) -> ScenarioError:
    close = difflib.get_close_matches(key, known, n=1)
    hint = f"did you mean '{close[0]}'?" if close else f"known keys: {', '.join(sorted(known))}"
    return ScenarioError(f"unknown key '{key}'", field=where, path=path, hint=hint)


def _typed(value: Any, typ: type, where: str, path: str | None) -> Any:
    if typ is float and isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    if typ is int and isinstance(value, int) and not isinstance(value, bool):
        return value
    if typ is str and isinstance(value, str):
        return value
    raise ScenarioError(f"must be {typ.__name__}, got {value!r}", field=where, path=path)


def _build_section(name: str, cls: type, values: Any, path: str | None) -> Any:
    if not isinstance(values, Mapping):
        raise ScenarioError("must be a table of keys", field=name, path=path)
    known = [f.name for f in dataclasses.fields(cls)]
    for key in values:
        if key not in known:
            raise _unknown(key, known, f"{name}.{key}", path)
    kwargs = {k: (tuple(v) if isinstance(v, list) else v) for k, v in values.items()}
    try:
        return cls(**kwargs)
    except TracegenError as exc:
        raise ScenarioError(exc.message, field=exc.field or name, path=path, hint=exc.hint) from None
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"cannot be used: {exc}", field=name, path=path) from None


def set_key(raw: dict[str, Any], assignment: str) -> None:
    """Apply one ``section.key=value`` (or ``key=value``) override; the value is read as TOML."""
    key, sep, text = assignment.partition("=")
    if not sep or not key.strip():
        raise ScenarioError(f"'{assignment}' is not KEY=VALUE", field="--set", hint="e.g. bottleneck.buffer_ms=50")
    try:
        value = tomllib.loads(f"v = {text.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = text.strip()  # a bare word: a string
    parts = key.strip().split(".")
    node = raw
    for part in parts[:-1]:
        node = node.setdefault(part, {})
        if not isinstance(node, dict):
            raise ScenarioError(f"'{part}' is not a section", field=key)
    node[parts[-1]] = value


def load_scenario(path: str | Path | None, overrides: Mapping[str, Any] | None = None,
                  assignments: tuple[str, ...] = ()) -> Plan:
    """Read a scenario file (or none), apply top-level ``overrides`` and ``--set`` assignments, validate."""
    raw: dict[str, Any] = {}
    where = None
    base = Path.cwd()
    if path is not None:
        where = str(path)
        try:
            raw = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ScenarioError("no such scenario file", path=where) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ScenarioError(f"cannot be read ({exc})", path=where) from None
        except tomllib.TOMLDecodeError as exc:
            raise ScenarioError(f"is not valid TOML ({exc})", path=where) from None
        base = Path(path).resolve().parent
    for key, value in (overrides or {}).items():
        if value is not None:
            raw[key] = value
    for item in assignments:
        set_key(raw, item)
    sections = _sections()
    known = list(TOP_LEVEL) + ["output"] + list(sections)
    for key in raw:
        if key not in known:
            raise _unknown(key, known, key, where)
    if "model" not in raw:
        raise ScenarioError("no model given", field="model", path=where, hint="set model = \"FILE.json\" or pass MODEL")
    top = {k: _typed(raw[k], t, k, where) for k, t in TOP_LEVEL.items() if k in raw}
    model_path = Path(top.pop("model"))
    if not model_path.is_absolute():
        model_path = base / model_path
    count = top.get("count", 1)
    duration = top.get("duration_s", 600.0)
    step = top.get("step_s", 1.0)
    if count < 1:
        raise ScenarioError(f"must be at least 1, got {count}", field="count", path=where)
    if not (math.isfinite(duration) and duration > 0):
        raise ScenarioError(f"must be positive, got {duration}", field="duration_s", path=where)
    if not (math.isfinite(step) and step >= MIN_STEP_S):
        raise ScenarioError(f"must be at least {MIN_STEP_S} s, got {step}", field="step_s", path=where,
                            hint="dwell times are in seconds, so any step from 10 ms up works")
    if step > duration:
        raise ScenarioError(f"step {step} s is longer than the duration {duration} s", field="step_s", path=where)
    out = raw.get("output") or {}
    if not isinstance(out, Mapping):
        raise ScenarioError("must be a table", field="output", path=where)
    for key in out:
        if key not in OUTPUT_KEYS:
            raise _unknown(key, list(OUTPUT_KEYS), f"output.{key}", where)
    fmt = out.get("format", "parquet")
    if fmt not in FORMATS:
        raise ScenarioError(f"format '{fmt}' is not one of {', '.join(FORMATS)}", field="output.format", path=where)
    if out.get("dir") and out.get("catalog"):
        raise ScenarioError("give output.dir or output.catalog, not both", field="output", path=where)
    resolve = (lambda p: None if not p else (Path(p) if Path(p).is_absolute() else base / p))
    parts = {name: (_build_section(name, cls, raw[name], where) if name in raw else None)
             for name, cls in sections.items()}
    return Plan(model_path, count, float(duration), float(step), top.get("seed", 0), resolve(out.get("dir")),
                resolve(out.get("catalog")), fmt, parts["cross_traffic"], parts["bottleneck"], parts["handover"],
                parts["tilt"], where or "", raw)
