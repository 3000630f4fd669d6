"""Coverage holes: how much more often the link drops out where the slow level is low.

Measured outages cluster: a recording in a poorly served area has many, and inside one recording they
bunch in the minutes where the level is low. A jump matrix alone spreads them evenly over every trace
and every minute. So the rate of outage entries is tied to the slow part s(t) = u + drift (slow.py):

    rate(t) = rate_0 exp(slope s(t)),

fitted as a Poisson regression with log link (McCullagh & Nelder, *Generalized Linear Models*, 2nd ed.,
ch. 6) of the outage entries of each slow block on the block's smoothed slow level, with the block's
level samples as exposure (an entry is an outage sample right after a level sample: a jump into the
outage state). Regressing on the smoothed level E[s | data] rather than s itself changes only the
intercept for a Gaussian s (E[exp(b s) | data] = exp(b E[s | data] + b^2 Var[s | data] / 2)), so the
slope is the one the sampler needs. The slope is kept when it pays for itself by BIC (one parameter).

The sampler (synth/sampler.py) weights the outage column of each jump row by w(s(t)) and renormalises
the row, with w chosen so that the chain's outage-entry rate at slow level s is c exp(slope s), and c so
that the long-run rate is that of the fitted chain (:func:`rate_weight_map`): the slope moves outages to
the low minutes, it does not add any.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize

from .prepare import LEVEL, OUTAGE, Prepared

MIN_ENTRIES = 10          # fewer outage entries in all: no slope
MAX_ABS_SLOPE = 5.0       # per unit of log bandwidth; beyond it the fit has found a handful of blocks
_HERMITE = np.polynomial.hermite_e.hermegauss(24)   # nodes and weights for E[f(Z)], Z ~ N(0, 1)
_LOG_W_SPAN, _W_NODES, _S_NODES = 12.0, 961, 1025   # log w in [-12, 12] every 0.025; s every ~0.01-0.03


def block_entries(prep: Prepared, slow_values: list[np.ndarray], block_s: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per tumbling block with level samples: outage entries, level samples (exposure), mean slow level."""
    per = max(1, int(round(block_s / prep.step_s)))
    counts, exposure, level = [], [], []
    for kind, s in zip(prep.kinds, slow_values):
        n = kind.size // per
        if n == 0:
            continue
        k = kind[: n * per]
        entry = np.zeros(k.size, dtype=bool)
        entry[1:] = (k[1:] == OUTAGE) & (k[:-1] == LEVEL)
        counts.append(entry.reshape(n, per).sum(axis=1))
        exposure.append((k == LEVEL).reshape(n, per).sum(axis=1))
        level.append(s[: n * per].reshape(n, per).mean(axis=1))
    if not counts:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    c, e, x = (np.concatenate(v).astype(float) for v in (counts, exposure, level))
    ok = e > 0
    return c[ok], e[ok], x[ok]


def poisson_slope(counts: np.ndarray, exposure: np.ndarray, x: np.ndarray) -> tuple[float, float, float, float]:
    """Maximum-likelihood Poisson regression log E[count] = log exposure + a + b x, by a trust-region
    Newton method (scipy's trust-exact) on the concave log-likelihood. Returns (a, b, loglik, loglik of
    the intercept-only model); the log-likelihoods leave out the log(count!) terms, the same for both."""
    c, e, x = (np.asarray(v, dtype=float) for v in (counts, exposure, x))
    a0 = math.log(c.sum() / e.sum())
    ll0 = float(np.sum(c * (a0 + np.log(e))) - c.sum())

    def negll(theta: np.ndarray) -> float:
        eta = theta[0] + theta[1] * x + np.log(e)
        return float(np.sum(np.exp(eta)) - np.sum(c * eta))

    def grad(theta: np.ndarray) -> np.ndarray:
        r = np.exp(theta[0] + theta[1] * x) * e - c
        return np.array([r.sum(), np.dot(r, x)])

    def hess(theta: np.ndarray) -> np.ndarray:
        mu = np.exp(theta[0] + theta[1] * x) * e
        return np.array([[mu.sum(), np.dot(mu, x)], [np.dot(mu, x), np.dot(mu, x * x)]])

    res = optimize.minimize(negll, np.array([a0, 0.0]), jac=grad, hess=hess, method="trust-exact",
                            options={"gtol": 1e-10})
    return float(res.x[0]), float(res.x[1]), -float(res.fun), ll0


