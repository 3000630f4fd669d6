"""Effective number of windows: the AR(1) integrated autocorrelation time and statsmodels' ACF."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter
from statsmodels.tsa.stattools import acf

from tracegen.curate.effective import effective_size, integrated_time, pooled_autocorrelation, window_grid


def ar1_windows(phi: float, traces: int, length: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    burn = 200
    x = lfilter([1.0], [1.0, -phi], rng.standard_normal((traces, length + burn)), axis=1)[:, burn:]
    return x.ravel(), np.repeat(np.arange(traces), length), np.tile(np.arange(length), traces)


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8])
def test_ar1_integrated_time(phi):
    # an AR(1) series has rho_k = phi^k, so tau = 1 + 2 phi / (1 - phi) = (1 + phi) / (1 - phi)
    # (Sokal 1997, "Monte Carlo methods in statistical mechanics", the exponential-autocorrelation case)
    values, trace, pos = ar1_windows(phi, 300, 400, seed=int(phi * 10))
    e = effective_size(values, trace, pos)
    expected = (1 + phi) / (1 - phi)
    assert e.tau == pytest.approx(expected, rel=0.08)
    assert e.effective == pytest.approx(values.size / expected, rel=0.08)


def test_pooled_acf_is_statsmodels_acf_for_one_series():
    # one trace without gaps: the pooled estimator is the usual biased ACF (statsmodels.tsa.stattools.acf)
    rng = np.random.default_rng(5)
    x = lfilter([1.0], [1.0, -0.7], rng.standard_normal(500))
    grid = window_grid(x, np.zeros(500, dtype=int), np.arange(500))
    np.testing.assert_allclose(pooled_autocorrelation(grid, 30), acf(x, nlags=30, fft=False), atol=1e-12)


def test_gaps_break_pairs():
    # windows 0, 1 and 3 of one trace: lag 1 pairs only (0, 1); lag 2 only (1, 3); computed by hand
    values = np.array([1.0, 2.0, 4.0])
    grid = window_grid(values, np.array([7, 7, 7]), np.array([10, 11, 13]))
    assert grid.shape == (1, 4) and np.isnan(grid[0, 2])
    d = values - values.mean()
    rho = pooled_autocorrelation(grid, 3)
    assert rho[1] == pytest.approx(d[0] * d[1] / (d @ d))
    assert rho[2] == pytest.approx(d[1] * d[2] / (d @ d))
    assert rho[3] == pytest.approx(d[0] * d[2] / (d @ d))


def test_trace_level_counts_as_correlation():
    # traces that differ only by a constant level: every window of a trace says the same thing, so the
    # corpus is worth about one window per trace
    rng = np.random.default_rng(2)
    levels = rng.normal(size=50)
    values = np.repeat(levels, 40) + 1e-6 * rng.normal(size=2000)
    e = effective_size(values, np.repeat(np.arange(50), 40), np.tile(np.arange(40), 50))
    assert 40 <= e.effective <= 80


def test_geyer_stops_at_first_non_positive_pair():
    # Gamma_0 = 1 + 0.5, Gamma_1 = 0.3 + 0.1, Gamma_2 = -0.1 + 0: stop; tau = -1 + 2 (1.5 + 0.4)
    assert integrated_time(np.array([1.0, 0.5, 0.3, 0.1, -0.1, 0.0])) == pytest.approx(2.8)
    # a later pair larger than an earlier one is capped by it (monotone sequence)
    assert integrated_time(np.array([1.0, 0.0, 0.6, 0.6])) == pytest.approx(-1 + 2 * (1.0 + 1.0))


def test_small_inputs():
    assert effective_size(np.array([1.0]), np.array([0]), np.array([0])).effective == 1.0
    e = effective_size(np.ones(10), np.zeros(10, dtype=int), np.arange(10))
    assert e.effective == 1.0
