"""The fitted path model: states with levels, dwell times and AR dynamics; jumps; loss; events; JSON I/O.

A model file is JSON (never a pickle) with a format name and schema version. Loading validates every
part: stochastic rows with a zero diagonal, positive variances, finite numbers, states ordered low to
high, a known format and version; a bad file is refused with a message naming the field.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .errors import TracegenError
from .files import write_text_atomic
from .fit.ar import ARFit
from .fit.dwell import DwellFit
from .fit.events import EventModel
from .fit.loss import GilbertElliott
from .fit.slow import SlowFit

FORMAT_NAME = "tracegen-path-model"
SCHEMA_VERSION = 3
READABLE_VERSIONS = (1, 2, 3)   # 1: no slow part; 2: a slow part without an outage slope


class ModelError(TracegenError):
    """A model file that cannot be used."""


def _finite(value: Any, where: str, *, positive: bool = False, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ModelError(f"must be a finite number, got {value!r}", field=where)
    if positive and value <= 0:
        raise ModelError(f"must be positive, got {value!r}", field=where)
    return float(value)


@dataclass(frozen=True)
class StateModel:
    """One state: an outage (bandwidth 0) or a level of log-bandwidth with its dwell time and dynamics.

    ``mean``/``cov`` are the emission in the feature space (log bit/s, and log ms when joint with RTT);
    ``rtt_log_ms`` is (mean, sd) of log RTT in the state when RTT was measured but not modelled jointly.
    """

    kind: str                           # "outage" or "level"
    level_bps: float                    # median bandwidth of the samples in the state (0 for an outage)
    share: float                        # share of known time spent in the state
    dwell: DwellFit
    mean: tuple[float, ...] = ()
    cov: tuple[tuple[float, ...], ...] = ()
    ar: ARFit | None = None
    rtt_log_ms: tuple[float, float] | None = None
    loss_mean: float | None = None

    @property
    def mean_dwell_s(self) -> float:
        return self.dwell.mean_s

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "level_bps": self.level_bps, "mean_dwell_s": self.mean_dwell_s,
                "share": self.share, "dwell": self.dwell.to_dict(), "mean": list(self.mean),
                "cov": [list(r) for r in self.cov], "ar": None if self.ar is None else self.ar.to_dict(),
                "rtt_log_ms": None if self.rtt_log_ms is None else list(self.rtt_log_ms),
                "loss_mean": self.loss_mean}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str, n_features: int) -> "StateModel":
        if not isinstance(d, Mapping):
            raise ModelError(f"must be an object, got {type(d).__name__}", field=where)
        kind = d.get("kind")
        if kind not in ("outage", "level"):
            raise ModelError(f"kind must be 'outage' or 'level', got {kind!r}", field=f"{where}.kind")
        level = _finite(d.get("level_bps"), f"{where}.level_bps")
        if level < 0:
            raise ModelError(f"must be >= 0, got {level}", field=f"{where}.level_bps")
        share = _finite(d.get("share"), f"{where}.share")
        if not 0 <= share <= 1:
            raise ModelError(f"must be in 0..1, got {share}", field=f"{where}.share")
        dwell = _part(DwellFit.from_dict, d.get("dwell") or {}, f"{where}.dwell")
        mean, cov, ar = (), (), None
        if kind == "level":
            raw_mean, raw_cov = d.get("mean") or [], d.get("cov") or []
            if not isinstance(raw_mean, list) or not isinstance(raw_cov, list) or not all(
                    isinstance(row, list) for row in raw_cov):
                raise ModelError(f"mean must be a list and cov a list of lists of {n_features} numbers",
                                 field=f"{where}.cov")
            mean = tuple(_finite(v, f"{where}.mean") for v in raw_mean)
            cov = tuple(tuple(_finite(v, f"{where}.cov") for v in row) for row in raw_cov)
            if len(mean) != n_features or len(cov) != n_features or any(len(r) != n_features for r in cov):
                raise ModelError(f"needs a mean of {n_features} and a {n_features}x{n_features} covariance",
                                 field=f"{where}.cov")
            c = np.array(cov)
            if not np.allclose(c, c.T) or np.any(np.linalg.eigvalsh(c) <= 0):
                raise ModelError("covariance must be symmetric with positive variances", field=f"{where}.cov")
            ar = None if d.get("ar") is None else _part(ARFit.from_dict, d["ar"], f"{where}.ar")
        rtt = d.get("rtt_log_ms")
        if rtt is not None:
            if not isinstance(rtt, list) or len(rtt) != 2:
                raise ModelError("must be [mean, sd] of log RTT", field=f"{where}.rtt_log_ms")
            rtt = (_finite(rtt[0], f"{where}.rtt_log_ms"), _finite(rtt[1], f"{where}.rtt_log_ms", positive=True))
        loss = _finite(d.get("loss_mean"), f"{where}.loss_mean", allow_none=True)
        if loss is not None and not 0 <= loss <= 1:
            raise ModelError(f"must be a share in 0..1, got {loss}", field=f"{where}.loss_mean")
        return cls(kind, level, share, dwell, mean, cov, ar, rtt, loss)


@dataclass(frozen=True)
class PathModel:
    """A fitted path model. Build with :func:`tracegen.fit`; save with :meth:`save`, read with :func:`load`."""

    step_s: float
    outage_floor_bps: float
    features: tuple[str, ...]
    states: tuple[StateModel, ...]
    jumps: tuple[tuple[float, ...], ...]   # state-to-state probabilities at the end of a dwell, zero diagonal
    loss: GilbertElliott | None
    events: EventModel | None
    report: Mapping[str, Any] = field(default_factory=dict)
    tracegen_version: str = ""
    slow: SlowFit | None = None            # per-trace offset and drift over minutes (fit/slow.py)

    @property
    def n_states(self) -> int:
        return len(self.states)

    @property
    def with_rtt(self) -> bool:
        return "log_rtt_ms" in self.features

    def to_dict(self) -> dict[str, Any]:
        return {"format": FORMAT_NAME, "schema_version": SCHEMA_VERSION, "tracegen_version": self.tracegen_version,
                "step_s": self.step_s, "outage_floor_bps": self.outage_floor_bps, "features": list(self.features),
                "states": [s.to_dict() for s in self.states], "jumps": [list(r) for r in self.jumps],
                "loss": None if self.loss is None else self.loss.to_dict(),
                "events": None if self.events is None else self.events.to_dict(), "report": dict(self.report),
                "slow": None if self.slow is None else self.slow.to_dict()}

    def to_json(self) -> str:
        """Canonical JSON text: sorted keys, so the same model always gives the same bytes."""
        return json.dumps(self.to_dict(), indent=1, sort_keys=True, allow_nan=False, default=_plain) + "\n"

    def save(self, path: str | Path, *, overwrite: bool = True) -> Path:
        """Write the model file atomically (temporary name, then rename)."""
        path = Path(path)
        if path.exists() and not overwrite:
            raise ModelError("exists already", path=path, hint="pass --force to replace it")
        return write_text_atomic(path, self.to_json(), error=ModelError)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "PathModel":
        """Validate and build; raises ModelError naming the field."""
        if not isinstance(d, Mapping):
            raise ModelError("the model file must hold a JSON object")
        if d.get("format") != FORMAT_NAME:
            raise ModelError(f"format is {d.get('format')!r}, not {FORMAT_NAME!r}", field="format",
                             hint="is this a tracegen model file?")
        version = d.get("schema_version")
        if not isinstance(version, int) or isinstance(version, bool) or version not in READABLE_VERSIONS:
            raise ModelError(f"schema version {version!r} is not one of {list(READABLE_VERSIONS)}",
                             field="schema_version", hint="refit with this tracegen version")
        step = _finite(d.get("step_s"), "step_s", positive=True)
        floor = _finite(d.get("outage_floor_bps"), "outage_floor_bps")
        if floor < 0:
            raise ModelError(f"must be >= 0 bit/s, got {floor}", field="outage_floor_bps")
        features = tuple(d.get("features") or ())
        if features not in (("log_bandwidth_bps",), ("log_bandwidth_bps", "log_rtt_ms")):
            raise ModelError(f"unknown features {list(features)}", field="features")
        raw_states = d.get("states")
        if not isinstance(raw_states, list) or not raw_states:
            raise ModelError("must be a non-empty list", field="states")
        states = tuple(StateModel.from_dict(s, f"states[{i}]", len(features)) for i, s in enumerate(raw_states))
        levels = [s.level_bps for s in states]
        if any(b < a for a, b in zip(levels, levels[1:])):
            raise ModelError("states must be ordered from low to high level_bps", field="states")
        if any(s.kind == "outage" for s in states[1:]):
            raise ModelError("only the first state may be an outage", field="states")
        jumps = d.get("jumps")
        n = len(states)
        try:
            j = np.array(jumps, dtype=float)
        except (TypeError, ValueError):
            raise ModelError("must be a square matrix of numbers", field="jumps") from None
        if j.shape != (n, n) or not np.all(np.isfinite(j)) or np.any(j < 0):
            raise ModelError(f"must be a {n}x{n} matrix of probabilities", field="jumps")
        if np.any(np.diag(j) != 0):
            raise ModelError("must have a zero diagonal (dwell times are explicit)", field="jumps")
        if n > 1 and not np.allclose(j.sum(1), 1.0, atol=1e-9):
            raise ModelError("every row must sum to 1", field="jumps")
        shares = np.array([s.share for s in states])
        if not np.isclose(shares.sum(), 1.0, atol=1e-6):
            raise ModelError(f"state shares sum to {shares.sum():.6f}, not 1", field="states")
        loss = None if d.get("loss") is None else _part(GilbertElliott.from_dict, d["loss"], "loss")
        events = None if d.get("events") is None else _part(EventModel.from_dict, d["events"], "events")
        if events is not None and events.post_state_probs is not None and len(events.post_state_probs) != n:
            raise ModelError(f"has {len(events.post_state_probs)} probabilities for a model of {n} states",
                             field="events.post_state_probs", hint="refit the model with this tracegen version")
        report = d.get("report") or {}
        if not isinstance(report, Mapping):
            raise ModelError("must be an object", field="report")
        try:
            slow = None if d.get("slow") is None else SlowFit.from_dict(d["slow"])
        except TracegenError as exc:
            raise ModelError(exc.message, field=exc.field or "slow") from None
        return cls(step, floor, features, states, tuple(tuple(r) for r in j.tolist()), loss, events, report,
                   str(d.get("tracegen_version", "")), slow)

    def summary_text(self) -> str:
        """A readable summary: the states table, loss and events."""
        r = self.report
        hours = r.get("hours")
        hours_text = f"{hours:.2f}" if isinstance(hours, (int, float)) and not isinstance(hours, bool) else "?"
        lines = [f"path model: {self.n_states} states at {self.step_s:g} s steps, features {', '.join(self.features)}",
                 f"fitted on {r.get('traces', '?')} traces, {hours_text} h "
                 f"({r.get('samples', '?')} samples), chosen by {r.get('criterion', '?')}",
                 f"{'state':>5}  {'kind':6}  {'level Mbit/s':>12}  {'spread':>7}  {'mean dwell s':>12}  "
                 f"{'dwell family':12}  {'share':>6}  {'AR':>3}  {'RTT ms':>7}  {'loss':>6}"]
        for i, s in enumerate(self.states):
            spread = f"{math.sqrt(s.cov[0][0]):.3f}" if s.cov else "-"
            rtt = math.exp(s.mean[1]) if self.with_rtt and s.mean else (
                math.exp(s.rtt_log_ms[0]) if s.rtt_log_ms else None)
            lines.append(f"{i:5d}  {s.kind:6}  {s.level_bps / 1e6:12.3f}  {spread:>7}  {s.mean_dwell_s:12.1f}  "
                         f"{s.dwell.family:12}  {s.share:6.1%}  {s.ar.order if s.ar else '-':>3}  "
                         f"{'-' if rtt is None else f'{rtt:.1f}':>7}  "
                         f"{'-' if s.loss_mean is None else f'{s.loss_mean:.2%}':>6}")
        if self.loss is not None:
            g = self.loss
            lines.append(f"loss (Gilbert-Elliott): p={g.p:.4f} r={g.r:.4f} good {g.loss_good:.3%} bad {g.loss_bad:.2%}"
                         f" -> stationary {g.stationary_loss:.3%}")
        else:
            lines.append("loss: not measured in the selection")
        if self.events is not None:
            lines.append("events: " + self.events.summary())
        if self.slow is not None:
            w = self.slow
            lines.append(f"slow part (added to every level): per-trace offset sd {math.sqrt(w.between_var):.2f}, "
                         f"drift sd {math.sqrt(w.drift_var):.2f} over {w.drift_time_s:.0f} s (log bit/s; "
                         f"{w.block_s:g} s blocks)")
            if w.outage_slope != 0.0:
                lines.append(f"coverage holes: outage entries x{math.exp(-w.outage_slope):.2f} per unit lower "
                             f"slow level (log rate slope {w.outage_slope:+.2f})")
        else:
            lines.append("slow part: none")
        table = r.get("selection_table") or []
        if isinstance(table, list) and table and all(
                isinstance(row, Mapping) and {"states", "hmm_bic", "full_bic"} <= set(row) for row in table):
            lines.append("state-count selection:")
            for row in table:
                mark = "*" if row.get("states") == self.report.get("level_states") else " "
                lines.append(f" {mark} {row['states']} levels: HMM BIC {row['hmm_bic']:.1f}, "
                             f"full-model BIC {row['full_bic']:.1f}")
        return "\n".join(lines)


def _part(build: Any, value: Any, where: str) -> Any:
    """``build(value)`` with any error's field put under ``where`` (``states[2].dwell.params``)."""
    try:
        return build(value)
    except TracegenError as exc:
        raise ModelError(exc.message, field=f"{where}.{exc.field}" if exc.field else where, hint=exc.hint) from None


def load(path: str | Path) -> PathModel:
    """Read and validate a model file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ModelError("no such model file", path=path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ModelError(f"cannot be read ({exc})", path=path) from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ModelError(f"is not valid JSON ({exc.msg})", path=path, line=exc.lineno) from None
    except RecursionError:
        raise ModelError("is nested too deeply to be a model file", path=path) from None
    try:
        return PathModel.from_dict(data)
    except TracegenError as exc:
        raise ModelError(exc.message, path=path, field=exc.field, hint=exc.hint) from None
    except (TypeError, AttributeError, KeyError, IndexError, ValueError, OverflowError) as exc:
        # a part of the right name but the wrong shape that no check above names more precisely
        raise ModelError(f"is not a valid model file ({type(exc).__name__}: {exc})", path=path,
                         hint="refit the model, or restore the file as the fit wrote it") from None


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot store {type(value).__name__} in a model file")
