"""One shared link: cross traffic and a bottleneck queue applied to a sampled capacity series.

``share_link(capacity_bps, step_s, cross, bottleneck, rng_cross, rng_queue)`` returns what the trace's own
flow (the foreground) sees per step: its bandwidth, the cross traffic carried, the queueing delay to add
to its RTT and the bottleneck's drop share to combine with the path's own loss. A fluid model on the
trace's grid; capacities in bit/s, backlogs in bytes.

Flow level (``crosstraffic.generate``). Unresponsive load (constant-rate flows, Pareto on/off sources)
takes its rate first, up to the capacity; the active responsive cross flows and the foreground share the
rest equally (processor sharing). ``available_bps`` is the foreground's share, ``cross_bps`` everything
else carried; the two add up to the capacity.

The foreground offers exactly its fair share. It never probes: the queueing its own sending causes is
already in the path's sampled RTT, so the link adds only the queue the cross traffic builds. While that
queue is above the operating point below, the foreground backs off with the responsive cross flows.

The queue (``bottleneck.standing_queue``). Loss-based responsive senders (Reno- or CUBIC-like) do not stop
at their fair share: they keep raising their rate until the bottleneck signals congestion, so a queue
stands wherever the bottleneck starts signalling, its operating point:

* drop-tail signals only when full, so the queue stands at the buffer ("bufferbloat");
* CoDel (Nichols & Jacobson 2012) drops until the sojourn time is back at its target: target x capacity;
* RED (Floyd & Jacobson 1993) settles where its drop probability equals the loss p the flows need:
  avg = min_th + (p/max_p)(max_th - min_th), at most max_th. The level follows p through RED's own
  per-step averaging weight, as RED's averaged queue would (so per-step capacity noise does not shake it).

Per step, while responsive cross flows are served, their extra offer moves the backlog towards that
level: up by at most ``responsive_probe`` x their rate, down by at most ``bottleneck.BACKOFF`` (1/2, Reno's
multiplicative decrease, RFC 5681) x the responsive traffic's share (cross flows and foreground), and it
sits on the level once there. When no responsive cross flow is served the level is 0: the standing queue
drains at that back-off rate (a departing flow's queued bytes leave while the rest ramp up). Unresponsive
load above the capacity adds its excess on top; the buffer caps the backlog and the overflow is dropped.
RED's and CoDel's own drop laws act on what overload builds, from an overloaded step until the backlog is
back within a packet of the level; that stretch is the only per-step loop. Everything else is exact and
vectorised (``bottleneck._track``), with a Python loop once per level jump (a few per flow), and runs in
chunks of 16384 steps so that only the four outputs are full-length arrays.

Loss on the level. A flow in congestion avoidance at window W packets sees loss p = 3/(2W²) (the Reno
response function, Mathis, Semke, Mahdavi & Ott 1997: rate = MSS/RTT x sqrt(3/(2p))). With W = (per-flow
rate) x RTT / ``bottleneck.packet_bytes``, per-flow rate = responsive share / number of active responsive
flows, and RTT = ``responsive_rtt_ms`` plus the delay of the standing queue at its level
(``level_rtt_ms``: a deep drop-tail buffer means long round trips, large windows and little loss, as
bufferbloat does), that p is the drop share of every packet at the bottleneck on steps that end on the
level; the responsive senders make the drops good, so the backlog stays put. Overflow and AQM drops of
overload add to it (independently).

``queue_ms`` is the backlog at the end of the step over the step's capacity; ``drop_share`` the share of the
step's offered bytes the bottleneck drops.

Why ``responsive_probe`` defaults to 1. A loss-based flow in slow start doubles its window every round
trip (RFC 5681: one segment per ACK), so once the link is full it offers twice what is delivered: the
queue fills at the flow's own rate, and a new flow reaches the buffer within a few round trips. That is
what loss-based cross traffic does to a shared drop-tail link (it fills the buffer while it is active), so
the default builds the queue a demanding user expects; congestion avoidance alone (one packet per round
trip per flow, probe 1/W) is slower but reaches the same level. 0 gives the idealised responsive flows of
``crosstraffic`` that take exactly their fair share and ignore the queue (the queue then runs on their
offered load exactly as ``bottleneck.queue``): only unresponsive overload builds a queue, and only AQM
drops drain it, since the idealised flows fill every bit the unresponsive load leaves. ``responsive_rtt_ms``
defaults to 50 ms, a typical wide-area round trip (from memory); it only sets the loss on the level.

Not modelled: the sawtooth around the level (the fluid holds the time average, which for few flows on a
buffer below the bandwidth-delay product is below the buffer), the queue's own delay in the flows' round
trip time beyond its level (the level's delay is in the loss formula, the climb to it is not), and the split of a draining backlog between flows
(the flow-level shares are kept).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import TracegenError
from .bottleneck import Bottleneck, LinkChunk, QueueResult, queue, run_standing, standing_queue
from .crosstraffic import CrossResult, CrossTraffic, check_capacity, flows


@dataclass(frozen=True)
class LinkResult:
    """Per-step outputs of ``share_link`` (arrays of the capacity's length)."""

    available_bps: np.ndarray   # the foreground's share (the capacity itself without cross traffic)
    cross_bps: np.ndarray       # cross traffic carried (0 without cross traffic)
    queue_ms: np.ndarray        # queueing delay to add to the RTT (0 without a bottleneck)
    drop_share: np.ndarray      # bottleneck drop share in [0, 1], to combine with the path's own loss
    cross: CrossResult | None = None   # flow-level details (``details=True`` with cross traffic)
    queue: QueueResult | None = None   # queue details (``details=True`` with cross traffic and a bottleneck)
    hold_loss: np.ndarray | None = None  # the responsive flows' Reno loss per step (``details=True``)


def reno_loss(responsive_bps: np.ndarray, n_responsive: np.ndarray, rtt_ms: float | np.ndarray,
              packet_bytes: float) -> np.ndarray:
    """Loss share at which Reno-like flows sharing ``responsive_bps`` among ``n_responsive`` run at that rate.

    Mathis, Semke, Mahdavi & Ott 1997: rate = MSS/RTT x sqrt(3/(2p)), so p = 3/(2W²) with W = rate x RTT /
    MSS the window in packets; at most 1. 0 where no responsive flow is served.
    """
    r = np.asarray(responsive_bps, dtype=float)
    n = np.asarray(n_responsive, dtype=float)
    # p = 1.5 (MSS n / (r RTT))^2: n/r is 0 where nothing is served
    q = np.divide(n, r, out=np.zeros(r.shape), where=r > 0)
    q *= 8.0 * packet_bytes / (np.asarray(rtt_ms, dtype=float) / 1000.0)
    np.multiply(q, q, out=q)
    q *= 1.5
    return np.minimum(q, 1.0, out=q)


def level_rtt_ms(bottleneck: Bottleneck, capacity_bps: np.ndarray, mean_capacity_bps: float,
                 base_rtt_ms: float) -> np.ndarray:
    """The responsive flows' round trip on the queue's operating point: ``base_rtt_ms`` plus the standing
    queue's delay (drop-tail: the buffer; CoDel: its target; RED: halfway between its thresholds, as
    the point it settles at depends on the loss itself). A deep buffer thus means long round trips,
    large windows and little loss, as bufferbloat does; a step without capacity gets the base RTT."""
    c = np.asarray(capacity_bps, dtype=float)
    if bottleneck.policy == "codel":
        return np.full(c.shape, base_rtt_ms + bottleneck.codel_target_ms)
    top = bottleneck.buffer_bytes_for(np.array([mean_capacity_bps]))
    if bottleneck.policy == "red":
        top *= 0.5 * (bottleneck.red_min_th_frac + bottleneck.red_max_th_frac)
    delay = np.divide(top * 8000.0, c, out=np.zeros(c.shape), where=c > 0)
    return base_rtt_ms + delay


def share_link(capacity_bps: np.ndarray, step_s: float, cross: CrossTraffic | None, bottleneck: Bottleneck | None,
               rng_cross: np.random.Generator | None, rng_queue: np.random.Generator | None = None, *,
               details: bool = False) -> LinkResult:
    """Apply cross traffic and a bottleneck queue to ``capacity_bps`` (see the module docstring).

    Either may be None. ``rng_cross`` drives the cross traffic (required with it); the fluid queue is
    deterministic and does not draw from ``rng_queue`` (kept so each part has its own stream). Same inputs
    and generator states give the same bytes, with or without ``details`` (which adds the flow-level and
    queue diagnostics: CrossResult, QueueResult with backlog, level, offered and delivered load).
    """
    c = check_capacity(capacity_bps, step_s)
    step_s = float(step_s)
    if cross is not None and not isinstance(cross, CrossTraffic):
        raise TracegenError(f"must be a CrossTraffic or None, got {type(cross).__name__}", field="cross_traffic")
    if bottleneck is not None and not isinstance(bottleneck, Bottleneck):
        raise TracegenError(f"must be a Bottleneck or None, got {type(bottleneck).__name__}", field="bottleneck")
    n = c.size
    if cross is None:
        # the foreground alone offers exactly the capacity: no cross traffic, no queue
        return LinkResult(available_bps=c.copy(), cross_bps=np.zeros(n), queue_ms=np.zeros(n), drop_share=np.zeros(n))
    if not isinstance(rng_cross, np.random.Generator):
        raise TracegenError(f"must be a numpy Generator, got {type(rng_cross).__name__}", field="rng_cross")
    fl = flows(cross, c, step_s, rng_cross)
    if bottleneck is None or cross.responsive_probe == 0 or details:
        cr = fl.result()
        if bottleneck is None:
            return LinkResult(available_bps=cr.available_bps, cross_bps=cr.cross_bps, queue_ms=np.zeros(n),
                              drop_share=np.zeros(n), cross=cr if details else None)
        if cross.responsive_probe == 0:   # the idealised flows: today's queue on the offered load
            q = queue(c, cr.offered_bps + cr.available_bps, step_s, bottleneck)
            return LinkResult(available_bps=cr.available_bps, cross_bps=cr.cross_bps, queue_ms=q.queue_ms,
                              drop_share=q.drop_share, cross=cr if details else None, queue=q if details else None,
                              hold_loss=np.zeros(n) if details else None)
        loss = reno_loss(cr.responsive_bps, cr.n_responsive,
                         level_rtt_ms(bottleneck, c, float(np.mean(c)), cross.responsive_rtt_ms),
                         bottleneck.packet_bytes)
        share = c if fl.unresp is None else fl.left
        over = None if fl.unresp is None else np.maximum(fl.unresp - c, 0.0)
        q = standing_queue(c, step_s, bottleneck, responsive_bps=cr.responsive_bps, share_bps=share,
                           overload_bps=over, hold_loss=loss, probe=float(cross.responsive_probe))
        return LinkResult(available_bps=cr.available_bps, cross_bps=cr.cross_bps, queue_ms=q.queue_ms,
                          drop_share=q.drop_share, cross=cr, queue=q, hold_loss=loss)
    # the fast path: cross traffic and queue chunk by chunk, only the four outputs are full-length
    available, cross_bps = np.empty(n), np.empty(n)
    rtt_ms, pkt, mean_c = cross.responsive_rtt_ms, bottleneck.packet_bytes, float(np.mean(c))

    def provider(k: int, end: int) -> LinkChunk:
        n_resp, avail, resp, left, unresp = fl.chunk(k, end)
        available[k:end] = avail
        cc = c[k:end]
        if unresp is None:
            cross_bps[k:end] = resp
            over = None
        else:
            cross_bps[k:end] = (cc - left) + resp
            over = np.maximum(unresp - cc, 0.0)
        return LinkChunk(cc, resp, left, reno_loss(resp, n_resp, level_rtt_ms(bottleneck, cc, mean_c, rtt_ms), pkt),
                         over)

    q = run_standing(bottleneck, n, step_s, mean_c, float(cross.responsive_probe), provider)
    return LinkResult(available_bps=available, cross_bps=cross_bps, queue_ms=q.queue_ms, drop_share=q.drop_share)


__all__ = ["LinkResult", "share_link", "reno_loss", "level_rtt_ms"]
