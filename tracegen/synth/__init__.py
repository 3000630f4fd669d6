"""Synthesis: ``tracegen.synth(model, n, duration_s, step_s, seed, ...)`` samples new traces from a path model.

Per trace ``i``: the sampler (sampler.py) draws the state path, levels with AR residuals, RTT, loss and
events, optionally tilted toward rare conditions (tilt.py); cross traffic (crosstraffic.py) shares the
sampled capacity with the trace's own flow; a bottleneck queue (bottleneck.py) turns the load into
queueing delay (added to RTT) and overflow loss. Every random stream of trace ``i`` comes from
``SeedSequence(seed, spawn_key=(i, part))``, so trace ``i`` is the same bytes whatever the count, the
order or the number of workers.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from .. import __version__
from ..errors import TracegenError
from ..trace import Trace

STREAM_SAMPLER, STREAM_CROSS, STREAM_QUEUE = 0, 1, 2


def trace_rng(seed: int, index: int, part: int) -> np.random.Generator:
    """The Generator of one part of one trace: independent of every other trace and part."""
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index), int(part))))


def model_digest(model: Any) -> str:
    """sha256 of the model's canonical JSON: names the model in provenance."""
    return hashlib.sha256(model.to_json().encode()).hexdigest()


def synth_one(model: Any, index: int, duration_s: float, step_s: float, seed: int, *, cross_traffic: Any = None,
              bottleneck: Any = None, handover: Any = None, tilt: Any = None, scenario: Any = None,
              name: str = "model", digest: str | None = None) -> Trace:
    """Trace ``index`` of a run (see the module docstring)."""
    from .sampler import sample_trace

    s = sample_trace(model, duration_s, step_s, trace_rng(seed, index, STREAM_SAMPLER), tilt=tilt, handover=handover)
    capacity = np.asarray(s.bandwidth_bps, dtype=float)
    bandwidth, rtt, loss = capacity, np.asarray(s.rtt_ms, dtype=float), np.asarray(s.loss, dtype=float)
    extra: dict[str, Any] = {}
    if cross_traffic is not None:
        from .crosstraffic import generate

        cr = generate(cross_traffic, capacity, step_s, trace_rng(seed, index, STREAM_CROSS))
        bandwidth = np.asarray(cr.available_bps, dtype=float)
        extra["cross_bps"] = np.asarray(cr.cross_bps, dtype=float)
        offered = np.asarray(cr.offered_bps, dtype=float) + bandwidth
    else:
        offered = capacity
    if bottleneck is not None:
        from .bottleneck import queue

        q = queue(capacity, offered, step_s, bottleneck, trace_rng(seed, index, STREAM_QUEUE))
        queue_ms = np.asarray(q.queue_ms, dtype=float)
        extra["queue_ms"] = queue_ms
        rtt = rtt + queue_ms
        drop = np.clip(np.asarray(q.drop_share, dtype=float), 0.0, 1.0)
        loss = np.where(np.isnan(loss), drop, 1.0 - (1.0 - np.nan_to_num(loss)) * (1.0 - drop))
    llr = float(s.log_likelihood_ratio)
    prov = {"model": name, "model_sha256": digest or model_digest(model), "seed": int(seed), "index": int(index),
            "duration_s": float(duration_s), "step_s": float(step_s), "tracegen_version": __version__,
            "log_likelihood_ratio": llr, "scenario": scenario}
    return Trace.from_columns(
        s.t_s, bandwidth_bps=bandwidth, rtt_ms=rtt, loss=np.clip(loss, 0.0, 1.0), jitter_ms=s.jitter_ms,
        state=np.asarray(s.state, dtype=np.int64), event=list(s.event), origin="synthetic",
        source=f"{name}#{index}", tags={"model": name}, group=f"{name}-seed{seed}-{index}", provenance=prov,
        weight=float(np.exp(np.clip(llr, -700.0, 700.0))), **extra)


def iter_synth(model: Any, count: int, duration_s: float, step_s: float, seed: int = 0, *, start: int = 0,
               **options: Any) -> Iterator[Trace]:
    """Traces ``start .. start+count-1`` one at a time (flat memory for any count)."""
    if count < 1:
        raise TracegenError(f"count must be at least 1, got {count}", field="count")
    digest = model_digest(model)
    for i in range(start, start + count):
        yield synth_one(model, i, duration_s, step_s, seed, digest=digest, **options)


def synth(model: Any, n: int, duration_s: float, step_s: float, seed: int = 0, **options: Any) -> list[Trace]:
    """``n`` synthetic traces from ``model`` (a PathModel or a model file path).

    Options: ``cross_traffic`` (CrossTraffic), ``bottleneck`` (Bottleneck), ``handover`` (HandoverPlan),
    ``tilt`` (Tilt), ``name`` (the model's name in sources and tags), ``scenario`` (recorded in provenance).
    Each trace's ``weight`` is its importance weight p/q (1 without a tilt) and its provenance holds the
    log likelihood ratio; ``tracegen.synth.tilt.normalised_weights`` normalises a set of them.
    """
    if isinstance(model, (str, Path)):
        from ..model import load

        options.setdefault("name", Path(model).stem)
        model = load(model)
    return list(iter_synth(model, n, duration_s, step_s, seed, **options))


def write_traces(traces: Iterator[Trace], out_dir: Path, fmt: str = "parquet", *, force: bool = False) -> list[Path]:
    """Write each trace as ``synthetic-INDEX.parquet`` (or .csv) under ``out_dir``; refuse to overwrite."""
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for tr in traces:
        path = out_dir / f"synthetic-{tr.provenance['index']:06d}.{fmt}"
        if path.exists() and not force:
            raise TracegenError("exists already", path=path, hint="pass --force to replace, or another --out")
        tmp = path.with_name(f".{path.name}.tmp")
        table = tr.to_arrow()
        if fmt == "parquet":
            pq.write_table(table, tmp, compression="zstd")
        else:
            pacsv.write_csv(table, tmp)
        tmp.replace(path)
        written.append(path)
    return written


__all__ = ["synth", "iter_synth", "synth_one", "trace_rng", "write_traces", "model_digest"]
