"""The slow part of log-bandwidth (fit/slow.py): block covariance, likelihood, recovery, offsets, sampling."""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy import integrate, stats

import tracegen
from tracegen import Trace
from tracegen.fit.prepare import prepare
from tracegen.fit.slow import SlowFit, _groups, _loglik, block_means, fit_slow, ou_block_cov, remove_slow, smoothed
from tracegen.model import ModelError, PathModel


def ou_cov_by_quadrature(lag_blocks: int, var: float, time_s: float, block_s: float) -> float:
    """Cov of the means of an OU (covariance var exp(-|t - s| / T)) over two blocks, by direct 2-D
    quadrature of the definition (scipy.integrate.dblquad), independent of the closed form. For one
    block the square is folded onto the triangle s < t, where the integrand is smooth."""
    if lag_blocks == 0:
        val, _ = integrate.dblquad(lambda s, t: var * math.exp(-(t - s) / time_s), 0.0, block_s,
                                   lambda t: 0.0, lambda t: t, epsabs=1e-12, epsrel=1e-11)
        return 2.0 * val / block_s**2
    lo = lag_blocks * block_s
    val, _ = integrate.dblquad(lambda s, t: var * math.exp(-(s - t) / time_s), 0.0, block_s,
                               lambda t: lo, lambda t: lo + block_s, epsabs=1e-12, epsrel=1e-11)
    return val / block_s**2


@pytest.mark.parametrize("time_s", [30.0, 140.0, 900.0])
def test_block_covariance_matches_the_integral_of_the_ou_covariance(time_s):
    lags = np.arange(5)
    closed = ou_block_cov(lags, 0.4, time_s, 60.0)
    direct = [ou_cov_by_quadrature(int(k), 0.4, time_s, 60.0) for k in lags]
    np.testing.assert_allclose(closed, direct, rtol=1e-7)


def _blocks_trace(y_blocks: np.ndarray, per: int = 60) -> Trace:
    """A 1 s trace whose tumbling 60 s block means of log bandwidth are exactly ``y_blocks``."""
    bw = np.exp(np.repeat(y_blocks, per))
    return Trace.from_columns(np.arange(bw.size, dtype=float), bandwidth_bps=bw)


def test_likelihood_is_the_multivariate_normal_density_of_the_block_means():
    # scipy.stats.multivariate_normal with the covariance built from quadrature: the reference
    rng = np.random.default_rng(3)
    ys = [15 + rng.normal(0, 0.5, n) for n in (7, 7, 4)]
    prep = prepare([_blocks_trace(y) for y in ys])
    groups = _groups(block_means(prep, 60.0))
    m, between, var, time_s, noise = 15.1, 0.2, 0.3, 200.0, 0.05
    ours = _loglik(groups, m, between, var, time_s, noise, 60.0)
    ref = 0.0
    for y in ys:
        n = y.size
        cov = np.array([[ou_cov_by_quadrature(abs(i - j), var, time_s, 60.0) for j in range(n)] for i in range(n)])
        cov += between + noise * np.eye(n)
        ref += stats.multivariate_normal(np.full(n, m), cov).logpdf(y)
    assert ours == pytest.approx(ref, rel=1e-9)


def simulate(rng: np.random.Generator, n_traces: int, duration_s: int, *, between: float, drift: float,
             time_s: float, fast_sd: float) -> list[Trace]:
    """Test-only generator with plain loops: offset + OU drift (exact AR(1) at 1 s) + i.i.d. fast noise."""
    out = []
    phi = math.exp(-1.0 / time_s)
    for _ in range(n_traces):
        u = rng.normal(0, math.sqrt(between))
        s = np.empty(duration_s)
        s[0] = rng.normal(0, math.sqrt(drift))
        for t in range(1, duration_s):
            s[t] = phi * s[t - 1] + rng.normal(0, math.sqrt(drift * (1 - phi * phi)))
        log_bw = 15.0 + u + s + rng.normal(0, fast_sd, duration_s)
        out.append(Trace.from_columns(np.arange(duration_s, dtype=float), bandwidth_bps=np.exp(log_bw)))
    return out


