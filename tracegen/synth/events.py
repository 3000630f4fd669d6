"""Handovers and standalone outages for one synthetic trace: when, how long, and what they do.

A :class:`HandoverPlan` is the tester's knob set (scenario section ``[handover]``); anything it leaves
unset comes from the model's fitted events (``model.events``), else from the defaults below.

Handover times: a Poisson process at ``rate_per_min`` (or ``60 speed_m_s / cell_size_m``: one cell
crossing per cell size travelled; or the model's fitted rate), plus the explicit ``times_s``. Each
handover is, independently,

* a *failure* with probability ``failure_probability``: the link drops for a log-normal time with
  median ``failure_outage_s`` (a radio-link failure and re-establishment; mark ``handover-failure``);
* else an *interruption* with probability ``share_with_interruption`` (1 when the plan sets
  ``interruption_ms``): a log-normal break with median ``interruption_ms``, truncated at the model's
  failure threshold so a success never lasts as long as a failure (mark ``handover``);
* else a seamless change (mark ``handover``, no break).

During a break bandwidth is 0, loss 1 and RTT/jitter unknown. After it, packets held during the break
drain: RTT rises by ``rtt_spike_ms`` (default: the break's own length) and falls linearly back over
``rtt_spike_decay_s``; loss is at least ``loss_burst_loss`` for ``loss_burst_s``. The level after the
event (``new_level``): ``model`` draws the next state from the fitted ``post_state_probs`` (the state
shares when the model has none), ``shares`` from the state shares, ``keep`` leaves the state path alone.

Standalone outages (mark ``outage``) come at the model's ``outage_rate_per_hour`` with its log-normal
lengths (or the outage state's dwell when no length was fitted); they do not change the state.

Tilt (importance sampling, tilt.py): the handover and outage rates, the failure probability and the
length of failures and outages can be raised; every tilted draw adds its log p/q to ``EventDraw.llr``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special

from ..errors import TracegenError
from .tilt import TiltPlan, dwell_log_ratio, lognormal_log_ratio, poisson_log_ratio

HANDOVER, FAILURE, OUTAGE = "handover", "handover-failure", "outage"
NEW_LEVEL = ("model", "shares", "keep")
# Used only when neither the plan nor the model says (values from memory, not measured here): an LTE
# handover breaks the data path for some tens of milliseconds; a radio-link failure with
# re-establishment takes of the order of a second or two; successes and failures split at 2 s.
DEFAULT_INTERRUPTION_MS = 50.0
DEFAULT_FAILURE_OUTAGE_S = 1.5
DEFAULT_SIGMA_LOG = 0.5
DEFAULT_FAILURE_THRESHOLD_S = 2.0


def _number(name: str, value: Any, *, low: float = 0.0, low_open: bool = True, high: float | None = None,
            none: bool = True) -> None:
    if value is None and none:
        return
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool) \
        and math.isfinite(value) and (value > low if low_open else value >= low) \
        and (high is None or value <= high)
    if not ok:
        rng = f"{'>' if low_open else '>='} {low:g}" + ("" if high is None else f" and <= {high:g}")
        raise TracegenError(f"must be a number {rng}, got {value!r}", field=f"handover.{name}")


MAX_EVENTS_PER_TRACE = 10**7  # more in one trace is a rate in the wrong unit (and would not fit in memory)

@dataclass(frozen=True)
class HandoverPlan:
    """Handovers to inject (module docstring); None means "as the model says"."""

    rate_per_min: float | None = None
    speed_m_s: float | None = None
    cell_size_m: float | None = None
    times_s: tuple[float, ...] = ()
    interruption_ms: float | None = None
    interruption_sigma_log: float = DEFAULT_SIGMA_LOG
    failure_probability: float | None = None
    failure_outage_s: float | None = None
    failure_sigma_log: float = DEFAULT_SIGMA_LOG
    rtt_spike_ms: float | None = None
    rtt_spike_decay_s: float = 1.0
    loss_burst_s: float = 0.0
    loss_burst_loss: float = 0.5
    new_level: str = "model"

    def __post_init__(self) -> None:
        _number("rate_per_min", self.rate_per_min, low_open=False)
        for name in ("speed_m_s", "cell_size_m", "interruption_ms", "failure_outage_s"):
            _number(name, getattr(self, name))
        for name in ("interruption_sigma_log", "failure_sigma_log"):
            _number(name, getattr(self, name), low_open=False, none=False)
        _number("failure_probability", self.failure_probability, low_open=False, high=1.0)
        _number("rtt_spike_ms", self.rtt_spike_ms, low_open=False)
        _number("rtt_spike_decay_s", self.rtt_spike_decay_s, none=False)
        _number("loss_burst_s", self.loss_burst_s, low_open=False, none=False)
        _number("loss_burst_loss", self.loss_burst_loss, low_open=False, high=1.0, none=False)
        if (self.speed_m_s is None) != (self.cell_size_m is None):
            raise TracegenError("speed_m_s and cell_size_m go together", field="handover.speed_m_s",
                                hint="give both, or rate_per_min instead")
        if self.rate_per_min is not None and self.speed_m_s is not None:
            raise TracegenError("give rate_per_min, or speed_m_s with cell_size_m, not both",
                                field="handover.rate_per_min")
        times = tuple(self.times_s)
        for i, t in enumerate(times):
            if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t) or t < 0:
                raise TracegenError(f"times must be seconds >= 0, got {t!r} at index {i}", field="handover.times_s")
        object.__setattr__(self, "times_s", tuple(float(t) for t in times))
        if self.new_level not in NEW_LEVEL:
            raise TracegenError(f"must be one of {', '.join(NEW_LEVEL)}, got {self.new_level!r}",
                                field="handover.new_level")

    @property
    def rate_per_s(self) -> float | None:
        """The Poisson rate asked for (None: the model's)."""
        if self.rate_per_min is not None:
            return self.rate_per_min / 60.0
        if self.speed_m_s is not None:
            return self.speed_m_s / self.cell_size_m
        return None


@dataclass(frozen=True, eq=False)
class EventDraw:
    """What the events of one trace do, in seconds from its start.

    ``breaks`` (k, 2): [start, end) with bandwidth 0, loss 1, RTT and jitter unknown.
    ``spikes`` (k, 3): start, end, peak: RTT + peak_ms * (end - t) / (end - start) inside [start, end).
    ``bursts`` (k, 3): start, end, loss: loss at least this inside [start, end).
    ``switches``: (time, state) restarts of the state path with a fresh dwell.
    ``marks``: (time, kind) for the ``event`` column. ``llr``: log p/q of the tilted draws.
    """

    marks: list[tuple[float, str]] = field(default_factory=list)
    breaks: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    spikes: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    bursts: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))
    switches: list[tuple[float, int]] = field(default_factory=list)
    llr: float = 0.0


