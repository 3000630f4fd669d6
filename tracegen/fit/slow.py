"""The slow part of log-bandwidth: a per-trace offset plus an Ornstein–Uhlenbeck drift over minutes.

Field traces differ from each other in their typical level (a ferry crossing is not a subway ride) and
wander over minutes inside one trace (a bus leaving the centre). A hidden-state model on one-second
samples mixes through its states in about a minute, so on its own it makes traces that all look alike
and stay flat beyond a few minutes. The slow part is added in log space:

    log bw(t) = fast(t) + u + s(t),   u ~ N(0, between_var) per trace,
    s           stationary OU, variance drift_var, correlation exp(-|dt| / drift_time_s),

and ``fast`` is the level model fitted to the data with the slow part taken out. A synthetic trace
draws its offset u from the fitted traces' own offsets (their conditional means given the data), each
trace weighted by its level samples (its hours), plus Gaussian jitter of their mean conditional variance:
a smoothed bootstrap of the random effect. So the corpus's mix of quiet and busy, fast and slow
recordings is kept in proportion to its hours, not flattened into one normal law.

"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Mapping

import numpy as np
from scipy import optimize
from scipy.signal import lfilter

from ..errors import TracegenError
from .prepare import LEVEL, Prepared, level_log_bandwidth

DEFAULT_BLOCK_S = 60.0
MIN_BLOCKS = 12          # fewer block means in all: no slow part is fitted
_MIN_VAR = 1e-8


@dataclass(frozen=True)
class SlowFit:
    """The fitted slow part (see the module docstring); variances are of log bit/s."""

    block_s: float
    mean_log: float          # m: the grand mean of the block means
    between_var: float       # variance of the per-trace offset u
    drift_var: float         # point variance of the OU drift s(t)
    drift_time_s: float      # its correlation time T
    noise_var: float         # block-to-block noise of the fast part (fitted alongside, not sampled)
    loglik: float            # of the block means
    loglik_without: float    # the same with between_var = drift_var = 0
    n_blocks: int
    n_traces: int
    offsets: tuple[float, ...] = ()          # per fitted trace: E[u | its block means]
    offset_weights: tuple[float, ...] = ()   # its share of the level samples
    offset_jitter_var: float = 0.0           # mean Var[u | block means]
    outage_slope: float = 0.0                # log outage-entry rate per unit of u + s(t) (holes.py)

    def pick(self, rng: np.random.Generator) -> int:
        """The fitted trace a synthetic trace takes its offset from (by weight)."""
        at = int(np.searchsorted(np.cumsum(self.offset_weights), rng.random() * math.fsum(self.offset_weights),
                                 side="right"))
        return min(at, len(self.offsets) - 1)

    def to_dict(self) -> dict[str, Any]:
        return {"block_s": self.block_s, "mean_log": self.mean_log, "between_var": self.between_var,
                "offsets": list(self.offsets), "offset_weights": list(self.offset_weights),
                "offset_jitter_var": self.offset_jitter_var, "drift_var": self.drift_var,
                "drift_time_s": self.drift_time_s, "noise_var": self.noise_var,
                "loglik": self.loglik, "loglik_without": self.loglik_without, "n_blocks": self.n_blocks,
                "n_traces": self.n_traces, "outage_slope": self.outage_slope}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "slow") -> "SlowFit":
        if not isinstance(d, Mapping):
            raise TracegenError("must be an object", field=where)
        vals = {}
        for name in ("block_s", "mean_log", "between_var", "drift_var", "drift_time_s", "noise_var", "loglik",
                     "loglik_without", "n_blocks", "n_traces"):
            v = d.get(name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise TracegenError(f"must be a finite number, got {v!r}", field=f"{where}.{name}")
            vals[name] = v
        for name in ("between_var", "drift_var", "noise_var"):
            if vals[name] < 0:
                raise TracegenError(f"must be >= 0, got {vals[name]}", field=f"{where}.{name}")
        for name in ("block_s", "drift_time_s"):
            if vals[name] <= 0:
                raise TracegenError(f"must be positive, got {vals[name]}", field=f"{where}.{name}")
        offsets, weights = d.get("offsets", []), d.get("offset_weights", [])
        if not (isinstance(offsets, list) and isinstance(weights, list) and len(offsets) == len(weights) >= 1):
            raise TracegenError("must be two lists of the same non-zero length", field=f"{where}.offsets")
        for name, values in (("offsets", offsets), ("offset_weights", weights)):
            if any(isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) for v in values):
                raise TracegenError("must hold finite numbers", field=f"{where}.{name}")
        if min(weights) < 0 or not math.isclose(sum(weights), 1.0, abs_tol=1e-9):
            raise TracegenError("must be shares that sum to 1", field=f"{where}.offset_weights")
        jitter = d.get("offset_jitter_var")
        if isinstance(jitter, bool) or not isinstance(jitter, (int, float)) or not math.isfinite(jitter) or jitter < 0:
            raise TracegenError(f"must be a number >= 0, got {jitter!r}", field=f"{where}.offset_jitter_var")
        slope = d.get("outage_slope", 0.0)   # absent in schema-2 files: no coupling
        if isinstance(slope, bool) or not isinstance(slope, (int, float)) or not math.isfinite(slope):
            raise TracegenError(f"must be a finite number, got {slope!r}", field=f"{where}.outage_slope")
        return cls(float(vals["block_s"]), float(vals["mean_log"]), float(vals["between_var"]),
                   float(vals["drift_var"]), float(vals["drift_time_s"]), float(vals["noise_var"]),
                   float(vals["loglik"]), float(vals["loglik_without"]), int(vals["n_blocks"]), int(vals["n_traces"]),
                   tuple(float(v) for v in offsets), tuple(float(v) for v in weights), float(jitter), float(slope))

    def sample(self, rng: np.random.Generator, n: int, step_s: float, atom: int) -> np.ndarray:
        """u + s(t) at ``n`` samples ``step_s`` apart for one trace (stationary from its first sample), u
        around fitted trace ``atom``'s offset (see :meth:`pick`)."""
        z = rng.standard_normal(n + 1)
        phi = math.exp(-step_s / self.drift_time_s)
        sd = math.sqrt(self.drift_var)
        e = z[1:] * (sd * math.sqrt(1.0 - phi * phi))
        s0 = z[0] * sd   # a stationary draw before the first sample: s_0 = phi s0 + e_0 is stationary too
        s = lfilter([1.0], [1.0, -phi], e, zi=[phi * s0])[0]
        u = self.offsets[atom] + rng.standard_normal() * math.sqrt(self.offset_jitter_var)
        return s + u


