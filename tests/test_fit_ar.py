"""AR(p) residual models: checked against statsmodels, scipy.stats and textbook formulas."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.signal import lfilter
from statsmodels.regression.linear_model import OLS, yule_walker
from statsmodels.tsa.ar_model import AutoReg, ar_select_order
from statsmodels.tsa.arima_process import ArmaProcess, arma_acovf
from statsmodels.tsa.tsatools import lagmat

from tracegen.errors import TracegenError
from tracegen.fit.ar import (
    ARFit,
    ar_loglik,
    ar_to_pacf,
    fit_ar,
    is_stationary,
    make_stationary,
    pacf_to_ar,
    select_ar,
)

PHI = (0.6, -0.3)


def simulate(phi, n, seed, sigma=1.0, burn=500):
    """x_t = sum phi_k x_{t-k} + e_t via an IIR filter (scipy.signal.lfilter), burn-in discarded."""
    rng = np.random.default_rng(seed)
    e = rng.normal(0.0, sigma, n + burn)
    return lfilter([1.0], np.r_[1.0, -np.asarray(phi, dtype=float)], e)[burn:]


def char_roots(phi):
    """Roots of the AR polynomial 1 - phi_1 z - ... - phi_p z^p (np.roots wants the highest power first)."""
    return np.roots(np.r_[-np.asarray(phi, dtype=float)[::-1], 1.0])


def inverse_roots(phi):
    """Roots of z^p - phi_1 z^(p-1) - ... - phi_p, the reciprocals of char_roots: inside the unit circle
    when stationary. Monic, so np.roots stays well conditioned when phi_p is tiny."""
    return np.roots(np.r_[1.0, -np.asarray(phi, dtype=float)])


@pytest.fixture(scope="module")
def x2():
    return simulate(PHI, 2000, seed=11)


# ---------------------------------------------------------------------------------------------- fitting


def test_cls_matches_statsmodels_autoreg(x2):
    fit = fit_ar([x2], 2)
    ref = AutoReg(x2, lags=2, trend="n").fit()
    # statsmodels documentation: AutoReg is the OLS conditional estimator; sigma2 = ssr / nobs
    np.testing.assert_allclose(fit.coefs, ref.params, atol=1e-6)
    assert fit.sigma2 == pytest.approx(ref.sigma2, abs=1e-6)
    assert fit.n_eff == ref.nobs == len(x2) - 2
    # statsmodels AutoRegResults.llf and .aic (= -2 llf + 2 (k_ar + 1))
    assert fit.loglik == pytest.approx(ref.llf, abs=1e-6)
    assert fit.aic == pytest.approx(ref.aic, abs=1e-6)
    assert fit.method == "cls" and not fit.stationarity_adjusted
    # and close to the simulated truth (sampling error ~ 1/sqrt(2000) ~ 0.02)
    np.testing.assert_allclose(fit.coefs, PHI, atol=0.08)


def test_default_method_is_cls(x2):
    assert fit_ar([x2], 2) == fit_ar([x2], 2, method="cls")


def test_yule_walker_matches_statsmodels(x2):
    fit = fit_ar([x2], 2, method="yule-walker")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        # statsmodels.regression.linear_model.yule_walker, biased ("mle") autocovariance, no demeaning
        rho, sigma = yule_walker(x2, order=2, method="mle", demean=False)
    np.testing.assert_allclose(fit.coefs, rho, atol=1e-6)
    assert fit.sigma2 == pytest.approx(sigma**2, abs=1e-6)
    assert fit.method == "yule-walker"


def test_order_zero_is_mean_square(x2):
    fit = fit_ar([x2[:100], x2[100:]], 0)
    assert fit.coefs == () and fit.order == 0
    assert fit.sigma2 == pytest.approx(np.mean(x2**2), rel=1e-12)  # ML variance of a zero-mean normal
    # loglik = sum of N(0, sigma2) log densities (scipy.stats.norm)
    assert fit.loglik == pytest.approx(stats.norm.logpdf(x2, scale=np.sqrt(fit.sigma2)).sum(), rel=1e-12)


def test_loglik_is_sum_of_normal_logpdf(x2):
    fit = fit_ar([x2], 2)
    resid = x2[2:] - fit.coefs[0] * x2[1:-1] - fit.coefs[1] * x2[:-2]
    # conditional Gaussian likelihood, scipy.stats.norm.logpdf
    want = stats.norm.logpdf(resid, scale=np.sqrt(fit.sigma2)).sum()
    assert ar_loglik([x2], fit) == pytest.approx(want, rel=1e-12)
    assert fit.loglik == pytest.approx(want, rel=1e-12)
    # a worse model has a lower likelihood
    worse = ARFit(2, (0.3, 0.0), fit.sigma2, fit.n_eff, 0.0, 0.0, False)
    assert ar_loglik([x2], worse) < fit.loglik - 10


def test_segments_are_stacked_not_glued():
    rng = np.random.default_rng(5)
    segs = [simulate(PHI, n, seed=s) + off for s, (n, off) in enumerate([(40, 3.0), (25, -3.0), (60, 2.0)])]
    segs.append(rng.normal(size=2))  # too short for order 2: ignored, not an error
    fit = fit_ar(segs, 2)
    # the stacked regression, built with statsmodels' lagmat and OLS (textbook OLS on the union of rows)
    ys, xs = [], []
    for s in segs:
        if s.size > 2:
            lags = lagmat(s, 2, trim="both")
            xs.append(lags)
            ys.append(s[2:])
    ref = OLS(np.concatenate(ys), np.concatenate(xs)).fit()
    np.testing.assert_allclose(fit.coefs, ref.params, atol=1e-10)
    assert fit.sigma2 == pytest.approx(ref.ssr / ref.nobs, rel=1e-10)
    assert fit.n_eff == sum(s.size - 2 for s in segs if s.size > 2)
    assert fit == fit_ar(segs[:3], 2)
    glued = fit_ar([np.concatenate(segs)], 2)
    assert np.max(np.abs(np.subtract(glued.coefs, fit.coefs))) > 1e-3
    assert glued.n_eff == sum(s.size for s in segs) - 2  # glued: rows across the seams count too


def test_nonstationary_estimate_is_clipped():
    rng = np.random.default_rng(2)
    x = lfilter([1.0], [1.0, -1.05], rng.normal(size=300))  # explosive AR(1)
    raw = AutoReg(x, lags=1, trend="n").fit().params  # statsmodels OLS estimate, > 1
    assert raw[0] > 1.0
    fit = fit_ar([x], 1)
    assert fit.stationarity_adjusted
    assert fit.coefs == pytest.approx((0.99,), abs=1e-12)
    resid = x[1:] - 0.99 * x[:-1]
    assert fit.sigma2 == pytest.approx(np.mean(resid**2), rel=1e-12)  # ML sigma2 given the clipped coefficient
    assert np.all(np.abs(char_roots(fit.coefs)) > 1.0)


# ---------------------------------------------------------------------------------------------- order selection


def test_select_ar_matches_statsmodels_ranking(x2):
    fit, table = select_ar([x2], max_order=5)
    assert fit.order == 2
    assert [r["order"] for r in table] == [0, 1, 2, 3, 4, 5]
    assert all(r["n"] == len(x2) - 5 for r in table)  # same effective sample for every candidate
    sel = ar_select_order(x2, maxlag=5, ic="aic", trend="n")
    assert sel.ar_lags == [1, 2]
    # statsmodels ar_select_order: keys are lag tuples (0 for none), same hold-back of maxlag
    ref = {(0 if k == 0 else len(k)): float(np.squeeze(v)) for k, v in sel.aic.items()}
    ours = {r["order"]: r["aic"] for r in table}
    assert sorted(ours, key=ours.get) == sorted(ref, key=ref.get)
    for p in ours:
        assert ours[p] == pytest.approx(ref[p], abs=1e-6)
    # the returned fit is the chosen order refitted on all rows (its own hold-back of 2)
    assert fit == fit_ar([x2], 2)


def test_select_ar_reduces_order_on_little_data():
    x = simulate(PHI, 25, seed=3)
    fit, table = select_ar([x], max_order=5)
    # 10 rows per coefficient after the hold-back: 25 - 2 = 23 >= 20, 25 - 3 = 22 < 30
    assert max(r["order"] for r in table) == 2
    assert all(r["n"] == 23 for r in table)
    tiny, table = select_ar([np.array([0.5, -1.0, 0.3]), np.array([1.0, 2.0])], max_order=5)
    assert tiny.order == 0 and [r["order"] for r in table] == [0]
    assert tiny.sigma2 == pytest.approx(np.mean(np.array([0.5, -1.0, 0.3, 1.0, 2.0]) ** 2))


# ---------------------------------------------------------------------------------------------- stationarity


@pytest.mark.parametrize("phi", [(0.5,), (-0.9,), PHI, (1.2, -0.5), (0.3, 0.2, -0.1), (0.1, -0.2, 0.3, 0.4)])
def test_make_stationary_keeps_stationary_input(phi):
    assert ArmaProcess(np.r_[1.0, -np.array(phi)]).isstationary  # statsmodels' root check
    np.testing.assert_allclose(make_stationary(phi), phi, atol=1e-12)
    pacf = ar_to_pacf(phi)
    # theoretical PACF from statsmodels ArmaProcess.pacf (lag 0 is 1)
    np.testing.assert_allclose(pacf, ArmaProcess(np.r_[1.0, -np.array(phi)]).pacf(len(phi) + 1)[1:], atol=1e-10)
    np.testing.assert_allclose(pacf_to_ar(pacf), phi, atol=1e-12)


@pytest.mark.parametrize("phi", [(1.2, -0.1), (1.0,), (-1.5,), (0.5, 0.6), (2.0, -1.0, 0.5)])
def test_make_stationary_fixes_nonstationary_input(phi):
    assert not is_stationary(phi)
    assert not ArmaProcess(np.r_[1.0, -np.array(phi)]).isstationary
    out = make_stationary(phi)
    assert np.all(np.abs(char_roots(out)) > 1.0)
    assert ArmaProcess(np.r_[1.0, -out]).isstationary
    assert np.all(np.abs(ar_to_pacf(out)) <= 0.99 + 1e-12)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.floats(-5.0, 5.0, allow_nan=False), min_size=1, max_size=6))
def test_make_stationary_always_stationary(coefs):
    out = make_stationary(coefs)
    assert out.shape == (len(coefs),)
    # all |pacf| = 0.99 at order 6 puts a root within ~1e-12 of the circle (A(1) = prod(1 - pacf_k)),
    # so the root check allows rounding; a genuinely non-stationary output is far outside it
    assert np.all(np.abs(inverse_roots(out)) < 1.0 + 1e-9)
    assert np.all(np.abs(ar_to_pacf(out)) <= 0.99 + 1e-5)  # the step-down loses ~1e-6 near the boundary
    np.testing.assert_allclose(make_stationary(out), out, atol=1e-6)  # idempotent


def test_stationary_variance():
    fit = fit_ar([simulate(PHI, 200, seed=1)], 2)
    a1, a2 = fit.coefs
    # textbook AR(2) variance (e.g. Box & Jenkins; from memory): (1 - a2) s2 / ((1 + a2) ((1 - a2)^2 - a1^2))
    textbook = (1 - a2) * fit.sigma2 / ((1 + a2) * ((1 - a2) ** 2 - a1**2))
    assert fit.stationary_variance == pytest.approx(textbook, rel=1e-10)
    # statsmodels arma_acovf: theoretical autocovariance at lag 0
    ref = arma_acovf(np.r_[1.0, -np.array(fit.coefs)], np.array([1.0]), nobs=1, sigma2=fit.sigma2)[0]
    assert fit.stationary_variance == pytest.approx(ref, rel=1e-10)
    # sample variance of a long simulated series (200 000 steps: standard error ~0.5 %)
    long = simulate(PHI, 200_000, seed=7, sigma=0.5)
    truth = ARFit(2, PHI, 0.25, 0, 0.0, 0.0, False)
    assert truth.stationary_variance == pytest.approx(np.var(long), rel=0.03)
    three = ARFit(3, (0.5, 0.2, -0.3), 2.0, 0, 0.0, 0.0, False)
    ref3 = arma_acovf(np.r_[1.0, -0.5, -0.2, 0.3], np.array([1.0]), nobs=1, sigma2=2.0)[0]
    assert three.stationary_variance == pytest.approx(ref3, rel=1e-10)


# ---------------------------------------------------------------------------------------------- dict / errors


def test_to_dict_round_trip(x2):
    fit = fit_ar([x2], 2)
    d = json.loads(json.dumps(fit.to_dict()))
    assert ARFit.from_dict(d) == fit
    zero = fit_ar([x2], 0)
    assert ARFit.from_dict(json.loads(json.dumps(zero.to_dict()))) == zero


@pytest.mark.parametrize(
    "change, field",
    [
        ({"sigma2": 0.0}, "sigma2"),
        ({"sigma2": -1.0}, "sigma2"),
        ({"sigma2": float("inf")}, "sigma2"),
        ({"coefs": [1.2, -0.1]}, "coefs"),
        ({"coefs": [float("nan"), 0.1]}, "coefs"),
        ({"coefs": [0.5]}, "coefs"),
        ({"order": -1}, "order"),
        ({"loglik": float("nan")}, "loglik"),
        ({"stationarity_adjusted": "no"}, "stationarity_adjusted"),
        ({"method": "burg"}, "method"),
    ],
)
def test_from_dict_rejects(x2, change, field):
    d = fit_ar([x2], 2).to_dict() | change
    with pytest.raises(TracegenError) as err:
        ARFit.from_dict(d)
    assert err.value.field == field


def test_bad_input_is_refused():
    with pytest.raises(TracegenError, match=r"needs 3 samples after the hold-back of 2, got 1"):
        fit_ar([np.array([1.0, 2.0, 3.0]), np.array([1.0, 2.0])], 2)
    with pytest.raises(TracegenError, match=r"non-finite.*index 1"):
        fit_ar([np.array([1.0, np.nan, 3.0, 4.0])], 1)
    with pytest.raises(TracegenError, match=r"non-finite"):
        select_ar([np.array([1.0, np.inf])])
    with pytest.raises(TracegenError, match="unknown AR method"):
        fit_ar([np.ones(10)], 1, method="burg")
    with pytest.raises(TracegenError):
        fit_ar([], 1)
    with pytest.raises(TracegenError, match="variance"):
        fit_ar([np.zeros(20)], 0)


def test_variance_matching_gives_the_stationary_variance_of_every_sample():
    from tracegen.fit.ar import ar_loglik, fit_ar, with_stationary_variance

    rng = np.random.default_rng(31)
    calm = [rng.normal(0, 0.1, 200) for _ in range(5)]          # long, calm visits: what least squares sees
    wild = [rng.normal(0, 1.0, 1) for _ in range(300)]          # one-sample visits: held back by AR(1)
    fit = fit_ar(calm + wild, 1)
    matched = with_stationary_variance(fit, calm + wild)
    everything = np.concatenate(calm + wild)
    # AR(1) stationary variance sigma^2 / (1 - phi^2) (Box & Jenkins, Time Series Analysis, ch. 3)
    phi = matched.coefs[0]
    assert matched.sigma2 / (1 - phi * phi) == pytest.approx(float(np.mean(everything**2)), rel=1e-12)
    assert matched.coefs == fit.coefs and matched.order == fit.order
    assert matched.sigma2 > 10 * fit.sigma2
    assert matched.loglik == pytest.approx(ar_loglik(calm + wild, matched))
    assert matched.aic == pytest.approx(-2 * matched.loglik + 4)


def test_variance_matching_changes_little_when_the_model_is_right():
    from tracegen.fit.ar import fit_ar, with_stationary_variance

    rng = np.random.default_rng(32)
    e = rng.normal(0, 0.2, 50_000)
    x = np.empty_like(e)
    x[0] = e[0]
    for t in range(1, x.size):   # AR(1), phi = 0.6: stationary variance 0.04 / 0.64
        x[t] = 0.6 * x[t - 1] + e[t]
    fit = fit_ar([x], 1)
    matched = with_stationary_variance(fit, [x])
    assert matched.stationary_variance == pytest.approx(0.04 / 0.64, rel=0.03)
    assert matched.sigma2 == pytest.approx(fit.sigma2, rel=0.03)
