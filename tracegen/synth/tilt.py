"""Rare-condition tilt: sample from a changed law q and weight each trace by its likelihood ratio p/q.

Importance sampling: for any statistic f of a trace, E_p[f] = E_q[f p/q]. The sampler draws from q and
adds log p/q of every tilted choice to ``SampledTrace.log_likelihood_ratio``; ``exp`` of it is the
trace's importance weight. Only choices whose probability under both laws is known exactly are tilted:

* ``state_weights[k]`` multiplies the probability of choosing state k, renormalised over the choice:
  the jump out of state i picks j with q_ij = p_ij w_j / sum_k p_ik w_k, and the same weights tilt the
  first state (drawn from the state shares) and the state after a handover (``post_state_probs``).
  Each choice adds log(p / q) = log(sum_k p_k w_k) - log(w_chosen).
* ``low_state_weight`` is a shortcut for state weights that favour the worst conditions: it multiplies
  the weight of the outage state (if the model has one) and of the ``low_states`` lowest level states.
* ``dwell_scale[k]`` multiplies the time scale of state k's dwell family (a single number applies to
  the outage state): lognormal mu + log c, gamma scale_s * c, geometric p / c, so the mean dwell is c
  times as long. Draws are clipped below at the fit's step as in ``DwellFit.sample_s``; the ratio is of
  densities above the clip and of the clip masses at it (``dwell_log_ratio``).
* ``handover_rate_factor`` / ``outage_rate_factor`` multiply the Poisson rates of handovers and of
  standalone outages; a count n over T seconds adds n log(lam / lam') + (lam' - lam) T (the event
  times, uniform given the count, cancel).
* ``failure_factor`` multiplies the probability that a handover fails (the other outcomes keep their
  ratio); a factor that would put it above 1 is refused. Each handover adds log(p_kind / q_kind).
* ``outage_length_factor`` multiplies the median of the log-normal lengths of handover failures and
  standalone outages (mu + log c); each length x adds the log ratio of the two log-normal densities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Sequence

import numpy as np
from scipy import special

from ..errors import TracegenError
from ..fit.dwell import DwellFit


def _positive(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(value) or value <= 0:
        raise TracegenError(f"must be a finite number > 0, got {value!r}", field=where)
    return float(value)


def _positive_tuple(values: Any, where: str) -> tuple[float, ...]:
    if isinstance(values, (str, bytes)) or not isinstance(values, (Sequence, np.ndarray)) or len(values) == 0:
        raise TracegenError(f"must be a non-empty list of numbers, got {values!r}", field=where)
    return tuple(_positive(v, f"{where}[{i}]") for i, v in enumerate(values))


@dataclass(frozen=True)
class Tilt:
    """A change of law toward rare conditions (module docstring); all factors 1 is no tilt.

    ``state_weights``: one multiplier per model state (None: all 1). ``dwell_scale``: one factor per
    state, or a single factor for the outage state. ``handover_rate_factor``, ``outage_rate_factor``:
    Poisson rate multipliers.
    """

    state_weights: tuple[float, ...] | None = None
    low_state_weight: float = 1.0
    low_states: int = 1
    dwell_scale: float | tuple[float, ...] = 1.0
    handover_rate_factor: float = 1.0
    outage_rate_factor: float = 1.0
    failure_factor: float = 1.0
    outage_length_factor: float = 1.0

    def __post_init__(self) -> None:
        if self.state_weights is not None:
            object.__setattr__(self, "state_weights", _positive_tuple(self.state_weights, "tilt.state_weights"))
        if isinstance(self.dwell_scale, (Sequence, np.ndarray)) and not isinstance(self.dwell_scale, (str, bytes)):
            object.__setattr__(self, "dwell_scale", _positive_tuple(self.dwell_scale, "tilt.dwell_scale"))
        else:
            object.__setattr__(self, "dwell_scale", _positive(self.dwell_scale, "tilt.dwell_scale"))
        if isinstance(self.low_states, bool) or not isinstance(self.low_states, (int, np.integer)) \
                or self.low_states < 1:
            raise TracegenError(f"must be a whole number >= 1, got {self.low_states!r}", field="tilt.low_states")
        for name in ("low_state_weight", "handover_rate_factor", "outage_rate_factor", "failure_factor",
                     "outage_length_factor"):
            object.__setattr__(self, name, _positive(getattr(self, name), f"tilt.{name}"))

    def resolve(self, model: Any) -> "TiltPlan":
        """Check the tilt against ``model`` and precompute the tilted probabilities and their log ratios."""
        return TiltPlan.build(model, self)


def tilted_choice(p: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(q, log p/q) of categorical rows ``p`` (last axis) tilted by ``weights``; log ratio 0 where p is 0."""
    p = np.asarray(p, dtype=np.float64)
    raw = p * weights
    total = raw.sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(total > 0, raw / total, 0.0)
        log_ratio = np.where(p > 0, np.log(np.where(total > 0, total, 1.0)) - np.log(weights), 0.0)
    return q, np.broadcast_to(log_ratio, p.shape).copy()


