"""Synthesis: ``tracegen.synth(model, n, duration_s, step_s, seed, ...)`` samples new traces from a path model.

Per trace ``i``: the sampler (sampler.py) draws the state path, levels with AR residuals, RTT, loss and
events (events.py), optionally tilted toward rare conditions (tilt.py); the shared link (link.py) puts
cross traffic on the sampled capacity and runs the bottleneck queue, whose delay is added to the RTT and
whose drops to the loss. Every random stream of trace ``i`` comes from
``SeedSequence(seed, spawn_key=(i, part))``, so trace ``i`` is the same bytes whatever the count, the
order or the number of workers.

Each trace records ``cross_bps`` and ``queue_ms`` when those parts are on, the hidden ``state``, the
``event`` marks, and in its metadata: origin ``synthetic``, the model's sha256, seed, index, scenario
and tracegen version (provenance), and the importance weight p/q of a tilted draw (``weight``, 1
without a tilt; its log is ``provenance["log_likelihood_ratio"]``).
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np

from .. import __version__
from ..errors import TracegenError, check_seed
from ..trace import Trace
from .bottleneck import Bottleneck
from .crosstraffic import CrossTraffic
from .events import MAX_EVENTS_PER_TRACE, HandoverPlan, check_event_counts, check_events
from .sampler import MIN_STEP_S, check_trace_size, sample_trace
from .tilt import Tilt, TiltPlan

STREAM_SAMPLER, STREAM_CROSS, STREAM_QUEUE = 0, 1, 2
MAX_LOG_WEIGHT = 700.0  # exp(700) is near the largest double; a weight is clipped there rather than overflow


def trace_rng(seed: int, index: int, part: int) -> np.random.Generator:
    """The Generator of one part of one trace: independent of every other trace and part."""
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(int(index), int(part))))


_LAST_DIGEST: tuple[Any, str] | None = None


def model_digest(model: Any) -> str:
    """sha256 of the model's canonical JSON: names the model in provenance (the last one is remembered,
    holding the model so the identity check is safe)."""
    global _LAST_DIGEST
    last = _LAST_DIGEST
    if last is not None and last[0] is model:
        return last[1]
    digest = hashlib.sha256(model.to_json().encode()).hexdigest()
    _LAST_DIGEST = (model, digest)
    return digest


def _load(model: Any) -> tuple[Any, str | None]:
    from ..model import PathModel, load

    if isinstance(model, (str, Path)):
        return load(model), Path(model).stem
    if not isinstance(model, PathModel):
        raise TracegenError(f"must be a PathModel or a model file path, got {type(model).__name__}", field="model")
    return model, None


def _check_number(name: str, value: Any, *, integer: bool = False, low: float = 0.0, low_open: bool = True) -> None:
    types = (int, np.integer) if integer else (int, float, np.integer, np.floating)
    ok = isinstance(value, types) and not isinstance(value, bool) and math.isfinite(value) \
        and (value > low if low_open else value >= low)
    if not ok:
        raise TracegenError(f"must be {'an integer' if integer else 'a number'} {'>' if low_open else '>='} {low:g}, "
                            f"got {value!r}", field=name)


def check_run(model: Any, count: int, duration_s: float, step_s: float, seed: int, *,
              cross_traffic: CrossTraffic | None = None, bottleneck: Bottleneck | None = None,
              handover: HandoverPlan | None = None, tilt: Tilt | None = None) -> TiltPlan:
    """Validate a whole run before anything is drawn or written; returns the resolved tilt."""
    _check_number("count", count, integer=True, low=1, low_open=False)
    check_seed(seed)
    _check_number("duration_s", duration_s)
    _check_number("step_s", step_s)
    if step_s < MIN_STEP_S - 1e-12:
        raise TracegenError(f"must be at least {MIN_STEP_S} s (10 ms), got {step_s:g}", field="step_s",
                            hint="dwell times are in seconds, so any step from 10 ms up works")
    if step_s > duration_s:
        raise TracegenError(f"step {step_s:g} s is longer than the duration {duration_s:g} s", field="step_s")
    check_trace_size(duration_s, step_s)
    for name, value, cls in (("cross_traffic", cross_traffic, CrossTraffic), ("bottleneck", bottleneck, Bottleneck),
                             ("handover", handover, HandoverPlan), ("tilt", tilt, Tilt)):
        if value is not None and not isinstance(value, cls):
            raise TracegenError(f"must be a {cls.__name__}, got {type(value).__name__}", field=name)
    plan = TiltPlan.build(model, tilt)
    check_events(model, handover, plan)
    check_event_counts(model, handover, plan, duration_s)
    if cross_traffic is not None:
        period = cross_traffic.on_mean_s + cross_traffic.off_mean_s
        for expected, name in ((cross_traffic.flow_rate_per_s * duration_s, "cross_traffic.flow_rate_per_s"),
                               (cross_traffic.onoff_sources * duration_s / period, "cross_traffic.onoff_sources")):
            if not expected <= MAX_EVENTS_PER_TRACE:
                raise TracegenError(f"{expected:.3g} flows or on-periods expected in one {duration_s:g} s trace, "
                                    f"more than {MAX_EVENTS_PER_TRACE:.0e}", field=name,
                                    hint="check the rate and its unit")
    return plan


def synth_one(model: Any, index: int, duration_s: float, step_s: float, seed: int, *,
              cross_traffic: CrossTraffic | None = None, bottleneck: Bottleneck | None = None,
              handover: HandoverPlan | None = None, tilt: Tilt | None = None, scenario: Mapping[str, Any] | None = None,
              name: str = "model", tags: Mapping[str, str] | None = None, digest: str | None = None) -> Trace:
    """Trace ``index`` of a run (module docstring). Arguments are assumed checked by :func:`check_run`."""
    s = sample_trace(model, duration_s, step_s, trace_rng(seed, index, STREAM_SAMPLER), tilt=tilt, handover=handover)
    bandwidth, rtt, loss = s.bandwidth_bps, s.rtt_ms, s.loss
    extra: dict[str, Any] = {}
    if cross_traffic is not None or bottleneck is not None:
        from .link import share_link

        link = share_link(np.asarray(bandwidth, dtype=np.float64), float(step_s), cross_traffic, bottleneck,
                          trace_rng(seed, index, STREAM_CROSS), trace_rng(seed, index, STREAM_QUEUE))
        bandwidth = link.available_bps
        if cross_traffic is not None:
            extra["cross_bps"] = link.cross_bps
        if bottleneck is not None:
            extra["queue_ms"] = link.queue_ms
            rtt = rtt + link.queue_ms
            drop = link.drop_share
            # the path's loss and the queue's drops are independent; unknown path loss counts as none
            loss = 1.0 - (1.0 - np.nan_to_num(loss)) * (1.0 - drop)
    llr = float(s.log_likelihood_ratio)
    prov = {"model": name, "model_sha256": digest or model_digest(model), "seed": int(seed), "index": int(index),
            "duration_s": float(duration_s), "step_s": float(step_s), "tracegen_version": __version__,
            "log_likelihood_ratio": llr}
    if scenario is not None:
        prov["scenario"] = dict(scenario)
    return Trace.from_columns(
        s.t_s, bandwidth_bps=bandwidth, rtt_ms=rtt, loss=np.clip(loss, 0.0, 1.0), jitter_ms=s.jitter_ms,
        state=s.state, event=s.event, origin="synthetic", source=f"{name}#{index}",
        tags={"model": name, **dict(tags or {})}, group=f"{name}-seed{seed}-{index}", provenance=prov,
        weight=float(np.exp(np.clip(llr, -MAX_LOG_WEIGHT, MAX_LOG_WEIGHT))), **extra)


_WORKER_MODELS: dict[str, Any] = {}


def synth_range(job: tuple[str, str, int, int, float, float, int, dict[str, Any]]) -> Iterator[Trace]:
    """Traces ``start .. start+count-1`` of a run one at a time, the model arriving as its JSON text
    (parsed once per worker process and kept by its digest)."""
    import json

    from ..model import PathModel

    text, digest, start, count, duration_s, step_s, seed, options = job
    model = _WORKER_MODELS.get(digest)
    if model is None:
        model = _WORKER_MODELS[digest] = PathModel.from_dict(json.loads(text))
    for i in range(start, start + count):
        tr = synth_one(model, i, duration_s, step_s, seed, digest=digest, **options)
        tr.id  # the content hash is cached on the trace, so the worker pays for it, not the caller
        yield tr


def synth_chunk(job: tuple[str, str, int, int, float, float, int, dict[str, Any]]) -> list[Trace]:
    """A worker's task: the traces of :func:`synth_range` as a list (they travel back together)."""
    return list(synth_range(job))


