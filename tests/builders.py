"""Small path models with known parameters, built in code for the synthesis tests (invented values)."""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from tracegen.fit.ar import ARFit
from tracegen.fit.dwell import DwellFit, family_mean_s
from tracegen.fit.events import EventModel
from tracegen.fit.loss import GilbertElliott
from tracegen.model import PathModel, StateModel


def dwell(family: str, step_s: float = 1.0, **params: float) -> DwellFit:
    return DwellFit(family, dict(params), step_s, family_mean_s(family, params, step_s), 10, -1.0)


def ar(coefs: Sequence[float], sigma2: float) -> ARFit:
    return ARFit(len(coefs), tuple(coefs), sigma2, 100, -1.0, 2.0, False)


def events(rate_per_hour: float = 60.0, *, failure_probability: float = 0.1, share_with_interruption: float = 0.5,
           outage_rate_per_hour: float = 0.0, post: Sequence[float] | None = None, **over: Any) -> EventModel:
    fields = dict(source="cell", hours=10.0, n_events=int(rate_per_hour * 10), rate_per_hour=rate_per_hour,
                  share_with_interruption=share_with_interruption, interruption_mu_log_s=math.log(0.2),
                  interruption_sigma_log_s=0.4, failure_threshold_s=2.0, failure_probability=failure_probability,
                  failure_mu_log_s=math.log(4.0), failure_sigma_log_s=0.5, n_level_changes=0,
                  level_change_mean_log=None, level_change_sd_log=None,
                  post_state_probs=None if post is None else tuple(post), n_outages=int(outage_rate_per_hour * 10),
                  outage_rate_per_hour=outage_rate_per_hour,
                  outage_mu_log_s=math.log(3.0) if outage_rate_per_hour > 0 else None,
                  outage_sigma_log_s=0.6 if outage_rate_per_hour > 0 else None, max_interruption_s=10.0)
    fields.update(over)
    return EventModel(**fields)


def level_state(level_bps: float, share: float, dwell_fit: DwellFit, *, sd: float = 0.2, ar_fit: ARFit | None = None,
                rtt: tuple[float, float] | None = (math.log(40.0), 0.2), loss_mean: float | None = None,
                rtt_joint: tuple[float, float, float] | None = None) -> StateModel:
    """A level state; ``rtt_joint`` = (mean log RTT, cov(log bw, log rtt), var log rtt) makes it joint."""
    mean: tuple[float, ...] = (math.log(level_bps),)
    cov: tuple[tuple[float, ...], ...] = ((sd * sd,),)
    if rtt_joint is not None:
        m, c01, v = rtt_joint
        mean, cov, rtt = (math.log(level_bps), m), ((sd * sd, c01), (c01, v)), None
    return StateModel("level", level_bps, share, dwell_fit, mean, cov, ar_fit, rtt, loss_mean)


def model(states: Sequence[StateModel], jumps: Sequence[Sequence[float]], *, loss: GilbertElliott | None = None,
          event_model: EventModel | None = None, step_s: float = 1.0) -> PathModel:
    joint = bool(states) and any(len(s.mean) == 2 for s in states)
    features = ("log_bandwidth_bps", "log_rtt_ms") if joint else ("log_bandwidth_bps",)
    shares = np.array([s.share for s in states])
    assert math.isclose(shares.sum(), 1.0), "test models need shares summing to 1"
    built = PathModel(step_s, 10_000.0, features, tuple(states), tuple(tuple(float(v) for v in r) for r in jumps),
                      loss, event_model, {})
    return PathModel.from_dict(built.to_dict())  # through the validating loader, as a model file would go


def three_levels(**kw: Any) -> PathModel:
    """Three level states (1, 4, 12 Mbit/s) with lognormal, gamma and geometric dwell times and AR residuals."""
    states = [level_state(1e6, 0.3, dwell("lognormal", mu=math.log(8.0), sigma=0.6), ar_fit=ar([0.6], 0.02)),
              level_state(4e6, 0.4, dwell("gamma", shape=3.0, scale_s=5.0), ar_fit=ar([0.5, 0.2], 0.01)),
              level_state(12e6, 0.3, dwell("geometric", p=0.1), sd=0.15)]
    jumps = [[0, 0.7, 0.3], [0.5, 0, 0.5], [0.4, 0.6, 0]]
    return model(states, jumps, **kw)


def with_outage(**kw: Any) -> PathModel:
    """An outage state plus two level states."""
    states = [StateModel("outage", 0.0, 0.05, dwell("lognormal", mu=math.log(2.0), sigma=0.5), loss_mean=1.0),
              level_state(2e6, 0.45, dwell("lognormal", mu=math.log(10.0), sigma=0.5), ar_fit=ar([0.5], 0.02)),
              level_state(10e6, 0.5, dwell("gamma", shape=2.0, scale_s=8.0), ar_fit=ar([0.7], 0.01))]
    jumps = [[0, 0.6, 0.4], [0.2, 0, 0.8], [0.1, 0.9, 0]]
    return model(states, jumps, **kw)