def fit_outage_slope(prep: Prepared, slow_values: list[np.ndarray], block_s: float) -> float:
    """The slope of log outage-entry rate on the slow level (module docstring); 0 when there are fewer
    than MIN_ENTRIES entries, when the level does not vary, or when the slope does not beat none by BIC."""
    c, e, x = block_entries(prep, slow_values, block_s)
    if c.sum() < MIN_ENTRIES or x.size < 3 or np.ptp(x) <= 0:
        return 0.0
    _, b, ll, ll0 = poisson_slope(c, e, x)
    if not math.isfinite(b) or 2.0 * (ll - ll0) <= math.log(x.size):
        return 0.0
    return float(np.clip(b, -MAX_ABS_SLOPE, MAX_ABS_SLOPE))


def weighted_jumps(jumps: np.ndarray, outage: int, w: np.ndarray) -> np.ndarray:
    """Jump matrices (len(w), n, n) with the outage column of every row weighted by w, rows renormalised."""
    p = np.asarray(jumps, dtype=float)
    w = np.asarray(w, dtype=float)[:, None, None]
    col = np.zeros(p.shape[1])
    col[outage] = 1.0
    scaled = p[None, :, :] * np.where(col[None, None, :] > 0, w, 1.0)
    return scaled / scaled.sum(axis=2, keepdims=True)


def outage_entry_rate(jumps: np.ndarray, outage: int, mean_dwell_s: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Outage entries per second of the semi-Markov chain whose outage column is weighted by each w
    (held fixed): sum_k f_k P_ko / sum_k f_k d_k, f the embedded chain's stationary law, d the mean dwells."""
    pw = weighted_jumps(jumps, outage, w)
    n = pw.shape[1]
    a = np.transpose(pw, (0, 2, 1)) - np.eye(n)[None]
    a[:, -1, :] = 1.0                     # f (P - I) = 0 with sum f = 1 in place of the last equation
    rhs = np.zeros((pw.shape[0], n, 1))
    rhs[:, -1, 0] = 1.0
    f = np.linalg.solve(a, rhs)[:, :, 0]
    return (f * pw[:, :, outage]).sum(axis=1) / (f @ np.asarray(mean_dwell_s, dtype=float))


def rate_weight_map(slope: float, offsets: np.ndarray, weights: np.ndarray, spread_var: float, jumps: np.ndarray,
                    outage: int, mean_dwell_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The weight w(s) of the outage column that makes the chain's outage-entry rate c exp(slope s), as a
    table (s nodes, log w at them) to interpolate; c keeps the long-run rate of the unweighted chain, s
    drawn from a mixture of N(offset_a, spread_var) by ``weights`` (the sampler's law of u + drift).

    Weighting the column by exp(slope s) itself would not do: a row renormalised after the weighting
    saturates for states that already jump to the outage often, so the chain's rate would follow a flatter
    slope than the one fitted (by 10-35 % on field models). The drift is slow beside the dwells, so the
    rate at a given s is that of the chain with w held at its value (:func:`outage_entry_rate`); that rate
    grows with w, and the curve is inverted numerically. Rates beyond what any weight reaches are clipped
    to the curve's ends. Empty tables when the slope is 0 or the chain never enters the outage."""
    base = float(outage_entry_rate(jumps, outage, mean_dwell_s, np.ones(1))[0])
    if slope == 0.0 or not (base > 0.0):
        return np.zeros(0), np.zeros(0)
    log_w = np.linspace(-_LOG_W_SPAN, _LOG_W_SPAN, _W_NODES)
    log_r = np.log(np.maximum(outage_entry_rate(jumps, outage, mean_dwell_s, np.exp(log_w)), 1e-300))
    log_r = np.maximum.accumulate(log_r)          # monotone against rounding at the flat ends
    z_nodes, z_w = _HERMITE
    z_w = z_w / z_w.sum()
    sd = math.sqrt(max(spread_var, 0.0))
    s_law = (np.asarray(offsets, dtype=float)[:, None] + sd * z_nodes[None, :]).ravel()
    w_law = (np.asarray(weights, dtype=float)[:, None] * z_w[None, :]).ravel()

    def reachable(log_rate: np.ndarray) -> np.ndarray:
        return np.clip(log_rate, log_r[0], log_r[-1])

    g = slope * s_law

    def excess(log_c: float) -> float:
        return math.log(float(w_law @ np.exp(reachable(log_c + g)))) - math.log(base)

    log_c = optimize.brentq(excess, math.log(base) - float(g.max()) - 60.0, math.log(base) - float(g.min()) + 60.0,
                            xtol=1e-12)
    lo, hi = float(np.min(offsets)) - 8.0 * sd - 1.0, float(np.max(offsets)) + 8.0 * sd + 1.0
    s_nodes = np.linspace(lo, hi, _S_NODES)
    return s_nodes, np.interp(reachable(log_c + slope * s_nodes), log_r, log_w)


__all__ = ["fit_outage_slope", "poisson_slope", "block_entries", "rate_weight_map", "outage_entry_rate",
           "weighted_jumps", "MIN_ENTRIES"]