def _truncated_lognormal(rng: np.random.Generator, mu: float, sd: float, upper: float, size: int) -> np.ndarray:
    """Log-normal draws conditioned on being <= upper (inverse cdf of the truncated law)."""
    v = rng.random(size)
    if sd <= 0:
        return np.full(size, min(math.exp(mu), upper))
    top = special.ndtr((math.log(upper) - mu) / sd) if upper > 0 else 0.0
    with np.errstate(divide="ignore"):
        return np.exp(mu + sd * special.ndtri(v * top))


@dataclass(frozen=True)
class _HandoverLaw:
    rate_per_s: float
    p_fail: float
    p_break: float             # interruption, given no failure ... as an unconditional share
    interrupt: tuple[float, float]
    failure: tuple[float, float]
    threshold_s: float


def _detected_only(model: Any, plan: HandoverPlan | None) -> bool:
    """Events the fit read off the bandwidth itself (no cell labels) are already in the state path: the
    outage state holds their breaks and the chain their level changes. Drawn again on top by default,
    they doubled the outage time of a model fitted to a field corpus without cell labels (11 % against
    the data's 5.4 %). So they are drawn only when a HandoverPlan asks for events."""
    return plan is None and model.events is not None and model.events.source == "detected"


def _law(model: Any, plan: HandoverPlan | None) -> _HandoverLaw:
    ev = None if _detected_only(model, plan) else model.events
    plan = plan or HandoverPlan()
    rate = plan.rate_per_s
    if rate is None:
        rate = ev.rate_per_hour / 3600.0 if ev is not None else 0.0
    threshold = ev.failure_threshold_s if ev is not None else DEFAULT_FAILURE_THRESHOLD_S
    if plan.interruption_ms is not None:
        interrupt = (math.log(plan.interruption_ms / 1000.0), plan.interruption_sigma_log)
        share = 1.0
    elif ev is not None and ev.interruption_mu_log_s is not None:
        interrupt = (ev.interruption_mu_log_s, ev.interruption_sigma_log_s)
        share = ev.share_with_interruption or 0.0
    else:
        interrupt = (math.log(DEFAULT_INTERRUPTION_MS / 1000.0), DEFAULT_SIGMA_LOG)
        share = 1.0
    if plan.failure_outage_s is not None:
        failure = (math.log(plan.failure_outage_s), plan.failure_sigma_log)
    elif ev is not None and ev.failure_mu_log_s is not None:
        failure = (ev.failure_mu_log_s, ev.failure_sigma_log_s)
    else:
        failure = (math.log(DEFAULT_FAILURE_OUTAGE_S), DEFAULT_SIGMA_LOG)
    if plan.failure_probability is not None:
        p_fail = plan.failure_probability
    elif ev is not None and ev.failure_probability is not None and ev.failure_mu_log_s is not None:
        p_fail = ev.failure_probability
    else:
        p_fail = 0.0
    p_break = min(1.0, max(share, p_fail)) - p_fail
    return _HandoverLaw(rate, p_fail, max(p_break, 0.0), interrupt, failure, threshold)