# --------------------------------------------------------------------------------------------------
# block means


@dataclass(frozen=True)
class _Blocks:
    """Per trace: index of each valid block on the trace's block grid, and its mean log-bandwidth."""

    index: tuple[np.ndarray, ...]
    mean: tuple[np.ndarray, ...]


def block_means(prep: Prepared, block_s: float) -> _Blocks:
    """Tumbling-block means of level log-bandwidth; a block counts when half or more of it is level."""
    per = max(1, int(round(block_s / prep.step_s)))
    idx, means = [], []
    for x in level_log_bandwidth(prep):
        n = x.size // per
        if n == 0:
            idx.append(np.zeros(0, np.int64))
            means.append(np.zeros(0))
            continue
        blk = x[: n * per].reshape(n, per)
        known = np.isfinite(blk)
        count = known.sum(axis=1)
        ok = count * 2 >= per
        total = np.where(known, blk, 0.0).sum(axis=1)
        idx.append(np.flatnonzero(ok))
        means.append(total[ok] / count[ok])
    return _Blocks(tuple(idx), tuple(means))


# --------------------------------------------------------------------------------------------------
# likelihood


def ou_block_cov(lags: np.ndarray, drift_var: float, drift_time_s: float, block_s: float) -> np.ndarray:
    """Covariance of the averages of a stationary OU over two blocks of ``block_s`` that are ``lags``
    blocks apart (exact; see the module docstring)."""
    r = block_s / drift_time_s
    lags = np.abs(np.asarray(lags))
    at0 = 2.0 * (math.expm1(-r) + r) / (r * r)
    beyond = (-math.expm1(-r)) ** 2 / (r * r) * np.exp(-(np.maximum(lags, 1) - 1) * r)
    return drift_var * np.where(lags == 0, at0, beyond)


