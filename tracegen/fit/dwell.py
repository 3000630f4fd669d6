"""Sojourn-time (dwell) distributions for the states of the semi-Markov level model.

Durations are whole numbers of steps k >= 1 of a known step ``step_s``. Families:

* ``"geometric"`` on k = 1, 2, ...: P(k) = (1 - p)^(k-1) p, params {p}; mean_s = step_s / p.
* ``"lognormal"``: log of the duration in seconds ~ N(mu, sigma^2), params {mu, sigma}.
* ``"gamma"``: duration in seconds ~ Gamma(shape, scale_s), params {shape, scale_s}.

The continuous families are *discretised*: a continuous duration X seconds is observed as
k = ceil(X / step_s) steps, so P(k) = F(k step_s) - F((k - 1) step_s), and every family's likelihood is
a probability of the same integers, hence comparable by AIC. A duration flagged ``censored`` (a segment
cut by a trace's start or end) contributes its survival P(D >= k) instead of P(D = k).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
from scipy import optimize, special

from ..errors import TracegenError

FAMILIES = ("geometric", "lognormal", "gamma")
PARAM_NAMES = {"geometric": ("p",), "lognormal": ("mu", "sigma"), "gamma": ("shape", "scale_s")}
# Fewer durations than this: only the one-parameter geometric is fitted.
MIN_FOR_TWO_PARAMS = 5
_LOG_FLOOR = -745.0  # ~log of the smallest positive double: keeps the likelihood finite


# --------------------------------------------------------------------------------------------------
# Discretised log-probabilities


def _check_params(family: str, params: Mapping[str, Any]) -> dict[str, float]:
    """Validate a family's parameters; TracegenError names the bad field."""
    if family not in FAMILIES:
        raise TracegenError(f"unknown dwell family {family!r}; known: {', '.join(FAMILIES)}", field="family")
    if not isinstance(params, Mapping):
        raise TracegenError(f"must be a mapping, got {type(params).__name__}", field="params")
    want = PARAM_NAMES[family]
    if set(params) != set(want):
        raise TracegenError(f"{family} needs parameters {list(want)}, got {sorted(params)}", field="params")
    out = {}
    for name in want:
        v = params[name]
        if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)) or not math.isfinite(v):
            raise TracegenError(f"must be a finite number, got {v!r}", field=f"params.{name}")
        out[name] = float(v)
    if family == "geometric" and not (0.0 < out["p"] <= 1.0):
        raise TracegenError(f"must be in (0, 1], got {out['p']}", field="params.p")
    if family == "lognormal" and out["sigma"] <= 0:
        raise TracegenError(f"must be > 0, got {out['sigma']}", field="params.sigma")
    if family == "gamma":
        for name in want:
            if out[name] <= 0:
                raise TracegenError(f"must be > 0, got {out[name]}", field=f"params.{name}")
    return out


def _check_step(step_s: float) -> float:
    if isinstance(step_s, bool) or not isinstance(step_s, (int, float, np.floating, np.integer)) \
            or not math.isfinite(step_s) or step_s <= 0:
        raise TracegenError(f"step must be a finite number of seconds > 0, got {step_s!r}", field="step_s")
    return float(step_s)