def check_events(model: Any, plan: HandoverPlan | None, tilt: TiltPlan) -> None:
    """Refuse, before anything is drawn, a tilt that would push the failure probability above 1 or
    stretch a log-normal length that has no spread."""
    _check_law(_law(model, plan), tilt)


def check_event_counts(model: Any, plan: HandoverPlan | None, tilt: TiltPlan, duration_s: float) -> None:
    """Refuse rates that would draw more than ``MAX_EVENTS_PER_TRACE`` handovers or outages in one trace
    (on average): a rate in the wrong unit, not a path, and the draw would not fit in memory."""
    law = _law(model, plan)
    ev = None if _detected_only(model, plan) else model.events
    for what, rate_per_s, factor, rate_name, factor_name in (
            ("handovers", law.rate_per_s, tilt.handover_rate_factor, "handover.rate_per_min",
             "tilt.handover_rate_factor"),
            ("outages", 0.0 if ev is None else ev.outage_rate_per_hour / 3600.0, tilt.outage_rate_factor,
             "events.outage_rate_per_hour", "tilt.outage_rate_factor")):
        expected = rate_per_s * factor * duration_s
        if not expected <= MAX_EVENTS_PER_TRACE:
            raise TracegenError(f"{expected:.3g} {what} expected in one {duration_s:g} s trace, more than "
                                f"{MAX_EVENTS_PER_TRACE:.0e}", field=factor_name if factor > 1 else rate_name,
                                hint="check the rate and its unit")


def _check_law(law: _HandoverLaw, tilt: TiltPlan) -> None:
    q = law.p_fail * tilt.failure_factor
    if q > 1.0 + 1e-12:
        raise TracegenError(f"failure probability {law.p_fail:.4g} x {tilt.failure_factor:g} = {q:.4g} is above 1",
                            field="tilt.failure_factor", hint=f"use a factor <= {1.0 / law.p_fail:.4g}")
    if tilt.outage_length_factor != 1.0 and law.failure[1] <= 0 and law.p_fail > 0:
        raise TracegenError("the failure lengths have no spread, so their length cannot be tilted",
                            field="tilt.outage_length_factor")