def _groups(blocks: _Blocks) -> list[tuple[np.ndarray, np.ndarray]]:
    """Traces with the same block pattern stacked: [(pattern, means (traces, blocks))]."""
    by: dict[bytes, list[np.ndarray]] = {}
    pat: dict[bytes, np.ndarray] = {}
    for ix, y in zip(blocks.index, blocks.mean):
        if ix.size == 0:
            continue
        key = ix.tobytes()
        by.setdefault(key, []).append(y)
        pat[key] = ix
    return [(pat[k], np.array(v)) for k, v in by.items()]


def _loglik(groups: list[tuple[np.ndarray, np.ndarray]], m: float, between: float, drift: float, time_s: float,
            noise: float, block_s: float) -> float:
    total = 0.0
    for ix, y in groups:
        lag = ix[:, None] - ix[None, :]
        c = between + ou_block_cov(lag, drift, time_s, block_s) + noise * np.eye(ix.size)
        try:
            chol = np.linalg.cholesky(c)
        except np.linalg.LinAlgError:
            return -np.inf
        r = np.linalg.solve(chol, (y - m).T)               # (blocks, traces)
        total += -0.5 * float(np.sum(r * r)) - y.shape[0] * (float(np.sum(np.log(np.diag(chol))))
                                                             + 0.5 * ix.size * math.log(2 * math.pi))
    return total


def _unpack(theta: np.ndarray, block_s: float) -> tuple[float, float, float, float, float]:
    """Parameters from the unconstrained vector: variances by exp, the correlation time as
    block_s (1 + exp(.)): a drift must be slower than one block, faster change is the level states' job."""
    m, lb, ld, lt, ln = np.clip(theta, -700, 700)
    return float(m), math.exp(lb), math.exp(ld), block_s * (1.0 + math.exp(lt)), math.exp(ln)


def fit_slow(prep: Prepared, block_s: float = DEFAULT_BLOCK_S) -> SlowFit | None:
    """The slow part of the traces' log-bandwidth by maximum likelihood; None when the data is too
    short for it (fewer than MIN_BLOCKS block means) or when it does not beat "none" by BIC."""
    if not (math.isfinite(block_s) and block_s > 0):
        raise TracegenError(f"must be a positive number of seconds, got {block_s!r}", field="slow_block_s")
    if block_s < 2 * prep.step_s:
        raise TracegenError(f"must be at least two steps ({2 * prep.step_s:g} s), got {block_s:g}",
                            field="slow_block_s")
    blocks = block_means(prep, block_s)
    groups = _groups(blocks)
    y_all = np.concatenate(blocks.mean) if blocks.mean else np.zeros(0)
    n_blocks = int(y_all.size)
    n_traces = sum(1 for y in blocks.mean if y.size)
    if n_blocks < MIN_BLOCKS:
        return None
    m0, v0 = float(np.mean(y_all)), max(float(np.var(y_all)), _MIN_VAR)

    def nll(theta: np.ndarray) -> float:
        ll = _loglik(groups, *_unpack(theta, block_s), block_s)
        return -ll if math.isfinite(ll) else 1e300

    starts = [np.array([m0, math.log(v0 / 3), math.log(v0 / 3), math.log(t - 1), math.log(v0 / 3)])
              for t in (5, 20)]   # correlation times of 5 and 20 blocks
    best = None
    for x0 in starts:  # two starting correlation times: the likelihood can have a shoulder
        res = optimize.minimize(nll, x0, method="Nelder-Mead",
                                options={"xatol": 1e-4, "fatol": 1e-6, "maxiter": 4000, "maxfev": 8000})
        if best is None or res.fun < best.fun:
            best = res
    m, between, drift, time_s, noise = _unpack(best.x, block_s)
    ll = -float(best.fun)
    # "none": iid block means around m (noise only), m and noise at their closed-form optimum
    ll0 = float(np.sum(-0.5 * np.log(2 * math.pi * v0) - 0.5 * (y_all - m0) ** 2 / v0))
    if -2 * (ll - ll0) + 3 * math.log(n_blocks) >= 0:  # three more parameters must pay for themselves
        return None
    offsets, weights, cond_var = _offsets(prep, blocks, m, between, drift, time_s, noise, block_s)
    return SlowFit(float(block_s), m, between, drift, time_s, noise, ll, ll0, n_blocks, n_traces,
                   offsets, weights, cond_var)


