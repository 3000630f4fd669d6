"""How many independent windows a corpus is worth: the autocorrelation-aware effective sample size.

Consecutive windows of one trace are alike, so n windows carry the information of fewer independent
ones. For a stationary series the variance of the sample mean is about ``var / n * tau`` with the
integrated autocorrelation time ``tau = 1 + 2 * sum_{k>=1} rho_k``, so the effective size is ``n / tau``
(Sokal, "Monte Carlo methods in statistical mechanics", 1997; Geyer, "Practical Markov chain Monte
Carlo", Statistical Science 1992).

Here every trace's windows form one series, laid on a grid of window positions (a dropped window is a
gap, so no pair straddles it). The autocovariance at lag k pools the products of all pairs k positions
apart in the same trace, around the corpus mean, divided by the number of windows (the usual biased
estimator). Centring on the corpus mean, not each trace's, makes a trace's own level count as
correlation between its windows, which it is. ``tau`` is read with Geyer's initial monotone sequence
estimator: sums of adjacent pairs ``rho_2m + rho_2m+1`` are added while positive, each capped by the one
before. The effective size is capped at n (a negatively correlated series would otherwise claim more
windows than it has).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft


@dataclass(frozen=True)
class EffectiveSize:
    """``windows`` observed (finite values), integrated autocorrelation time ``tau`` in windows,
    ``effective`` = windows / tau (capped at windows), and the largest lag read."""

    windows: int
    tau: float
    effective: float
    max_lag: int

    def to_data(self) -> dict[str, float | int]:
        return {"windows": self.windows, "tau_windows": round(self.tau, 6), "effective": round(self.effective, 3),
                "max_lag": self.max_lag}


def window_grid(values: np.ndarray, trace: np.ndarray, position: np.ndarray) -> np.ndarray:
    """One row per trace (sorted by trace number), one column per window position counted from the
    trace's first window; NaN where a trace has no window there or its value is unknown."""
    values = np.asarray(values, dtype=np.float64)
    if values.size == 0:
        return np.zeros((0, 0))
    _, row = np.unique(trace, return_inverse=True)
    row = row.reshape(-1)
    pos = np.asarray(position, dtype=np.int64)
    first = np.full(int(row.max()) + 1, np.iinfo(np.int64).max)
    np.minimum.at(first, row, pos)
    pos = pos - first[row]
    grid = np.full((int(row.max()) + 1, int(pos.max()) + 1), np.nan)
    grid[row, pos] = values
    return grid


def pooled_autocorrelation(grid: np.ndarray, max_lag: int) -> np.ndarray:
    """rho_0..rho_max_lag of the rows of ``grid`` pooled (module docstring); NaN values are left out.
    All lags at once: the lag sums of every row are the inverse FFT of its power spectrum (zero padded
    to twice the length, so no product wraps around)."""
    known = ~np.isnan(grid)
    rho = np.full(max_lag + 1, np.nan)
    if not known.any():
        return rho
    x = np.where(known, grid - grid[known].mean(), 0.0)
    size = scipy.fft.next_fast_len(2 * grid.shape[1], real=True)
    spectrum = scipy.fft.rfft(x, size, axis=1)
    sums = scipy.fft.irfft((spectrum * spectrum.conj()).real.sum(axis=0), size)
    if sums[0] <= 1e-12 * max(1.0, float(np.abs(x).max()) ** 2):
        return rho
    lags = min(max_lag, grid.shape[1] - 1)
    rho[: lags + 1] = sums[: lags + 1] / sums[0]
    return rho


def integrated_time(rho: np.ndarray) -> float:
    """Geyer's initial monotone sequence estimate of ``1 + 2 sum rho_k`` from rho_0 = 1, rho_1, ..."""
    r = np.nan_to_num(np.asarray(rho, dtype=np.float64), nan=0.0)
    pairs = r[: 2 * (r.size // 2)].reshape(-1, 2).sum(axis=1)  # Gamma_m = rho_2m + rho_2m+1
    positive = np.flatnonzero(pairs <= 0)
    pairs = pairs[: positive[0]] if positive.size else pairs
    if pairs.size == 0:
        return 1.0
    pairs = np.minimum.accumulate(pairs)
    return max(float(-1.0 + 2.0 * pairs.sum()), 1e-9)


def effective_size(values: np.ndarray, trace: np.ndarray, position: np.ndarray,
                   max_lag: int | None = None) -> EffectiveSize:
    """The effective number of windows of one feature (module docstring). ``trace`` and ``position``
    say which trace each value comes from and its window position in it (consecutive windows differ
    by 1)."""
    grid = window_grid(values, trace, position)
    n = int(np.count_nonzero(~np.isnan(grid)))
    if n < 2:
        return EffectiveSize(n, 1.0, float(n), 0)
    lag = grid.shape[1] - 1 if max_lag is None else min(int(max_lag), grid.shape[1] - 1)
    lag = max(lag, 1)
    rho = pooled_autocorrelation(grid, lag)
    if math.isnan(rho[0]):  # constant values: every window says the same, one window's worth
        return EffectiveSize(n, float(n), 1.0, lag)
    tau = integrated_time(rho)
    return EffectiveSize(n, tau, min(float(n), n / tau), lag)


__all__ = ["EffectiveSize", "effective_size", "integrated_time", "pooled_autocorrelation", "window_grid"]