def draw_events(model: Any, plan: HandoverPlan | None, tilt: TiltPlan, rng: np.random.Generator,
                duration_s: float) -> EventDraw:
    """Draw the handovers and standalone outages of one trace of ``duration_s`` (module docstring).

    Draw order (fixed, so the same Generator gives the same events): handover count, times, kinds,
    break lengths, post-event states; then outage count, times, lengths.
    """
    law = _law(model, plan)
    _check_law(law, tilt)  # also here: the sampler can be called without tracegen.synth.check_run
    detected_only = _detected_only(model, plan)
    plan = plan or HandoverPlan()
    llr = 0.0
    # handover times: Poisson (rate tilted) plus the explicit ones; the uniform times cancel in p/q
    lam = law.rate_per_s
    n_random = int(rng.poisson(lam * tilt.handover_rate_factor * duration_s)) if lam > 0 else 0
    llr += poisson_log_ratio(n_random, lam, tilt.handover_rate_factor, duration_s)
    fixed = np.asarray(plan.times_s, dtype=np.float64)
    times = np.sort(np.concatenate((rng.uniform(0.0, duration_s, n_random), fixed[fixed < duration_s])))
    n = times.size
    # kinds: failure / interruption / seamless, with the failure probability tilted (the other two keep
    # their ratio); a factor that pushes it past 1 was refused above
    p = np.array([law.p_fail, law.p_break, max(0.0, 1.0 - law.p_fail - law.p_break)])
    q = p.copy()
    if tilt.failure_factor != 1.0 and law.p_fail > 0:
        q[0] = law.p_fail * tilt.failure_factor
        rest = p[1:].sum()
        q[1:] = p[1:] / rest * (1.0 - q[0]) if rest > 0 else 0.0
    kind = np.searchsorted(np.cumsum(q)[:-1], rng.random(n), side="right")
    if n and tilt.failure_factor != 1.0:
        with np.errstate(divide="ignore"):
            llr += float(np.sum(np.log(p[kind]) - np.log(q[kind])))
    length = np.zeros(n)
    fail, brk = kind == 0, kind == 1
    mu_f, sd_f = law.failure
    scale = tilt.outage_length_factor
    if fail.any():
        x = rng.lognormal(mu_f + math.log(scale), sd_f, int(fail.sum()))
        length[fail] = x
        llr += float(np.sum(lognormal_log_ratio(x, mu_f, sd_f, scale)))
    if brk.any():
        length[brk] = _truncated_lognormal(rng, *law.interrupt, law.threshold_s, int(brk.sum()))
    switches: list[tuple[float, int]] = []
    if n and plan.new_level != "keep":
        use_post = plan.new_level == "model" and tilt.post_q is not None
        cum = np.cumsum(tilt.post_q if use_post else tilt.start_q)
        post = np.minimum(np.searchsorted(cum, rng.random(n) * cum[-1], side="right"), cum.size - 1)
        if not tilt.identity:
            llr += float((tilt.post_log_ratio if use_post else tilt.start_log_ratio)[post].sum())
        switches = [(float(t + d), int(s)) for t, d, s in zip(times, length, post)]
    marks = [(float(t), FAILURE if k == 0 else HANDOVER) for t, k in zip(times, kind)]
    broke = length > 0
    breaks = [np.stack([times[broke], times[broke] + length[broke]], axis=1)]
    resume = times + length
    peak_ms = length * 1000.0 if plan.rtt_spike_ms is None else np.full(n, plan.rtt_spike_ms)
    spiky = peak_ms > 0
    spikes = np.stack([resume[spiky], resume[spiky] + plan.rtt_spike_decay_s, peak_ms[spiky]], axis=1)
    bursts = np.zeros((0, 3))
    if plan.loss_burst_s > 0 and n:
        bursts = np.stack([resume, resume + plan.loss_burst_s, np.full(n, plan.loss_burst_loss)], axis=1)

    ev = None if detected_only else model.events
    if ev is not None and ev.outage_rate_per_hour > 0:
        outage_states = [i for i, s in enumerate(model.states) if s.kind == "outage"]
        if ev.outage_mu_log_s is not None or outage_states:
            lam_o = ev.outage_rate_per_hour / 3600.0
            n_o = int(rng.poisson(lam_o * tilt.outage_rate_factor * duration_s))
            llr += poisson_log_ratio(n_o, lam_o, tilt.outage_rate_factor, duration_s)
            t_o = rng.uniform(0.0, duration_s, n_o)
            if ev.outage_mu_log_s is not None:
                mu_o, sd_o = ev.outage_mu_log_s, ev.outage_sigma_log_s
                length_o = rng.lognormal(mu_o + math.log(scale), sd_o, n_o)
                llr += float(np.sum(lognormal_log_ratio(length_o, mu_o, sd_o, scale)))
            else:  # the outage state's dwell, scaled by the state's own dwell tilt
                k = outage_states[0]
                length_o = tilt.dwell_q[k].sample_s(rng, n_o)
                llr += float(np.sum(dwell_log_ratio(model.states[k].dwell, float(tilt.dwell_scale[k]), length_o)))
            marks += [(float(t), OUTAGE) for t in t_o]
            breaks.append(np.stack([t_o, t_o + length_o], axis=1))
    return EventDraw(marks=marks, breaks=np.concatenate(breaks) if breaks else np.zeros((0, 2)), spikes=spikes,
                     bursts=bursts, switches=switches, llr=llr)


__all__ = ["HandoverPlan", "EventDraw", "draw_events", "check_events", "check_event_counts", "MAX_EVENTS_PER_TRACE", "HANDOVER", "FAILURE", "OUTAGE", "NEW_LEVEL"]