def test_recovers_offset_and_drift_from_their_own_law():
    rng = np.random.default_rng(11)
    traces = simulate(rng, 40, 3600, between=0.25, drift=0.3, time_s=300.0, fast_sd=0.6)
    fit = fit_slow(prepare(traces))
    assert fit is not None
    # sampling error with 40 traces: the variance of an offset variance estimate is ~2 sigma^4 / 40
    assert fit.between_var == pytest.approx(0.25, abs=0.12)
    assert fit.drift_var == pytest.approx(0.3, rel=0.25)
    assert fit.drift_time_s == pytest.approx(300.0, rel=0.3)
    assert fit.noise_var == pytest.approx(0.36 / 60, rel=0.3)  # i.i.d. noise averaged over 60 samples
    assert fit.mean_log == pytest.approx(15.0, abs=0.2)
    assert fit.loglik > fit.loglik_without


def test_no_slow_part_in_data_without_one():
    rng = np.random.default_rng(5)
    traces = [Trace.from_columns(np.arange(1800.0), bandwidth_bps=np.exp(15 + rng.normal(0, 0.5, 1800)))
              for _ in range(10)]
    assert fit_slow(prepare(traces)) is None
    short = [Trace.from_columns(np.arange(300.0), bandwidth_bps=np.full(300, 1e6))]
    assert fit_slow(prepare(short)) is None   # five blocks: too few to fit


def test_offsets_are_the_conditional_means_of_a_random_intercept():
    # Gaussian conditioning (e.g. Searle, Casella & McCulloch, Variance Components, the BLUP of a random
    # intercept): with no drift and noise v, E[u | y] = n tau^2 / (n tau^2 + v) (ybar - m).
    rng = np.random.default_rng(8)
    traces = simulate(rng, 30, 1200, between=0.5, drift=1e-6, time_s=200.0, fast_sd=0.8)
    prep = prepare(traces)
    fit = fit_slow(prep)
    assert fit is not None
    blocks = block_means(prep, 60.0)
    v = fit.noise_var + float(ou_block_cov(np.array([0]), fit.drift_var, fit.drift_time_s, 60.0)[0])
    for off, y in zip(fit.offsets, blocks.mean):
        n = y.size
        if fit.drift_var < 1e-4:
            assert off == pytest.approx(n * fit.between_var / (n * fit.between_var + v) * (y.mean() - fit.mean_log),
                                        rel=1e-3, abs=1e-4)
    assert sum(fit.offset_weights) == pytest.approx(1.0)
    assert np.corrcoef(fit.offsets, [y.mean() for y in blocks.mean])[0, 1] > 0.99


def test_removing_the_slow_part_leaves_no_trace_offsets():
    rng = np.random.default_rng(12)
    traces = simulate(rng, 12, 1800, between=0.6, drift=0.2, time_s=240.0, fast_sd=0.3)
    prep = prepare(traces)
    fit = fit_slow(prep)
    fast = remove_slow(prep, fit)
    before = [prep.features[a:a + 1800, 0].mean() for a in range(0, 12 * 1800, 1800)]
    after = [fast.features[a:a + 1800, 0].mean() for a in range(0, 12 * 1800, 1800)]
    assert np.var(after) < 0.05 * np.var(before)
    assert len(smoothed(prep, fit)) == 12


