"""Autoregressive AR(p) models of the within-state residuals of log-bandwidth.

The residual of each state is zero-mean by construction, so the model has no constant:
x_t = phi_1 x_{t-1} + ... + phi_p x_{t-p} + e_t, e_t ~ N(0, sigma2).
Residuals arrive as *segments* (contiguous runs inside one state). Segments are never glued together:
each contributes only the rows whose lags lie inside it.

Conventions
-----------
* Default estimator: conditional least squares (``method="cls"``), the first ``hold_back_steps``
  values of every segment (default ``order``) serve only as lags.
* ``sigma2`` is the mean squared residual, ``ssr / n_eff`` with ``n_eff`` the number of regression
  rows (the conditional maximum-likelihood estimate; statsmodels ``AutoReg`` uses the same ssr/nobs).
* ``loglik`` is the conditional Gaussian log-likelihood of those rows; ``aic = -2 loglik + 2 (order + 1)``
  (sigma2 counts as a parameter, as in statsmodels ``AutoReg``).
* Fitted coefficients are made stationary by clipping the partial autocorrelations to
  +-``max_abs_pacf``; if that changes them, sigma2 and loglik are recomputed with the clipped ones.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from ..errors import TracegenError

METHODS = ("cls", "yule-walker")
DEFAULT_METHOD = "cls"
DEFAULT_MAX_ABS_PACF = 0.99
# select_ar considers order p only if at least this many rows per coefficient remain after the hold-back.
MIN_ROWS_PER_COEF = 10


# --------------------------------------------------------------------------------------------------
# Input checks and design matrices


def _as_segments(segments: Sequence[np.ndarray] | np.ndarray) -> list[np.ndarray]:
    """Validate a list of 1-D finite float arrays (a bare 1-D array counts as one segment)."""
    if isinstance(segments, np.ndarray) and segments.ndim == 1 and segments.dtype != object:
        segments = [segments]
    out = []
    for i, seg in enumerate(segments):
        x = np.asarray(seg, dtype=np.float64)
        if x.ndim != 1:
            raise TracegenError(f"residual segment {i} must be 1-D, got {x.ndim}-D", field="segments")
        bad = np.flatnonzero(~np.isfinite(x))
        if bad.size:
            raise TracegenError(
                f"residual segment {i} has {bad.size} non-finite value(s), first at index {bad[0]}",
                field="segments",
            )
        out.append(x)
    if not out:
        raise TracegenError("no residual segments given", field="segments")
    return out


def _lagged_rows(
    segments: list[np.ndarray], order: int, hold_back_steps: int
) -> tuple[np.ndarray, np.ndarray]:
    """Stack (y, X) over segments: y = x_t, X = (x_{t-1}, ..., x_{t-order}) for t >= hold_back_steps."""
    ys, xs = [], []
    for x in segments:
        if x.size <= hold_back_steps:
            continue
        w = sliding_window_view(x, order + 1)[hold_back_steps - order:]
        ys.append(w[:, -1])
        xs.append(w[:, -2::-1] if order else np.empty((w.shape[0], 0)))
    if not ys:
        return np.empty(0), np.empty((0, order))
    return np.concatenate(ys), np.concatenate(xs, axis=0)


def _check_order(order: int, hold_back_steps: int | None) -> tuple[int, int]:
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or order < 0:
        raise TracegenError(f"AR order must be an integer >= 0, got {order!r}", field="order")
    order = int(order)
    hold = order if hold_back_steps is None else hold_back_steps
    if isinstance(hold, bool) or not isinstance(hold, (int, np.integer)) or hold < order:
        raise TracegenError(
            f"hold-back must be an integer >= the order {order}, got {hold!r}", field="hold_back_steps"
        )
    return order, int(hold)


def _segment_summary(segments: list[np.ndarray]) -> str:
    lengths = sorted((s.size for s in segments), reverse=True)
    shown = ", ".join(str(n) for n in lengths[:5]) + (", ..." if len(lengths) > 5 else "")
    return f"{len(lengths)} segment(s), longest {shown}"


# --------------------------------------------------------------------------------------------------
# Partial autocorrelations (Levinson-Durbin step-up / step-down)


def pacf_to_ar(pacf: Sequence[float]) -> np.ndarray:
    """AR coefficients from partial autocorrelations (Levinson-Durbin step-up).

    phi_{k,j} = phi_{k-1,j} - pacf_k phi_{k-1,k-j}, phi_{k,k} = pacf_k. All |pacf| < 1 gives a stationary AR.
    """
    r = np.asarray(pacf, dtype=np.float64).ravel()
    phi = np.empty(0)
    for k in range(r.size):
        phi = np.concatenate([phi - r[k] * phi[::-1], [r[k]]])
    return phi


def _step_down(coefs: np.ndarray, clip: float | None) -> np.ndarray:
    """Partial autocorrelations from AR coefficients (Levinson-Durbin step-down).

    With ``clip``, each stage's pacf is clipped to +-clip *before* it is used to reduce the order, so the
    recursion never divides by ~0; a stationary input whose pacf are within +-clip is unaffected.
    """
    phi = np.asarray(coefs, dtype=np.float64).ravel().copy()
    p = phi.size
    pacf = np.empty(p)
    for k in range(p, 0, -1):
        a = phi[k - 1]
        if clip is not None:
            a = 0.0 if np.isnan(a) else float(np.clip(a, -clip, clip))
        pacf[k - 1] = a
        head = phi[: k - 1]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            phi = (head + a * head[::-1]) / (1.0 - a * a)
    return pacf


def ar_to_pacf(coefs: Sequence[float]) -> np.ndarray:
    """Partial autocorrelations of a stationary AR (step-down); non-stationary coefficients raise."""
    phi = np.asarray(coefs, dtype=np.float64).ravel()
    if not np.all(np.isfinite(phi)):
        raise TracegenError(f"AR coefficients must be finite, got {phi.tolist()}", field="coefs")
    pacf = _step_down(phi, None)
    if not np.all(np.abs(pacf) < 1.0):  # also catches NaN from a stage with |pacf| = 1
        raise TracegenError(f"AR coefficients {phi.tolist()} are not stationary", field="coefs")
    return pacf


def is_stationary(coefs: Sequence[float]) -> bool:
    """True when all roots of 1 - sum phi_k z^k lie outside the unit circle (Schur-Cohn via step-down)."""
    try:
        ar_to_pacf(coefs)
    except TracegenError:
        return False
    return True


def make_stationary(coefs: Sequence[float], max_abs_pacf: float = DEFAULT_MAX_ABS_PACF) -> np.ndarray:
    """Clip the partial autocorrelations to +-max_abs_pacf and rebuild the coefficients.

    A stationary input with all |pacf| <= max_abs_pacf comes back unchanged (to rounding); any finite
    input comes back stationary.
    """
    if not (0.0 < max_abs_pacf < 1.0):
        raise TracegenError(f"max_abs_pacf must be in (0, 1), got {max_abs_pacf}", field="max_abs_pacf")
    phi = np.asarray(coefs, dtype=np.float64).ravel()
    if not np.all(np.isfinite(phi)):
        raise TracegenError(f"AR coefficients must be finite, got {phi.tolist()}", field="coefs")
    if phi.size == 0:
        return phi.copy()
    if is_stationary(phi) and np.all(np.abs(ar_to_pacf(phi)) <= max_abs_pacf):
        return phi.copy()
    return pacf_to_ar(_step_down(phi, max_abs_pacf))


# --------------------------------------------------------------------------------------------------
# Result


def _finite_float(d: dict, key: str) -> float:
    if key not in d:
        raise TracegenError(f"AR fit is missing '{key}'", field=key)
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise TracegenError(f"must be a finite number, got {v!r}", field=key)
    return float(v)


def _nonneg_int(d: dict, key: str) -> int:
    if key not in d:
        raise TracegenError(f"AR fit is missing '{key}'", field=key)
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, int) or v < 0:
        raise TracegenError(f"must be an integer >= 0, got {v!r}", field=key)
    return v


@dataclass(frozen=True)
class ARFit:
    """A fitted zero-mean AR(order) model of residuals; sigma2 is the innovation variance."""

    order: int
    coefs: tuple[float, ...]
    sigma2: float
    n_eff: int
    loglik: float
    aic: float
    stationarity_adjusted: bool
    method: str = DEFAULT_METHOD

    @property
    def stationary_variance(self) -> float:
        """Variance of the stationary process: sigma2 / prod(1 - pacf_k^2)."""
        pacf = ar_to_pacf(self.coefs)
        return float(self.sigma2 / np.prod(1.0 - pacf * pacf))

    def to_dict(self) -> dict[str, Any]:
        return {
            "order": int(self.order),
            "coefs": [float(c) for c in self.coefs],
            "sigma2": float(self.sigma2),
            "n_eff": int(self.n_eff),
            "loglik": float(self.loglik),
            "aic": float(self.aic),
            "stationarity_adjusted": bool(self.stationarity_adjusted),
            "method": self.method,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "ARFit":
        if not isinstance(d, dict):
            raise TracegenError(f"AR fit must be a mapping, got {type(d).__name__}")
        order = _nonneg_int(d, "order")
        coefs = d.get("coefs")
        if not isinstance(coefs, (list, tuple)):
            raise TracegenError(f"must be a list of numbers, got {coefs!r}", field="coefs")
        if len(coefs) != order:
            raise TracegenError(f"needs {order} coefficients for order {order}, got {len(coefs)}",
                                field="coefs")
        for c in coefs:
            if isinstance(c, bool) or not isinstance(c, (int, float)) or not math.isfinite(c):
                raise TracegenError(f"coefficients must be finite numbers, got {c!r}", field="coefs")
        if not is_stationary(coefs):
            raise TracegenError(f"coefficients {list(coefs)} are not stationary", field="coefs")
        sigma2 = _finite_float(d, "sigma2")
        if sigma2 <= 0:
            raise TracegenError(f"must be > 0, got {sigma2}", field="sigma2")
        adjusted = d.get("stationarity_adjusted")
        if not isinstance(adjusted, bool):
            raise TracegenError(f"must be true or false, got {adjusted!r}", field="stationarity_adjusted")
        method = d.get("method", DEFAULT_METHOD)
        if method not in METHODS:
            raise TracegenError(f"unknown method {method!r}; known: {', '.join(METHODS)}", field="method")
        return cls(
            order=order,
            coefs=tuple(float(c) for c in coefs),
            sigma2=sigma2,
            n_eff=_nonneg_int(d, "n_eff"),
            loglik=_finite_float(d, "loglik"),
            aic=_finite_float(d, "aic"),
            stationarity_adjusted=adjusted,
            method=method,
        )


# --------------------------------------------------------------------------------------------------
# Fitting


def _gauss_loglik(ssr: float, n: int, sigma2: float) -> float:
    return float(-0.5 * n * math.log(2.0 * math.pi * sigma2) - 0.5 * ssr / sigma2)


def _pooled_autocov(segments: list[np.ndarray], order: int) -> np.ndarray:
    """Biased autocovariances gamma_0..gamma_order pooled over segments (no demeaning): sum of lag
    products within segments divided by the total number of values."""
    total = sum(s.size for s in segments)
    r = np.zeros(order + 1)
    for x in segments:
        n = x.size
        if n == 0:
            continue
        full = np.correlate(x, x, mode="full")[n - 1:]  # full[k] = sum_t x_t x_{t+k}
        m = min(order + 1, n)
        r[:m] += full[:m]
    return r / total


def _levinson_durbin(r: np.ndarray) -> tuple[np.ndarray, float]:
    """Solve the Yule-Walker equations by Levinson-Durbin: (phi, innovation variance)."""
    order = r.size - 1
    phi = np.empty(0)
    v = float(r[0])
    for k in range(1, order + 1):
        a = (r[k] - phi @ r[1:k][::-1]) / v
        phi = np.concatenate([phi - a * phi[::-1], [a]])
        v *= 1.0 - a * a
    return phi, v


def fit_ar(
    segments: Sequence[np.ndarray],
    order: int,
    method: str = DEFAULT_METHOD,
    *,
    hold_back_steps: int | None = None,
    max_abs_pacf: float = DEFAULT_MAX_ABS_PACF,
) -> ARFit:
    """Fit a zero-mean AR(order) to residual segments (a list of 1-D arrays; one bare array is one segment).

    ``method="cls"``: conditional least squares on the rows of all segments longer than the hold-back.
    ``method="yule-walker"``: biased autocovariances pooled over those same segments, Levinson-Durbin;
    sigma2 is then the Yule-Walker innovation variance. Either way loglik is the conditional likelihood
    of the rows after the hold-back (default ``order``), and the coefficients are made stationary.
    """
    segs = _as_segments(segments)
    order, hold = _check_order(order, hold_back_steps)
    if method not in METHODS:
        raise TracegenError(f"unknown AR method {method!r}; known: {', '.join(METHODS)}", field="method")
    y, X = _lagged_rows(segs, order, hold)
    need = order + 1
    if y.size < need:
        raise TracegenError(
            f"AR({order}) needs {need} samples after the hold-back of {hold}, got {y.size} "
            f"({_segment_summary(segs)})",
            field="segments",
        )
    if method == "cls":
        if order:
            coefs, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
            if rank < order:
                raise TracegenError(
                    f"AR({order}) lag matrix has rank {rank} < {order} (residuals too regular)",
                    field="segments",
                )
        else:
            coefs = np.empty(0)
        resid = y - X @ coefs
        sigma2 = float(resid @ resid) / y.size
    else:
        usable = [s for s in segs if s.size > hold]
        r = _pooled_autocov(usable, order)
        if r[0] <= 0:
            raise TracegenError("residuals are all zero; the AR variance would be 0", field="segments")
        coefs, sigma2 = _levinson_durbin(r)

    adjusted = False
    if order:
        fixed = make_stationary(coefs, max_abs_pacf)
        adjusted = not np.array_equal(fixed, coefs)
        coefs = fixed
        if adjusted and method == "cls":
            resid = y - X @ coefs
            sigma2 = float(resid @ resid) / y.size
        elif adjusted:  # Yule-Walker: innovation variance of the clipped model, gamma_0 prod(1 - pacf^2)
            pacf = ar_to_pacf(coefs)
            sigma2 = float(r[0] * np.prod(1.0 - pacf * pacf))
    if not sigma2 > 0:
        raise TracegenError(
            f"AR({order}) residual variance is {sigma2:g}; the residuals are fitted exactly", field="segments"
        )
    resid = y - X @ coefs
    loglik = _gauss_loglik(float(resid @ resid), y.size, sigma2)
    return ARFit(
        order=order,
        coefs=tuple(float(c) for c in coefs),
        sigma2=float(sigma2),
        n_eff=int(y.size),
        loglik=loglik,
        aic=-2.0 * loglik + 2.0 * (order + 1),
        stationarity_adjusted=bool(adjusted),
        method=method,
    )


def ar_loglik(segments: Sequence[np.ndarray], fit: ARFit, *, hold_back_steps: int | None = None) -> float:
    """Conditional Gaussian log-likelihood of the segments under ``fit``.

    The first ``hold_back_steps`` (default ``fit.order``) values of each segment are conditioned on;
    segments no longer than that contribute nothing.
    """
    segs = _as_segments(segments)
    order, hold = _check_order(fit.order, hold_back_steps)
    y, X = _lagged_rows(segs, order, hold)
    if y.size == 0:
        raise TracegenError(
            f"needs at least 1 sample after the hold-back of {hold}, got 0 ({_segment_summary(segs)})",
            field="segments",
        )
    resid = y - X @ np.asarray(fit.coefs, dtype=np.float64)
    return _gauss_loglik(float(resid @ resid), y.size, fit.sigma2)


def with_stationary_variance(fit: ARFit, segments: Sequence[np.ndarray]) -> ARFit:
    """``fit`` with sigma2 rescaled so that its stationary variance is the mean square of *all* the
    segments' values (loglik and aic recomputed).

    Least squares only sees the rows after each segment's hold-back, so a state whose short visits are
    its wild ones (a deep-fade state entered for a second or two) gets the variance of its long, calm
    visits; a sampler restarting every visit from that variance makes the short visits too calm.
    Matching the second moment over every sample keeps the coefficients and gives each visit the
    state's own spread (a method-of-moments step, as Yule–Walker's gamma_0)."""
    segs = _as_segments(segments)
    total = sum(s.size for s in segs)
    if total == 0:
        return fit
    target = float(sum(float(s @ s) for s in segs)) / total
    if not target > 0:
        return fit
    sigma2 = fit.sigma2 * target / fit.stationary_variance
    rescaled = ARFit(fit.order, fit.coefs, sigma2, fit.n_eff, fit.loglik, fit.aic, fit.stationarity_adjusted,
                     fit.method)
    try:
        ll = ar_loglik(segs, rescaled)
    except TracegenError:  # no row after the hold-back: the likelihood stays the one of the fit
        return rescaled
    return ARFit(fit.order, fit.coefs, sigma2, fit.n_eff, ll, -2.0 * ll + 2.0 * (fit.order + 1),
                 fit.stationarity_adjusted, fit.method)


def _usable_rows(segments: list[np.ndarray], hold: int) -> int:
    return int(sum(max(s.size - hold, 0) for s in segments))


def select_ar(
    segments: Sequence[np.ndarray],
    max_order: int = 5,
    method: str = DEFAULT_METHOD,
    *,
    max_abs_pacf: float = DEFAULT_MAX_ABS_PACF,
) -> tuple[ARFit, list[dict[str, Any]]]:
    """Choose the AR order 0..max_order by AIC and return (fit, table).

    Every candidate is fitted on the same rows: the first ``max_order`` values of every segment are
    held back (as statsmodels ``ar_select_order`` does). ``max_order`` is first lowered until at least
    ``MIN_ROWS_PER_COEF * max_order`` rows remain after holding it back; with too little data even for
    order 1 the result is order 0. Table rows: {order, aic, sigma2, n}, on the common sample. The
    returned fit is the chosen order refitted with its own hold-back (so it uses more rows, and its
    aic is not the table's).
    """
    segs = _as_segments(segments)
    if isinstance(max_order, bool) or not isinstance(max_order, (int, np.integer)) or max_order < 0:
        raise TracegenError(f"max_order must be an integer >= 0, got {max_order!r}", field="max_order")
    top = int(max_order)
    while top > 0 and _usable_rows(segs, top) < MIN_ROWS_PER_COEF * top:
        top -= 1
    if _usable_rows(segs, top) < 1:
        raise TracegenError(f"needs at least 1 residual sample, got 0 ({_segment_summary(segs)})",
                            field="segments")
    table: list[dict[str, Any]] = []
    best: tuple[float, int] | None = None
    for p in range(top + 1):
        try:
            f = fit_ar(segs, p, method, hold_back_steps=top, max_abs_pacf=max_abs_pacf)
        except TracegenError:
            if p == 0:
                raise
            continue  # e.g. a rank-deficient lag matrix: this order is not a candidate
        table.append({"order": p, "aic": f.aic, "sigma2": f.sigma2, "n": f.n_eff})
        if best is None or f.aic < best[0]:
            best = (f.aic, p)
    assert best is not None
    return fit_ar(segs, best[1], method, max_abs_pacf=max_abs_pacf), table
