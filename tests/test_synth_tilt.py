"""Rare-condition tilt: every log p/q against scipy.stats, and weighted estimates that recover the
untilted mean (the importance-sampling identity E_p[f] = E_q[f p/q])."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from builders import dwell, events, three_levels, with_outage
from tracegen import TracegenError
from tracegen.synth.sampler import sample_trace
from tracegen.synth.tilt import (Tilt, TiltPlan, dwell_log_ratio, effective_sample_size, lognormal_log_ratio,
                                 normalised_weights, poisson_log_ratio, tilted_choice)


def test_tilted_choice_rows_are_distributions_and_weights_average_to_one():
    rng = np.random.default_rng(1)
    p = rng.dirichlet(np.ones(5), size=4)
    p[0, 2] = 0.0
    p[0] /= p[0].sum()
    w = rng.uniform(0.2, 5.0, 5)
    q, log_ratio = tilted_choice(p, w)
    np.testing.assert_allclose(q.sum(axis=1), 1.0)
    # E_q[p/q] = sum_j q_j p_j / q_j = 1 for every row (the importance-sampling identity)
    np.testing.assert_allclose(np.sum(q * np.exp(log_ratio), axis=1), 1.0)
    np.testing.assert_allclose(q * np.exp(log_ratio), p, atol=1e-15)


@pytest.mark.parametrize("family, params, ref", [
    ("lognormal", {"mu": math.log(6.0), "sigma": 0.7}, lambda c: stats.lognorm(0.7, scale=6.0 * c)),
    ("gamma", {"shape": 2.5, "scale_s": 4.0}, lambda c: stats.gamma(2.5, scale=4.0 * c)),
])
def test_dwell_ratio_is_the_ratio_of_scipy_densities(family, params, ref):
    fit = dwell(family, **params)
    x = np.array([1.5, 3.0, 10.0, 40.0])
    expected = ref(1.0).logpdf(x) - ref(2.0).logpdf(x)  # scipy.stats densities of p and of q (scale x2)
    np.testing.assert_allclose(dwell_log_ratio(fit, 2.0, x), expected, rtol=1e-10)
    # at the clip (draws below one step become one step): the ratio of the masses P(X <= step)
    clip = ref(1.0).logcdf(1.0) - ref(2.0).logcdf(1.0)
    np.testing.assert_allclose(dwell_log_ratio(fit, 2.0, np.array([1.0])), [clip], rtol=1e-10)


def test_geometric_dwell_ratio_matches_scipy_geom():
    fit = dwell("geometric", p=0.2)
    k = np.array([1, 2, 5, 30])
    expected = stats.geom(0.2).logpmf(k) - stats.geom(0.1).logpmf(k)  # scale 2 halves p
    np.testing.assert_allclose(dwell_log_ratio(fit, 2.0, k * 1.0), expected, rtol=1e-10)


def test_poisson_and_lognormal_ratios_match_scipy():
    rate, factor, duration = 0.02, 3.0, 600.0
    for n in (0, 4, 30):
        # the count's pmf ratio; the uniform event times given the count are the same under both laws
        expected = stats.poisson(rate * duration).logpmf(n) - stats.poisson(rate * factor * duration).logpmf(n)
        assert poisson_log_ratio(n, rate, factor, duration) == pytest.approx(expected, rel=1e-12)
    x = np.array([0.5, 2.0, 9.0])
    expected = stats.lognorm(0.6, scale=3.0).logpdf(x) - stats.lognorm(0.6, scale=6.0).logpdf(x)
    np.testing.assert_allclose(lognormal_log_ratio(x, math.log(3.0), 0.6, 2.0), expected, rtol=1e-10)


def test_normalised_weights_and_kish_effective_sample_size():
    log_lr = np.log([1.0, 2.0, 1.0, 4.0])
    np.testing.assert_allclose(normalised_weights(log_lr), [0.125, 0.25, 0.125, 0.5])
    # Kish (1965): (sum w)^2 / sum w^2 = 64 / 22
    assert effective_sample_size(log_lr) == pytest.approx(64.0 / 22.0)
    np.testing.assert_allclose(normalised_weights(log_lr + 800.0), [0.125, 0.25, 0.125, 0.5])  # no overflow


def _statistics(model, tilt, n, seed, duration_s=240.0):
    """Per trace: (log p/q, outage share, low-level share, failures, handovers)."""
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(n):
        s = sample_trace(model, duration_s, 1.0, rng, tilt=tilt)
        marks = [e for e in s.event if e is not None]
        rows.append((s.log_likelihood_ratio, float(np.mean(s.bandwidth_bps == 0.0)), float(np.mean(s.state == 1)),
                     marks.count("handover-failure"), len(marks)))
    return np.array(rows)


def test_weighted_means_under_tilt_recover_the_untilted_means():
    model = with_outage(event_model=events(rate_per_hour=40.0, failure_probability=0.1, outage_rate_per_hour=6.0,
                                           post=[0.1, 0.5, 0.4]))
    tilt = Tilt(low_state_weight=3.0, dwell_scale=2.0, handover_rate_factor=2.0, failure_factor=3.0,
                outage_rate_factor=2.0, outage_length_factor=1.5)
    n = 1200
    base = _statistics(model, None, n, seed=11)
    tilted = _statistics(model, tilt, n, seed=12)
    assert np.all(base[:, 0] == 0.0)
    w = np.exp(tilted[:, 0])
    # the weights have mean 1 under q (E_q[p/q] = 1)
    assert abs(w.mean() - 1.0) < 4 * w.std(ddof=1) / math.sqrt(n)
    for col in (1, 2, 3, 4):
        plain = base[:, col]
        weighted = w * tilted[:, col]
        se = math.sqrt(plain.var(ddof=1) / n + weighted.var(ddof=1) / n)
        assert abs(weighted.mean() - plain.mean()) < 4 * se, (col, weighted.mean(), plain.mean(), se)
    # and the tilt did what it was for: more outage time and more failures per trace than nominal
    assert tilted[:, 1].mean() > 1.5 * base[:, 1].mean()
    assert tilted[:, 3].mean() > 3.0 * base[:, 3].mean()


def test_no_tilt_means_unit_weights():
    model = three_levels(event_model=events())
    s = sample_trace(model, 300.0, 1.0, np.random.default_rng(3), tilt=Tilt())
    assert s.log_likelihood_ratio == 0.0


@pytest.mark.parametrize("tilt, field", [
    (Tilt(state_weights=(1.0, 2.0)), "tilt.state_weights"),
    (Tilt(dwell_scale=(1.0, 2.0)), "tilt.dwell_scale"),
    (Tilt(dwell_scale=2.0), "tilt.dwell_scale"),              # one factor is for the outage state: none here
    (Tilt(dwell_scale=(1.0, 1.0, 0.05)), "tilt.dwell_scale[2]"),  # geometric p = 0.1 / 0.05 = 2 > 1
    (Tilt(low_state_weight=2.0, low_states=4), "tilt.low_states"),
])
def test_tilts_that_do_not_fit_the_model_are_refused(tilt, field):
    with pytest.raises(TracegenError) as err:
        TiltPlan.build(three_levels(), tilt)
    assert err.value.field == field


@pytest.mark.parametrize("kwargs, field", [
    ({"handover_rate_factor": 0.0}, "tilt.handover_rate_factor"),
    ({"failure_factor": -2.0}, "tilt.failure_factor"),
    ({"state_weights": (1.0, -1.0, 1.0)}, "tilt.state_weights[1]"),
    ({"low_states": 0}, "tilt.low_states"),
    ({"outage_length_factor": float("nan")}, "tilt.outage_length_factor"),
])
def test_bad_tilt_values_are_refused(kwargs, field):
    with pytest.raises(TracegenError) as err:
        Tilt(**kwargs)
    assert err.value.field == field