def test_sampled_drift_has_the_ou_variance_and_autocorrelation():
    from statsmodels.tsa.stattools import acovf

    fit = SlowFit(60.0, 15.0, 0.0, 0.5, 50.0, 0.01, 0.0, 0.0, 100, 5, (0.0,), (1.0,), 0.0)
    rng = np.random.default_rng(21)
    draws = np.array([fit.sample(rng, 400, 1.0, 0) for _ in range(300)])
    assert draws[:, 0].var() == pytest.approx(0.5, rel=0.2)      # stationary from the first sample
    assert draws.var() == pytest.approx(0.5, rel=0.15)
    # statsmodels acovf around the known mean 0 (demean=False: per-trace demeaning biases long lags down)
    cov = np.mean([acovf(d, demean=False, fft=True, nlag=100) for d in draws], axis=0)
    pooled = cov / cov[0]
    for k in (1, 10, 25):   # the OU autocorrelation exp(-k / T), its definition
        assert pooled[k] == pytest.approx(math.exp(-k / 50.0), abs=0.06)


def test_offsets_are_drawn_in_proportion_to_their_weights():
    fit = SlowFit(60.0, 15.0, 0.0, 1e-9, 50.0, 0.01, 0.0, 0.0, 100, 5, (-1.0, 1.0), (0.25, 0.75), 0.0)
    rng = np.random.default_rng(2)
    picks = np.array([fit.pick(rng) for _ in range(4000)])
    # binomial: 4000 draws at p = 0.75 have sd ~0.007
    assert picks.mean() == pytest.approx(0.75, abs=0.03)
    assert fit.sample(rng, 10, 1.0, 0).mean() == pytest.approx(-1.0, abs=1e-3)


def test_a_model_keeps_its_slow_part_through_json_and_refuses_a_bad_one():
    rng = np.random.default_rng(4)
    traces = simulate(rng, 10, 1800, between=0.4, drift=0.3, time_s=300.0, fast_sd=0.3)
    model = tracegen.fit(traces, states=2, restarts=1)
    assert model.slow is not None and "slow part" in model.summary_text()
    again = PathModel.from_dict(json.loads(model.to_json()))
    assert again.to_json() == model.to_json()
    d = json.loads(model.to_json())
    d["slow"]["drift_time_s"] = -1
    with pytest.raises(ModelError, match="slow.drift_time_s"):
        PathModel.from_dict(d)
    d = json.loads(model.to_json())
    d["slow"]["offset_weights"] = [2.0] * len(d["slow"]["offsets"])
    with pytest.raises(ModelError, match="offset_weights"):
        PathModel.from_dict(d)
    d = json.loads(model.to_json())   # a version 1 file: no slow part, still read
    d["schema_version"] = 1
    d.pop("slow")
    assert PathModel.from_dict(d).slow is None
    assert tracegen.fit(traces, states=2, restarts=1, slow_block_s=None).slow is None


def test_synthetic_traces_differ_from_each_other_as_the_fitted_ones_do():
    rng = np.random.default_rng(9)
    traces = simulate(rng, 16, 2400, between=0.5, drift=0.1, time_s=200.0, fast_sd=0.3)
    model = tracegen.fit(traces, states=range(1, 3), restarts=1)
    syn = tracegen.synth(model, 40, 2400.0, 1.0, seed=3)
    real_means = [np.log(t["bandwidth_bps"]).mean() for t in traces]
    syn_means = [np.log(t["bandwidth_bps"]).mean() for t in syn]
    # F test of equal variances (scipy.stats.f); without the slow part the synthetic spread is ~0.003
    f = np.var(syn_means, ddof=1) / np.var(real_means, ddof=1)
    assert stats.f.cdf(f, 39, 15) > 0.01 and stats.f.sf(f, 39, 15) > 0.01
    same = tracegen.synth(model, 2, 2400.0, 1.0, seed=3)
    assert all(np.array_equal(a["bandwidth_bps"], b["bandwidth_bps"]) for a, b in zip(same, syn[:2]))
    flat = dataclasses.replace(model, slow=None)
    flat_means = [np.log(t["bandwidth_bps"]).mean() for t in tracegen.synth(flat, 40, 2400.0, 1.0, seed=3)]
    assert np.var(flat_means) < 0.2 * np.var(syn_means)

