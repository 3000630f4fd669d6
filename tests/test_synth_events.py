"""Handover and outage injection (tracegen.synth.events): counts, kinds, lengths, what follows, bad plans."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from builders import events, three_levels, with_outage
from tracegen import TracegenError
from tracegen.synth.events import FAILURE, HANDOVER, OUTAGE, HandoverPlan, check_events, draw_events
from tracegen.synth.tilt import Tilt, TiltPlan

DURATION_S = 600.0


def draws(model, plan=None, tilt=None, n=400, seed=5):
    tp = TiltPlan.build(model, tilt)
    rng = np.random.default_rng(seed)
    return [draw_events(model, plan, tp, rng, DURATION_S) for _ in range(n)]


def kinds(draw_list, kind):
    return np.array([sum(1 for _, k in d.marks if k == kind) for d in draw_list])


def test_handover_counts_are_poisson_at_the_fitted_rate():
    model = three_levels(event_model=events(rate_per_hour=60.0))
    d = draws(model)
    counts = kinds(d, HANDOVER) + kinds(d, FAILURE)
    expected = 60.0 / 3600.0 * DURATION_S  # a Poisson process has mean rate x time and variance = mean
    se = math.sqrt(expected / len(counts))
    assert abs(counts.mean() - expected) < 4 * se
    # index of dispersion: (n - 1) var / mean ~ chi2(n - 1) for Poisson counts (common practice)
    dispersion = (len(counts) - 1) * counts.var(ddof=1) / counts.mean()
    assert stats.chi2.sf(dispersion, len(counts) - 1) > 1e-3
    assert stats.chi2.cdf(dispersion, len(counts) - 1) > 1e-3


def test_speed_and_cell_size_give_one_handover_per_cell_crossed():
    model = three_levels(event_model=events(rate_per_hour=1.0))
    d = draws(model, HandoverPlan(speed_m_s=20.0, cell_size_m=400.0), n=200)
    counts = kinds(d, HANDOVER) + kinds(d, FAILURE)
    expected = 20.0 / 400.0 * DURATION_S  # 30 cells crossed in 600 s
    assert abs(counts.mean() - expected) < 4 * math.sqrt(expected / len(counts))


def test_failure_share_and_lengths_follow_the_plan():
    model = three_levels(event_model=events(rate_per_hour=120.0, failure_probability=0.1,
                                            share_with_interruption=0.5))
    d = draws(model, n=300)
    n_fail, n_all = kinds(d, FAILURE).sum(), (kinds(d, FAILURE) + kinds(d, HANDOVER)).sum()
    assert stats.binomtest(int(n_fail), int(n_all), 0.1).pvalue > 1e-3  # scipy.stats exact binomial test
    lengths = np.concatenate([np.diff(x.breaks, axis=1).ravel() for x in d])
    short = lengths[lengths <= 2.0]
    # breaks up to 2 s: every interruption (share - p_fail = 0.4 of handovers, truncated at 2 s) and the
    # failures that happen to be that short (failures: log-normal, median 4 s, sigma 0.5; builders.events)
    p_short = 0.4 + 0.1 * stats.lognorm(0.5, scale=4.0).cdf(2.0)
    assert stats.binomtest(int(short.size), int(n_all), p_short).pvalue > 1e-3
    # interruptions: log-normal with median 0.2 s and sigma 0.4, truncated at the 2 s failure threshold
    ref = stats.lognorm(0.4, scale=0.2)
    interruptions = short[short < 1.0]  # failures below 1 s are rare (P = lognorm(0.5, 4).cdf(1) ~ 0.3 %)
    assert stats.kstest(interruptions, lambda x: ref.cdf(x) / ref.cdf(1.0)).pvalue > 1e-3


def test_failure_lengths_are_lognormal():
    model = three_levels(event_model=events(rate_per_hour=600.0, failure_probability=1.0,
                                            share_with_interruption=1.0))
    d = draws(model, n=40)
    lengths = np.concatenate([np.diff(x.breaks, axis=1).ravel() for x in d])
    assert stats.kstest(lengths, stats.lognorm(0.5, scale=4.0).cdf).pvalue > 1e-3  # scipy.stats reference


def test_plan_overrides_the_fit_and_explicit_times_are_marked():
    model = three_levels(event_model=events(rate_per_hour=600.0))
    plan = HandoverPlan(rate_per_min=0.0, times_s=(10.0, 20.5, 900.0), interruption_ms=100.0,
                        failure_probability=0.0, rtt_spike_ms=80.0, rtt_spike_decay_s=0.5, loss_burst_s=0.3,
                        loss_burst_loss=0.25, new_level="keep")
    d = draws(model, plan, n=5)
    for x in d:
        assert [t for t, _ in x.marks] == [10.0, 20.5]  # the time past the end is dropped
        assert all(k == HANDOVER for _, k in x.marks)
        assert len(x.breaks) == 2 and np.all(x.breaks[:, 0] == [10.0, 20.5])
        assert np.all(x.spikes[:, 0] == x.breaks[:, 1]) and np.all(x.spikes[:, 2] == 80.0)
        np.testing.assert_allclose(x.spikes[:, 1] - x.spikes[:, 0], 0.5)
        np.testing.assert_allclose(x.bursts[:, 1] - x.bursts[:, 0], 0.3)
        assert np.all(x.bursts[:, 2] == 0.25)
        assert x.switches == []  # new_level = "keep"
    lengths = np.concatenate([np.diff(x.breaks, axis=1).ravel() for x in draws(model, plan, n=300)])
    # median of the truncated log-normal: exp(mu + sigma * ndtri(0.5 * F(upper))); F(2 s) ~ 1 here
    assert abs(np.median(lengths) - 0.1) < 0.01


def test_default_spike_is_as_long_as_the_break():
    model = three_levels(event_model=events(rate_per_hour=600.0))
    for x in draws(model, n=20):
        np.testing.assert_allclose(x.spikes[:, 2], np.diff(x.breaks[: len(x.spikes)], axis=1).ravel() * 1000.0)


def test_state_after_a_handover_follows_the_fitted_probabilities():
    post = [0.0, 0.2, 0.8]
    model = with_outage(event_model=events(rate_per_hour=300.0, post=post))
    after = np.array([s for x in draws(model, n=100) for _, s in x.switches])
    observed = np.bincount(after, minlength=3)
    assert observed[0] == 0
    assert stats.chisquare(observed[1:], np.array(post[1:]) * after.size).pvalue > 1e-3  # scipy.stats


def test_standalone_outages_come_at_their_rate():
    model = with_outage(event_model=events(rate_per_hour=0.0, outage_rate_per_hour=30.0))
    d = draws(model, n=200)
    counts = kinds(d, OUTAGE)
    expected = 30.0 / 3600.0 * DURATION_S
    assert abs(counts.mean() - expected) < 4 * math.sqrt(expected / counts.size)
    lengths = np.concatenate([np.diff(x.breaks, axis=1).ravel() for x in d])
    assert stats.kstest(lengths, stats.lognorm(0.6, scale=3.0).cdf).pvalue > 1e-3


def test_same_generator_same_events():
    model = with_outage(event_model=events(outage_rate_per_hour=10.0, post=[0.1, 0.4, 0.5]))
    a, b = draws(model, n=3, seed=9), draws(model, n=3, seed=9)
    for x, y in zip(a, b):
        assert x.marks == y.marks and x.switches == y.switches and np.array_equal(x.breaks, y.breaks)


@pytest.mark.parametrize("kwargs, field", [
    ({"rate_per_min": -1.0}, "handover.rate_per_min"),
    ({"speed_m_s": 10.0}, "handover.speed_m_s"),
    ({"rate_per_min": 1.0, "speed_m_s": 1.0, "cell_size_m": 10.0}, "handover.rate_per_min"),
    ({"cell_size_m": 0.0, "speed_m_s": 3.0}, "handover.cell_size_m"),
    ({"failure_probability": 1.5}, "handover.failure_probability"),
    ({"loss_burst_loss": -0.1}, "handover.loss_burst_loss"),
    ({"interruption_ms": 0.0}, "handover.interruption_ms"),
    ({"times_s": (3.0, -1.0)}, "handover.times_s"),
    ({"new_level": "higher"}, "handover.new_level"),
])
def test_bad_plans_are_refused_naming_the_key(kwargs, field):
    with pytest.raises(TracegenError) as err:
        HandoverPlan(**kwargs)
    assert err.value.field == field


def test_a_failure_tilt_above_one_is_refused_before_drawing():
    model = three_levels(event_model=events(failure_probability=0.1))
    with pytest.raises(TracegenError) as err:
        check_events(model, None, TiltPlan.build(model, Tilt(failure_factor=20.0)))
    assert err.value.field == "tilt.failure_factor" and "above 1" in err.value.message
    check_events(model, None, TiltPlan.build(model, Tilt(failure_factor=10.0)))  # exactly 1 is allowed