def scaled_dwell(fit: DwellFit, scale: float, where: str = "tilt.dwell_scale") -> DwellFit:
    """``fit`` with its time scale multiplied by ``scale`` (mean_s times scale); TracegenError if p/scale > 1."""
    if scale == 1.0:
        return fit
    params = dict(fit.params)
    if fit.family == "lognormal":
        params["mu"] += math.log(scale)
    elif fit.family == "gamma":
        params["scale_s"] *= scale
    else:
        p = params["p"] / scale
        if not 0.0 < p <= 1.0:
            raise TracegenError(f"scaling the geometric dwell (p={params['p']:.6g}) by {scale:g} gives "
                                f"p={p:.6g}, outside (0, 1]", field=where, hint="use a factor >= p")
        params["p"] = p
    return replace(fit, params=params, mean_s=fit.mean_s * scale, table=())


def dwell_log_ratio(fit: DwellFit, scale: float, x_s: np.ndarray) -> np.ndarray:
    """log p(x)/q(x) of dwell draws ``x_s`` (seconds) from ``scaled_dwell(fit, scale)``, p being ``fit``.

    Continuous families: ratio of densities above the clip at ``fit.step_s``, ratio of the clip masses
    P(X <= step_s) at it. Geometric (x = k step_s): ratio of the probabilities of k.
    """
    x = np.asarray(x_s, dtype=np.float64)
    if scale == 1.0:
        return np.zeros(x.shape)
    q = scaled_dwell(fit, scale)
    step = fit.step_s
    if fit.family == "geometric":
        k = np.maximum(np.round(x / step), 1.0)
        p0, p1 = fit.params["p"], q.params["p"]
        with np.errstate(divide="ignore", invalid="ignore"):
            out = special.xlog1py(k - 1.0, -p0) - special.xlog1py(k - 1.0, -p1) + math.log(p0) - math.log(p1)
        return out
    clipped = x <= step
    with np.errstate(divide="ignore"):
        lx = np.log(np.maximum(x, step))
    if fit.family == "lognormal":
        mu0, mu1, sig = fit.params["mu"], q.params["mu"], fit.params["sigma"]
        dens = ((lx - mu1) ** 2 - (lx - mu0) ** 2) / (2.0 * sig * sig)
        ls = math.log(step)
        mass = float(special.log_ndtr((ls - mu0) / sig) - special.log_ndtr((ls - mu1) / sig))
    else:
        k, th0, th1 = fit.params["shape"], fit.params["scale_s"], q.params["scale_s"]
        xx = np.maximum(x, step)
        dens = k * math.log(th1 / th0) - xx * (1.0 / th0 - 1.0 / th1)
        mass = float(np.log(special.gammainc(k, step / th0)) - np.log(special.gammainc(k, step / th1)))
    return np.where(clipped, mass, dens)


def residual_log_ratio(fit: DwellFit, scale: float, x_s: np.ndarray) -> np.ndarray:
    """log p(x)/q(x) of equilibrium residual dwells x (``DwellFit.sample_residual_s``) when q's time
    scale is ``scale`` times p's: the residual density is S(x) / mean, so the ratio is
    log(scale) + log S_p(x) - log S_p(x / scale) (geometric: the residual is the dwell law itself)."""
    x = np.asarray(x_s, dtype=np.float64)
    if scale == 1.0:
        return np.zeros(x.shape)
    if fit.family == "geometric":
        return dwell_log_ratio(fit, scale, x)
    return math.log(scale) + fit.log_sf_s(x) - fit.log_sf_s(x / scale)


def poisson_log_ratio(count: int, rate_per_s: float, factor: float, duration_s: float) -> float:
    """log p/q of a Poisson count over ``duration_s`` at rate ``rate_per_s`` (p) vs rate * factor (q)."""
    if factor == 1.0 or rate_per_s <= 0:
        return 0.0
    return float(-count * math.log(factor) + rate_per_s * (factor - 1.0) * duration_s)


def lognormal_log_ratio(x: np.ndarray, mu: float, sigma: float, factor: float) -> np.ndarray:
    """log p(x)/q(x) of log-normal draws x: p has log-median mu, q has mu + log(factor), both sd sigma."""
    x = np.asarray(x, dtype=np.float64)
    if factor == 1.0:
        return np.zeros(x.shape)
    lx = np.log(x)
    mu_q = mu + math.log(factor)
    if sigma <= 0:
        raise TracegenError("cannot tilt a log-normal with zero spread", field="tilt.outage_length_factor")
    return ((lx - mu_q) ** 2 - (lx - mu) ** 2) / (2.0 * sigma * sigma)