def _offsets(prep: Prepared, blocks: _Blocks, m: float, between: float, drift: float, time_s: float, noise: float,
             block_s: float) -> tuple[tuple[float, ...], tuple[float, ...], float]:
    """Per trace with a block: E[u | y] = between 1' C^-1 (y - m) and Var[u | y] = between - between^2
    1' C^-1 1 (Gaussian conditioning); weights are the traces' shares of level samples."""
    off, var, w = [], [], []
    for kind, ix, y in zip(prep.kinds, blocks.index, blocks.mean):
        if ix.size == 0:
            continue
        lag = ix[:, None] - ix[None, :]
        c = between + ou_block_cov(lag, drift, time_s, block_s) + noise * np.eye(ix.size)
        solved = np.linalg.solve(c, np.column_stack((y - m, np.ones(ix.size))))
        off.append(between * float(solved[:, 0].sum()))
        var.append(max(between - between * between * float(solved[:, 1].sum()), 0.0))
        w.append(float(np.sum(kind == LEVEL)))
    weights = np.asarray(w) / np.sum(w)
    return tuple(off), tuple(float(x) for x in weights), float(np.dot(weights, var))


# --------------------------------------------------------------------------------------------------
# taking the slow part out


def smoothed(prep: Prepared, slow: SlowFit) -> list[np.ndarray]:
    """Per trace, the conditional mean of u + s(t) given its block means, at every sample (linear between
    block centres, flat beyond the first and last); zeros for a trace without a block."""
    blocks = block_means(prep, slow.block_s)
    per = max(1, int(round(slow.block_s / prep.step_s)))
    out = []
    for kind, ix, y in zip(prep.kinds, blocks.index, blocks.mean):
        if ix.size == 0:
            out.append(np.zeros(kind.size))
            continue
        lag = ix[:, None] - ix[None, :]
        signal = slow.between_var + ou_block_cov(lag, slow.drift_var, slow.drift_time_s, slow.block_s)
        est = signal @ np.linalg.solve(signal + slow.noise_var * np.eye(ix.size), y - slow.mean_log)
        centre = (ix + 0.5) * per - 0.5
        out.append(np.interp(np.arange(kind.size), centre, est))
    return out


def remove_slow(prep: Prepared, slow: SlowFit, values: list[np.ndarray] | None = None) -> Prepared:
    """``prep`` with the smoothed slow part (``values``, else :func:`smoothed`) taken out of the level
    samples' log-bandwidth."""
    parts = []
    for i, s in enumerate(smoothed(prep, slow) if values is None else values):
        for a, b in prep.run_index[i]:
            parts.append(s[a:b])
    shift = np.concatenate(parts) if parts else np.zeros(0)
    features = prep.features.copy()
    features[:, 0] -= shift
    return replace(prep, features=features)


__all__ = ["SlowFit", "fit_slow", "remove_slow", "smoothed", "block_means", "ou_block_cov", "DEFAULT_BLOCK_S"]