def iter_synth(model: Any, count: int, duration_s: float, step_s: float, seed: int = 0, *, start: int = 0,
               workers: int | None = 1, cluster: str | None = None, **options: Any) -> Iterator[Trace]:
    """Traces ``start .. start+count-1`` one at a time, in order (flat memory for any count); checked up
    front. ``workers`` local processes or a Dask ``cluster`` (tracegen.parallel) draw chunks of traces;
    the bytes are the same as in one process."""
    from ..parallel import chunks, runner

    model, stem = _load(model)
    if stem is not None:
        options.setdefault("name", stem)
    _check_number("start", start, integer=True, low_open=False)
    check_run(model, count, duration_s, step_s, seed, **{k: options.get(k) for k in
                                                        ("cross_traffic", "bottleneck", "handover", "tilt")})
    digest = model_digest(model)
    run = runner(workers, cluster)

    def generate() -> Iterator[Trace]:
        try:
            if run.kind == "serial":
                for i in range(start, start + count):
                    yield synth_one(model, i, duration_s, step_s, seed, digest=digest, **options)
                return
            text = model.to_json()
            jobs = [(text, digest, start + a, n, duration_s, step_s, seed, options) for a, n in chunks(count, run.workers)]
            for part in run.map(synth_chunk, jobs):
                yield from part
        finally:
            run.close()

    return generate()


def synth(model: Any, n: int, duration_s: float, step_s: float, seed: int = 0, *, stream: bool = False,
          **options: Any) -> list[Trace] | Iterator[Trace]:
    """``n`` synthetic traces from ``model`` (a PathModel or a model file path): a list, or with
    ``stream=True`` an iterator that makes one trace at a time.

    Options: ``cross_traffic`` (CrossTraffic), ``bottleneck`` (Bottleneck), ``handover`` (HandoverPlan),
    ``tilt`` (Tilt), ``name`` (the run's label in sources and tags), ``tags`` (extra labels),
    ``scenario`` (recorded in provenance), ``start`` (index of the first trace), ``workers`` (local
    processes, default 1) or ``cluster`` (a Dask scheduler address or file). Everything is checked
    before the first draw. Each trace's ``weight`` is its importance weight p/q (1 without a tilt);
    ``tracegen.synth.tilt.normalised_weights`` normalises a set of them.
    """
    traces = iter_synth(model, n, duration_s, step_s, seed, **options)
    return traces if stream else list(traces)


__all__ = ["synth", "iter_synth", "synth_one", "check_run", "trace_rng", "model_digest", "CrossTraffic", "Bottleneck",
           "HandoverPlan", "Tilt"]