def normalised_weights(log_lr: np.ndarray) -> np.ndarray:
    """Self-normalised importance weights exp(l_i) / sum_j exp(l_j), stable for any scale (logsumexp)."""
    a = np.asarray(log_lr, dtype=np.float64).reshape(-1)
    if a.size == 0:
        raise TracegenError("needs at least one log likelihood ratio, got 0", field="log_lr")
    if np.isnan(a).any() or np.isposinf(a).any():
        bad = int(np.flatnonzero(np.isnan(a) | np.isposinf(a))[0])
        raise TracegenError(f"log likelihood ratio {a[bad]} at index {bad} is not usable", field="log_lr")
    if np.isneginf(a).all():
        raise TracegenError(f"all {a.size} log likelihood ratios are -inf (every weight is 0)", field="log_lr")
    return np.exp(a - special.logsumexp(a))


def effective_sample_size(log_lr: np.ndarray) -> float:
    """Kish's effective sample size of the weights, (sum w)^2 / sum w^2 = 1 / sum of squared normalised weights."""
    w = normalised_weights(log_lr)
    return float(1.0 / np.sum(w * w))


@dataclass(frozen=True)
class TiltPlan:
    """A Tilt checked against one model: tilted probabilities (q) and log p/q per choice (internal)."""

    identity: bool
    start_q: np.ndarray            # (n,) first state, from the shares
    start_log_ratio: np.ndarray
    jump_q: np.ndarray             # (n, n) rows of the jump matrix
    jump_log_ratio: np.ndarray
    post_q: np.ndarray | None      # (n,) state after a handover, from post_state_probs
    post_log_ratio: np.ndarray | None
    dwell_scale: np.ndarray        # (n,) factor per state
    dwell_q: tuple[DwellFit, ...]  # the dwell fits actually sampled
    handover_rate_factor: float
    outage_rate_factor: float
    failure_factor: float = 1.0
    outage_length_factor: float = 1.0

    @classmethod
    def build(cls, model: Any, tilt: Tilt | None) -> "TiltPlan":
        n = model.n_states
        tilt = tilt or Tilt()
        w = np.ones(n) if tilt.state_weights is None else np.asarray(tilt.state_weights, dtype=np.float64)
        if w.shape != (n,):
            raise TracegenError(f"needs {n} weights (one per model state), got {w.size}", field="tilt.state_weights")
        if tilt.low_state_weight != 1.0:
            levels = [i for i, s in enumerate(model.states) if s.kind == "level"]
            if tilt.low_states > len(levels):
                raise TracegenError(f"the model has {len(levels)} level states, not {tilt.low_states}",
                                    field="tilt.low_states")
            low = [i for i, s in enumerate(model.states) if s.kind == "outage"] + levels[: tilt.low_states]
            w = w.copy()
            w[low] *= tilt.low_state_weight
        if isinstance(tilt.dwell_scale, tuple):
            scale = np.asarray(tilt.dwell_scale, dtype=np.float64)
            if scale.shape != (n,):
                raise TracegenError(f"needs {n} factors (one per model state) or one number, got {scale.size}",
                                    field="tilt.dwell_scale")
        else:
            scale = np.ones(n)
            if tilt.dwell_scale != 1.0:
                outage = [i for i, s in enumerate(model.states) if s.kind == "outage"]
                if not outage:
                    raise TracegenError(f"a single factor {tilt.dwell_scale:g} applies to the outage state, "
                                        "and this model has none", field="tilt.dwell_scale",
                                        hint="give one factor per state")
                scale[outage] = tilt.dwell_scale
        dwell_q = tuple(scaled_dwell(s.dwell, float(c), f"tilt.dwell_scale[{i}]")
                        for i, (s, c) in enumerate(zip(model.states, scale)))
        shares = np.array([s.share for s in model.states], dtype=np.float64)
        shares = shares / shares.sum()
        start_q, start_lr = tilted_choice(shares, w)
        jump_q, jump_lr = tilted_choice(np.array(model.jumps, dtype=np.float64), w)
        post_q = post_lr = None
        ev = model.events
        if ev is not None and ev.post_state_probs is not None:
            post = np.asarray(ev.post_state_probs, dtype=np.float64)
            if post.shape != (n,):
                raise TracegenError(f"has {post.size} probabilities for a model of {n} states",
                                    field="events.post_state_probs")
            post_q, post_lr = tilted_choice(post, w)
        identity = bool(np.all(w == 1.0) and np.all(scale == 1.0) and tilt.handover_rate_factor == 1.0
                        and tilt.outage_rate_factor == 1.0 and tilt.failure_factor == 1.0
                        and tilt.outage_length_factor == 1.0)
        return cls(identity, start_q, start_lr, jump_q, jump_lr, post_q, post_lr, scale, dwell_q,
                   tilt.handover_rate_factor, tilt.outage_rate_factor, tilt.failure_factor,
                   tilt.outage_length_factor)


__all__ = ["Tilt", "TiltPlan", "normalised_weights", "lognormal_log_ratio", "residual_log_ratio", "effective_sample_size", "dwell_log_ratio",
           "poisson_log_ratio", "scaled_dwell", "tilted_choice"]
