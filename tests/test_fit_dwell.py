"""Dwell-time families: checked against scipy.stats distributions and textbook maximum likelihood."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import optimize, stats

from tracegen.errors import TracegenError
from tracegen.fit.dwell import (
    FAMILIES,
    DwellFit,
    discrete_logpmf,
    discrete_logsf,
    family_mean_s,
    fit_dwell,
)


def discretise(x_s, step_s):
    """Observed steps of a continuous duration: k = ceil(X / step), at least 1."""
    return np.maximum(np.ceil(x_s / step_s), 1).astype(np.int64)


@pytest.fixture(scope="module")
def gamma_fit():
    rng = np.random.default_rng(20)
    k = discretise(rng.gamma(3.0, 4.0, size=2000), 1.0)
    return k, fit_dwell(k, 1.0)


# ---------------------------------------------------------------------------------------------- recovery


def test_gamma_recovered(gamma_fit):
    k, fit = gamma_fit
    assert fit.family == "gamma"
    assert fit.params["shape"] == pytest.approx(3.0, rel=0.10)
    assert fit.params["scale_s"] == pytest.approx(4.0, rel=0.10)
    assert fit.mean_s == pytest.approx(12.0, rel=0.05)  # gamma mean = shape * scale (scipy.stats.gamma.mean)
    assert fit.mean_s == pytest.approx(stats.gamma(fit.params["shape"], scale=fit.params["scale_s"]).mean())
    assert fit.n == 2000 and fit.n_censored == 0
    assert [r["family"] for r in fit.table] == list(FAMILIES)
    best = min(fit.table, key=lambda r: r["aic"])
    assert best["family"] == "gamma" and best["loglik"] == fit.loglik
    for r in fit.table:  # AIC = 2 (parameters) - 2 loglik
        assert r["aic"] == pytest.approx(2 * (1 if r["family"] == "geometric" else 2) - 2 * r["loglik"])


def test_gamma_loglik_is_scipy_cdf_differences_at_a_maximum(gamma_fit):
    k, fit = gamma_fit

    def ll(shape, scale):  # discretised likelihood written directly with scipy.stats.gamma.cdf
        d = stats.gamma(shape, scale=scale)
        return np.sum(np.log(d.cdf(k * 1.0) - d.cdf((k - 1) * 1.0)))

    shape, scale = fit.params["shape"], fit.params["scale_s"]
    assert fit.loglik == pytest.approx(ll(shape, scale), rel=1e-9)
    for ds, dc in [(1.01, 1), (0.99, 1), (1, 1.01), (1, 0.99)]:
        assert ll(shape * ds, scale * dc) < fit.loglik  # a local maximum of the likelihood


def test_geometric_recovered():
    rng = np.random.default_rng(21)
    k = rng.geometric(0.1, size=2000)  # numpy's geometric counts trials: support 1, 2, ...
    fit = fit_dwell(k, 0.5)
    best = max(r["loglik"] for r in fit.table)
    geo = next(r for r in fit.table if r["family"] == "geometric")
    assert fit.family == "geometric" or geo["loglik"] >= best - 2.0
    # geometric ML (textbook): p = 1 / mean(k); mean 10 steps of 0.5 s
    assert geo["params"]["p"] == pytest.approx(1.0 / np.mean(k), rel=1e-12)
    assert geo["mean_s"] == pytest.approx(5.0, rel=0.05)
    # loglik = sum of scipy.stats.geom.logpmf (support 1, 2, ...)
    assert geo["loglik"] == pytest.approx(stats.geom.logpmf(k, geo["params"]["p"]).sum(), rel=1e-12)


def test_lognormal_recovered():
    rng = np.random.default_rng(22)
    x = rng.lognormal(2.0, 0.6, size=2000)
    fit = fit_dwell(discretise(x, 1.0), 1.0)
    assert fit.family == "lognormal"
    assert fit.params["mu"] == pytest.approx(2.0, abs=0.05)
    assert fit.params["sigma"] == pytest.approx(0.6, rel=0.10)
    # log-normal mean exp(mu + sigma^2 / 2) (scipy.stats.lognorm.mean)
    assert fit.mean_s == pytest.approx(stats.lognorm(0.6, scale=np.exp(2.0)).mean(), rel=0.05)
    assert family_mean_s("lognormal", {"mu": 2.0, "sigma": 0.6}, 1.0) == pytest.approx(
        stats.lognorm(0.6, scale=np.exp(2.0)).mean(), rel=1e-12)


def test_few_durations_fit_geometric_only():
    fit = fit_dwell([3, 5, 4], 2.0)
    assert fit.family == "geometric" and len(fit.table) == 1
    assert fit.params["p"] == pytest.approx(1 / 4)  # 1 / mean steps
    assert fit.mean_s == pytest.approx(8.0)
    one = fit_dwell([1], 1.0, families=("gamma",))
    assert one.family == "geometric" and one.params["p"] == 1.0 and one.loglik == 0.0


# ---------------------------------------------------------------------------------------------- pmf


@pytest.mark.parametrize(
    "family, params",
    [("geometric", {"p": 0.07}), ("lognormal", {"mu": 1.5, "sigma": 0.8}), ("gamma", {"shape": 0.7, "scale_s": 9.0}),
     ("gamma", {"shape": 40.0, "scale_s": 0.5})],
)
@pytest.mark.parametrize("step_s", [1.0, 0.25])
def test_pmf_normalised_and_matches_scipy(family, params, step_s):
    k = np.arange(1, 200_001)
    lp = discrete_logpmf(family, params, k, step_s)
    assert np.exp(lp).sum() == pytest.approx(1.0, abs=1e-9)
    ks = np.arange(1, 300)
    if family == "geometric":
        want = stats.geom.logpmf(ks, params["p"])  # scipy.stats.geom: support 1, 2, ...
        want_sf = stats.geom.logsf(ks - 1, params["p"])  # P(D >= k) = P(D > k - 1)
    else:
        d = (stats.lognorm(params["sigma"], scale=np.exp(params["mu"])) if family == "lognormal"
             else stats.gamma(params["shape"], scale=params["scale_s"]))
        lo, hi = (ks - 1) * step_s, ks * step_s
        # scipy.stats documentation: P(k) = cdf(k step) - cdf((k - 1) step), compared as probabilities
        np.testing.assert_allclose(np.exp(discrete_logpmf(family, params, ks, step_s)), d.cdf(hi) - d.cdf(lo),
                                   rtol=1e-9, atol=1e-15)
        # in log space against the same difference taken on the sf side above the median (no cancellation)
        with np.errstate(divide="ignore"):
            want = np.log(np.where(lo >= d.median(), d.sf(lo) - d.sf(hi), d.cdf(hi) - d.cdf(lo)))
        want_sf = d.logsf(lo)
    ok = want > -600  # where the reference difference still has digits
    np.testing.assert_allclose(discrete_logpmf(family, params, ks, step_s)[ok], want[ok], rtol=1e-8)
    np.testing.assert_allclose(discrete_logsf(family, params, ks, step_s), want_sf, rtol=1e-9, atol=1e-12)
    # P(D >= k) = 1 - sum_{j < k} P(j)
    cum = np.concatenate([[0.0], np.cumsum(np.exp(lp[:298]))])
    np.testing.assert_allclose(np.exp(discrete_logsf(family, params, ks, step_s)), 1.0 - cum, atol=1e-12)
    assert discrete_logpmf(family, params, np.array([0, -3]), step_s).tolist() == [-np.inf, -np.inf]


def test_far_tail_stays_finite():
    lp = discrete_logpmf("gamma", {"shape": 3.0, "scale_s": 1.0}, np.array([500, 5000]), 1.0)
    assert np.all(np.isfinite(lp)) and lp[0] < -400
    # the upper-tail branch: log(sf(k-1) - sf(k)) against scipy's logsf (no cancellation to 0)
    d = stats.gamma(3.0)
    want = d.logsf(499.0) + np.log1p(-np.exp(d.logsf(500.0) - d.logsf(499.0)))
    assert lp[0] == pytest.approx(want, rel=1e-9)


# ---------------------------------------------------------------------------------------------- censoring


def _right_censored(rng, n_traces, window_steps, shape, scale_s):
    """Traces that start at a state change and are cut at window_steps: the cut dwell is censored."""
    d = discretise(rng.gamma(shape, scale_s, size=(n_traces, 4 * window_steps // int(shape * scale_s) + 8)), 1.0)
    ends = np.cumsum(d, axis=1)
    complete = ends < window_steps
    assert not complete[:, -1].any()
    n_done = complete.sum(axis=1)
    last_end = np.where(n_done > 0, np.take_along_axis(ends, np.maximum(n_done - 1, 0)[:, None], 1)[:, 0], 0)
    k = np.concatenate([d[complete], window_steps - last_end])
    cens = np.concatenate([np.zeros(complete.sum(), bool), np.ones(n_traces, bool)])
    return k, cens


def _windows(rng, n_windows, window_steps, shape, scale_s):
    """One long run of dwell times cut into windows: pieces touching a window edge are censored."""
    total = n_windows * window_steps
    d = discretise(rng.gamma(shape, scale_s, size=2 * total // int(shape * scale_s) + 50), 1.0)
    ends = np.cumsum(d)
    ends = ends[ends < total]
    cuts = np.arange(0, total + 1, window_steps)
    b = np.union1d(ends, cuts)
    start, stop = b[:-1], b[1:]
    cens = (np.isin(start, cuts) & ~np.isin(start, ends)) | (np.isin(stop, cuts) & ~np.isin(stop, ends))
    return stop - start, cens


def test_censoring_right_edge_is_unbiased():
    rng = np.random.default_rng(23)
    k, cens = _right_censored(rng, 600, 100, 2.0, 20.0)  # true mean 40 s, traces of 100 s
    with_c = fit_dwell(k, 1.0, censored=cens, families=("gamma",))
    naive = fit_dwell(k, 1.0, families=("gamma",))
    assert with_c.n_censored == 600
    assert with_c.mean_s == pytest.approx(40.0, rel=0.05)
    assert naive.mean_s < 0.85 * 40.0  # cut dwell times counted as complete ones pull the mean down
    # the censored likelihood: scipy.stats.gamma logpmf (cdf differences) + logsf((k - 1) step)
    d = stats.gamma(with_c.params["shape"], scale=with_c.params["scale_s"])
    want = np.log(d.cdf(k[~cens]) - d.cdf(k[~cens] - 1.0)).sum() + d.logsf(k[cens] - 1.0).sum()
    assert with_c.loglik == pytest.approx(want, rel=1e-9)


def test_censoring_both_edges_closer_than_naive():
    rng = np.random.default_rng(24)
    k, cens = _windows(rng, 300, 150, 2.0, 20.0)
    with_c = fit_dwell(k, 1.0, censored=cens)
    naive = fit_dwell(k, 1.0)
    assert abs(with_c.mean_s - 40.0) < abs(naive.mean_s - 40.0)


def test_geometric_censored_ml_matches_numerical_optimum():
    rng = np.random.default_rng(25)
    k = rng.geometric(0.05, size=300)
    cens = rng.random(300) < 0.3
    fit = fit_dwell(k, 1.0, censored=cens, families=("geometric",))

    def nll(p):  # scipy.stats.geom: complete -> logpmf(k), censored -> P(D >= k) = sf(k - 1)
        return -(stats.geom.logpmf(k[~cens], p).sum() + stats.geom.logsf(k[cens] - 1, p).sum())

    ref = optimize.minimize_scalar(nll, bounds=(1e-4, 0.999), method="bounded", options={"xatol": 1e-10})
    assert fit.params["p"] == pytest.approx(ref.x, rel=1e-6)
    assert fit.loglik == pytest.approx(-ref.fun, rel=1e-9)


# ---------------------------------------------------------------------------------------------- sampling


def test_sample_s_mean(gamma_fit):
    _, fit = gamma_fit
    x = fit.sample_s(np.random.default_rng(26), 20_000)
    assert x.min() >= fit.step_s
    se = x.std() / np.sqrt(x.size)
    assert abs(x.mean() - fit.mean_s) < 3 * se  # clipping at one step moves the mean by < 1e-4 s here
    steps = fit.sample_steps(np.random.default_rng(27), 20_000)
    kk = np.arange(1, 2000)
    mean_steps = np.sum(kk * np.exp(fit.logpmf(kk)))  # mean of the discretised pmf
    assert abs(steps.mean() - mean_steps) < 3 * steps.std() / np.sqrt(steps.size)
    geo = fit_dwell([2, 7, 3, 1], 0.5)
    g = geo.sample_s(np.random.default_rng(28), 20_000)
    assert np.allclose(g / 0.5, np.round(g / 0.5)) and g.min() >= 0.5  # whole steps
    assert abs(g.mean() - geo.mean_s) < 3 * g.std() / np.sqrt(g.size)


# ---------------------------------------------------------------------------------------------- dict / errors


def test_to_dict_round_trip(gamma_fit):
    _, fit = gamma_fit
    d = json.loads(json.dumps(fit.to_dict()))
    back = DwellFit.from_dict(d)
    assert back == fit
    assert np.array_equal(back.logpmf(np.arange(1, 50)), fit.logpmf(np.arange(1, 50)))


@pytest.mark.parametrize(
    "family, params, field",
    [
        ("gamma", {"shape": 3.0, "scale_s": -4.0}, "params.scale_s"),
        ("gamma", {"shape": 0.0, "scale_s": 4.0}, "params.shape"),
        ("gamma", {"shape": 3.0}, "params"),
        ("geometric", {"p": 0.0}, "params.p"),
        ("geometric", {"p": 1.5}, "params.p"),
        ("geometric", {"p": float("nan")}, "params.p"),
        ("lognormal", {"mu": 1.0, "sigma": -0.1}, "params.sigma"),
        ("weibull", {"shape": 3.0, "scale_s": 4.0}, "family"),
    ],
)
def test_from_dict_rejects_bad_params(family, params, field):
    d = {"family": family, "params": params, "step_s": 1.0, "mean_s": 12.0, "n": 10, "loglik": -20.0, "table": []}
    with pytest.raises(TracegenError) as err:
        DwellFit.from_dict(d)
    assert err.value.field == field


@pytest.mark.parametrize(
    "change, field",
    [({"step_s": 0.0}, "step_s"), ({"mean_s": 13.0}, "mean_s"), ({"n": 0}, "n"), ({"loglik": float("inf")}, "loglik"),
     ({"table": [{"family": "gamma"}]}, "table")],
)
def test_from_dict_rejects_bad_fields(gamma_fit, change, field):
    d = gamma_fit[1].to_dict() | change
    with pytest.raises(TracegenError) as err:
        DwellFit.from_dict(d)
    assert err.value.field == field


def test_bad_input_is_refused():
    with pytest.raises(TracegenError, match="needs at least 1 duration, got 0"):
        fit_dwell([], 1.0)
    with pytest.raises(TracegenError, match=r"whole numbers of steps >= 1; 2 are not, first 0 at index 1"):
        fit_dwell([3, 0, 2.5], 1.0)
    with pytest.raises(TracegenError, match="complete"):
        fit_dwell([3, 4], 1.0, censored=np.array([True, True]))
    with pytest.raises(TracegenError, match="2 flags"):
        fit_dwell([3, 4], 1.0, censored=np.array([True]))
    with pytest.raises(TracegenError) as err:
        fit_dwell([3, 4], -1.0)
    assert err.value.field == "step_s"
    with pytest.raises(TracegenError, match="unknown dwell families"):
        fit_dwell([3, 4, 5, 6, 7], 1.0, families=("weibull",))