class _Dist:
    """log cdf / log sf / median of a lognormal or gamma from scipy.special directly: the same functions
    scipy.stats uses, without building a frozen distribution on every likelihood evaluation."""

    def __init__(self, family: str, params: Mapping[str, float]):
        self.family = family
        if family == "lognormal":
            self.mu, self.sigma = params["mu"], params["sigma"]
        else:
            self.shape, self.scale = params["shape"], params["scale_s"]

    def _z(self, x: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return (np.log(x) - self.mu) / self.sigma

    def logcdf(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        with np.errstate(divide="ignore"):
            if self.family == "lognormal":
                return np.where(x > 0, special.log_ndtr(self._z(np.maximum(x, 1e-300))), -np.inf)
            return np.log(special.gammainc(self.shape, np.maximum(x, 0.0) / self.scale))

    def logsf(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, dtype=np.float64)
        with np.errstate(divide="ignore"):
            if self.family == "lognormal":
                return np.where(x > 0, special.log_ndtr(-self._z(np.maximum(x, 1e-300))), 0.0)
            return np.log(special.gammaincc(self.shape, np.maximum(x, 0.0) / self.scale))

    def median(self) -> float:
        if self.family == "lognormal":
            return math.exp(self.mu)
        return float(self.scale * special.gammaincinv(self.shape, 0.5))


def _frozen(family: str, params: Mapping[str, float]) -> _Dist:
    return _Dist(family, params)


def _log_interval(dist, lo_s: np.ndarray, hi_s: np.ndarray) -> np.ndarray:
    """log(F(hi) - F(lo)) without cancellation: from the cdf side below the median, the sf side above."""
    upper = lo_s >= dist.median()
    with np.errstate(divide="ignore", invalid="ignore"):
        a_lo, a_hi = np.where(upper, dist.logsf(hi_s), dist.logcdf(lo_s)), np.where(
            upper, dist.logsf(lo_s), dist.logcdf(hi_s))
        # log(e^{a_hi} - e^{a_lo}) with a_hi >= a_lo
        out = a_hi + np.log1p(-np.exp(a_lo - a_hi))
    out = np.where(np.isnan(out), -np.inf, out)
    return np.maximum(out, _LOG_FLOOR)


def discrete_logpmf(family: str, params: Mapping[str, float], k_steps: np.ndarray, step_s: float) -> np.ndarray:
    """log P(D = k) of the discretised family at integer steps (-inf for k < 1)."""
    params = _check_params(family, params)
    step_s = _check_step(step_s)
    k = np.asarray(k_steps, dtype=np.float64)
    ok = k >= 1
    kk = np.where(ok, k, 1.0)
    if family == "geometric":
        p = params["p"]
        out = special.xlog1py(kk - 1.0, -p) + math.log(p)
    else:
        out = _log_interval(_frozen(family, params), (kk - 1.0) * step_s, kk * step_s)
    return np.where(ok, out, -np.inf)


def discrete_logsf(family: str, params: Mapping[str, float], k_steps: np.ndarray, step_s: float) -> np.ndarray:
    """log P(D >= k) of the discretised family (0 for k <= 1): the likelihood of a censored duration."""
    params = _check_params(family, params)
    step_s = _check_step(step_s)
    k = np.maximum(np.asarray(k_steps, dtype=np.float64), 1.0)
    if family == "geometric":
        return special.xlog1py(k - 1.0, -params["p"])
    out = _frozen(family, params).logsf((k - 1.0) * step_s)
    return np.maximum(np.where(k <= 1, 0.0, out), _LOG_FLOOR)


def family_mean_s(family: str, params: Mapping[str, float], step_s: float) -> float:
    """Mean duration in seconds: step_s / p (geometric), exp(mu + sigma^2/2), shape * scale_s.

    For the continuous families this is the mean of the continuous X, about half a step below the
    mean of the observed k * step_s (k = ceil(X / step_s)).
    """
    params = _check_params(family, params)
    if family == "geometric":
        return _check_step(step_s) / params["p"]
    if family == "lognormal":
        return math.exp(params["mu"] + 0.5 * params["sigma"] ** 2)
    return params["shape"] * params["scale_s"]


# --------------------------------------------------------------------------------------------------
# Maximum likelihood


def _loglik(family: str, params: Mapping[str, float], k: np.ndarray, cens: np.ndarray, w: np.ndarray,
            step_s: float) -> float:
    """Weighted log-likelihood over unique (k, censored) pairs with counts w."""
    total = float(np.sum(w[~cens] * discrete_logpmf(family, params, k[~cens], step_s)))
    if cens.any():
        total += float(np.sum(w[cens] * discrete_logsf(family, params, k[cens], step_s)))
    return total


def _fit_geometric(k, cens, w) -> dict[str, float]:
    # d/dp [n_complete log p + sum (k - 1) log(1 - p)] = 0  ->  p = n_complete / (n_complete + sum (k - 1))
    n_complete = float(np.sum(w[~cens]))
    extra = float(np.sum(w * (k - 1.0)))
    return {"p": n_complete / (n_complete + extra)}


def _fit_continuous(family: str, k, cens, w, step_s: float) -> dict[str, float]:
    """ML of a discretised lognormal/gamma over log-parameters, started from moment estimates of the
    interval midpoints (k - 1/2) step_s."""
    mid = (k - 0.5) * step_s
    total = float(np.sum(w))
    kmax_s = float(np.max(k)) * step_s
    if family == "lognormal":
        lm = np.log(mid)
        mu0 = float(np.sum(w * lm) / total)
        var0 = float(np.sum(w * (lm - mu0) ** 2) / total)
        sigma0 = max(math.sqrt(var0), 0.05)
        x0 = np.array([mu0, math.log(sigma0)])
        bounds = [(math.log(step_s) - 12.0, math.log(kmax_s) + 12.0), (math.log(1e-3), math.log(20.0))]

        def unpack(t):
            return {"mu": float(t[0]), "sigma": float(math.exp(t[1]))}
    else:
        m = float(np.sum(w * mid) / total)
        v = max(float(np.sum(w * (mid - m) ** 2) / total), step_s**2 / 12.0)
        x0 = np.array([math.log(m * m / v), math.log(v / m)])
        bounds = [(math.log(1e-3), math.log(1e4)), (math.log(step_s) - 12.0, math.log(kmax_s) + 12.0)]

        def unpack(t):
            return {"shape": float(math.exp(t[0])), "scale_s": float(math.exp(t[1]))}

    x0 = np.clip(x0, [b[0] for b in bounds], [b[1] for b in bounds])

    def nll(t):
        val = -_loglik(family, unpack(t), k, cens, w, step_s)
        return val if math.isfinite(val) else 1e300

    res = optimize.minimize(nll, x0, method="Nelder-Mead", bounds=bounds,
                            options={"xatol": 1e-7, "fatol": 1e-9, "maxiter": 4000})
    return unpack(res.x)


@dataclass(frozen=True)
class DwellFit:
    """A fitted discretised dwell distribution; ``table`` lists every family tried."""

    family: str
    params: dict[str, float]
    step_s: float
    mean_s: float
    n: int
    loglik: float
    table: tuple[dict[str, Any], ...] = field(default=())
    n_censored: int = 0

    def logpmf(self, k_steps: np.ndarray) -> np.ndarray:
        """log P(D = k) at integer steps (discretised)."""
        return discrete_logpmf(self.family, self.params, k_steps, self.step_s)

    def logsf(self, k_steps: np.ndarray) -> np.ndarray:
        """log P(D >= k) at integer steps (the likelihood of a censored duration)."""
        return discrete_logsf(self.family, self.params, k_steps, self.step_s)

    def sample_s(self, rng: np.random.Generator, size: int | tuple[int, ...] | None = None) -> np.ndarray:
        """Durations in seconds: k * step_s for geometric; continuous draws for lognormal/gamma,
        clipped below at one step (draws under step_s become step_s)."""
        if self.family == "geometric":
            return rng.geometric(self.params["p"], size) * self.step_s
        if self.family == "lognormal":
            x = rng.lognormal(self.params["mu"], self.params["sigma"], size)
        else:
            x = rng.gamma(self.params["shape"], self.params["scale_s"], size)
        return np.maximum(x, self.step_s)

    def sample_residual_s(self, rng: np.random.Generator, size: int | tuple[int, ...] | None = None) -> np.ndarray:
        """Draws of the time left in a dwell seen at a random moment (the equilibrium forward-recurrence
        time, density S(x) / mean): R = U x D*, D* the length-biased dwell (density x f(x) / mean) and
        U uniform. Length-biased laws in closed form: lognormal(mu + sigma^2, sigma), gamma(shape + 1,
        scale); a geometric dwell is memoryless, so its residual is the same geometric."""
        if self.family == "geometric":
            return rng.geometric(self.params["p"], size) * self.step_s
        if self.family == "lognormal":
            biased = rng.lognormal(self.params["mu"] + self.params["sigma"] ** 2, self.params["sigma"], size)
        else:
            biased = rng.gamma(self.params["shape"] + 1.0, self.params["scale_s"], size)
        return np.maximum(rng.random(size) * biased, np.finfo(float).tiny)

    def log_sf_s(self, x_s: np.ndarray) -> np.ndarray:
        """log P(X > x) of the continuous family at seconds ``x_s`` (geometric: P(K >= x / step_s))."""
        x = np.asarray(x_s, dtype=np.float64)
        if self.family == "geometric":
            return special.xlog1py(np.maximum(np.round(x / self.step_s), 1.0) - 1.0, -self.params["p"])
        return _frozen(self.family, self.params).logsf(x)

    def sample_steps(self, rng: np.random.Generator, size: int | tuple[int, ...] | None = None) -> np.ndarray:
        """Durations in whole steps, distributed exactly as ``logpmf`` (k = ceil(X / step_s), >= 1)."""
        x = self.sample_s(rng, size)
        return np.maximum(np.ceil(x / self.step_s - 1e-9), 1).astype(np.int64)

    def to_dict(self) -> dict[str, Any]:
        return {
            "family": self.family,
            "params": {k: float(v) for k, v in self.params.items()},
            "step_s": float(self.step_s),
            "mean_s": float(self.mean_s),
            "n": int(self.n),
            "n_censored": int(self.n_censored),
            "loglik": float(self.loglik),
            "table": [{"family": r["family"], "params": {k: float(v) for k, v in r["params"].items()},
                       "loglik": float(r["loglik"]), "aic": float(r["aic"]), "mean_s": float(r["mean_s"])}
                      for r in self.table],
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "DwellFit":
        if not isinstance(d, Mapping):
            raise TracegenError(f"dwell fit must be a mapping, got {type(d).__name__}")
        for key in ("family", "params", "step_s", "mean_s", "n", "loglik"):
            if key not in d:
                raise TracegenError(f"dwell fit is missing '{key}'", field=key)
        family = d["family"]
        if family not in FAMILIES:
            raise TracegenError(f"unknown dwell family {family!r}; known: {', '.join(FAMILIES)}", field="family")
        params = _check_params(family, d["params"])
        step_s = _check_step(d["step_s"])
        mean_s = d["mean_s"]
        expect = family_mean_s(family, params, step_s)
        if isinstance(mean_s, bool) or not isinstance(mean_s, (int, float)) or not math.isfinite(mean_s) \
                or not math.isclose(mean_s, expect, rel_tol=1e-9):
            raise TracegenError(f"must equal the mean of the {family} parameters, {expect!r}, got {mean_s!r}",
                                field="mean_s")
        counts = {}
        for key in ("n", "n_censored"):
            v = d.get(key, 0)
            if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                raise TracegenError(f"must be an integer >= 0, got {v!r}", field=key)
            counts[key] = v
        if counts["n"] < 1 or counts["n_censored"] > counts["n"]:
            raise TracegenError(f"needs 1 <= n and n_censored <= n, got n={counts['n']}, "
                                f"n_censored={counts['n_censored']}", field="n")
        loglik = d["loglik"]
        if isinstance(loglik, bool) or not isinstance(loglik, (int, float)) or not math.isfinite(loglik) \
                or loglik > 0:
            raise TracegenError(f"must be a finite number <= 0, got {loglik!r}", field="loglik")
        table = d.get("table", [])
        if not isinstance(table, (list, tuple)):
            raise TracegenError(f"must be a list, got {type(table).__name__}", field="table")
        rows = []
        for i, r in enumerate(table):
            if not isinstance(r, Mapping) or r.get("family") not in FAMILIES:
                raise TracegenError(f"row {i} must name a known family", field="table")
            vals = {}
            for key in ("loglik", "aic", "mean_s"):
                v = r.get(key)
                if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                    raise TracegenError(f"row {i} '{key}' must be a finite number, got {v!r}", field="table")
                vals[key] = float(v)
            rows.append({"family": r["family"], "params": _check_params(r["family"], r.get("params", {})), **vals})
        return cls(family, params, step_s, float(mean_s), counts["n"], float(loglik), tuple(rows),
                   counts["n_censored"])


def fit_dwell(
    durations_steps: Sequence[int] | np.ndarray,
    step_s: float,
    censored: Sequence[bool] | np.ndarray | None = None,
    families: Sequence[str] = FAMILIES,
) -> DwellFit:
    """Fit each family by maximum likelihood of the discretised distribution and keep the lowest AIC
    (2 x parameters - 2 loglik; geometric has 1 parameter, the others 2; ties go to the earlier family).

    ``censored[i]`` marks a duration cut by a trace edge: it contributes P(D >= k). With fewer than
    ``MIN_FOR_TWO_PARAMS`` (5) durations only the geometric is fitted, whatever ``families`` says.
    At least one duration must be complete (uncensored).
    """
    step_s = _check_step(step_s)
    raw = np.asarray(durations_steps)
    if raw.ndim != 1:
        raise TracegenError(f"durations must be a 1-D array, got {raw.ndim}-D", field="durations_steps")
    if raw.size < 1:
        raise TracegenError("needs at least 1 duration, got 0", field="durations_steps")
    k = raw.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(k) | (k < 1) | (k != np.round(k)))
    if bad.size:
        raise TracegenError(f"durations must be whole numbers of steps >= 1; {bad.size} are not, first "
                            f"{k[bad[0]]:g} at index {bad[0]}", field="durations_steps")
    if censored is None:
        cens = np.zeros(k.size, dtype=bool)
    else:
        cens = np.asarray(censored)
        if cens.shape != k.shape or cens.dtype != bool:
            raise TracegenError(f"censored must be a boolean array of {k.size} flags, got "
                                f"{cens.dtype} of shape {cens.shape}", field="censored")
    if cens.all():
        raise TracegenError(f"needs at least 1 complete (uncensored) duration, got 0 of {k.size}",
                            field="censored")
    unknown = [f for f in families if f not in FAMILIES]
    if unknown or not families:
        raise TracegenError(f"unknown dwell families {unknown}; known: {', '.join(FAMILIES)}", field="families")
    wanted = ("geometric",) if k.size < MIN_FOR_TWO_PARAMS else tuple(dict.fromkeys(families))

    # the likelihood only needs the distinct (k, censored) pairs and their counts
    pairs, w = np.unique(np.stack([k, cens.astype(np.float64)], axis=1), axis=0, return_counts=True)
    uk, uc, w = pairs[:, 0], pairs[:, 1] > 0.5, w.astype(np.float64)

    table = []
    for fam in wanted:
        params = _fit_geometric(uk, uc, w) if fam == "geometric" else _fit_continuous(fam, uk, uc, w, step_s)
        ll = _loglik(fam, params, uk, uc, w, step_s)
        table.append({"family": fam, "params": params, "loglik": ll,
                      "aic": 2.0 * len(PARAM_NAMES[fam]) - 2.0 * ll,
                      "mean_s": family_mean_s(fam, params, step_s)})
    best = min(table, key=lambda r: r["aic"])
    return DwellFit(best["family"], dict(best["params"]), step_s, best["mean_s"], int(k.size), best["loglik"],
                    tuple(table), int(cens.sum()))
