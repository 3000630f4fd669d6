"""Cross traffic: each check names the outside result it is held to."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from tracegen.errors import TracegenError
from tracegen.synth.crosstraffic import (CrossTraffic, _bin_step_function, _StepFn, fair_share, generate,
                                         hurst_aggregated_variance, pareto_samples, poisson_arrivals_s,
                                         superposed_onoff)


def fgn(n: int, hurst: float, rng: np.random.Generator) -> np.ndarray:
    """Fractional Gaussian noise by circulant embedding (Davies & Harte 1987), unit variance."""
    k = np.arange(n + 1.0)
    acov = 0.5 * ((k + 1) ** (2 * hurst) - 2 * k ** (2 * hurst) + np.abs(k - 1) ** (2 * hurst))
    row = np.concatenate([acov, acov[-2:0:-1]])
    lam = np.maximum(np.fft.fft(row).real, 0.0)
    z = rng.standard_normal(row.size) + 1j * rng.standard_normal(row.size)
    return np.fft.fft(np.sqrt(lam / row.size) * z).real[:n]


# --- Hurst exponent ------------------------------------------------------------------------------------

@pytest.mark.parametrize("alpha, seed", [(1.4, 7), (1.4, 8), (1.2, 7), (1.6, 7)])
def test_superposed_pareto_onoff_is_long_range_dependent(alpha, seed):
    # Taqqu, Willinger & Sherman 1997: many Pareto on/off sources with tail index 1 < alpha < 2 aggregate to
    # H = (3 - alpha)/2 (0.9, 0.8, 0.7 here); estimated by the aggregated-variance method.
    x = superposed_onoff(50, 1.0, 1.0, alpha, 1.0, 2.0**16, 1.0, np.random.default_rng(seed))
    assert x.shape == (2**16,)
    assert abs(hurst_aggregated_variance(x) - (3 - alpha) / 2) < 0.1


def test_light_tailed_onoff_is_short_range_dependent():
    # Same theorem, alpha > 2 (finite variance periods): the aggregate is short-range dependent, H = 1/2.
    # Together with the test above this separates the two regimes (0.5 vs 0.8 for alpha 1.4).
    x = superposed_onoff(50, 1.0, 1.0, 3.0, 1.0, 2.0**16, 1.0, np.random.default_rng(7))
    assert abs(hurst_aggregated_variance(x) - 0.5) < 0.1


def test_cross_traffic_onoff_load_is_long_range_dependent():
    # the on/off sources as generate() uses them (their load is the unresponsive demand)
    ct = CrossTraffic(onoff_sources=50, on_mean_s=1.0, off_mean_s=1.0, onoff_alpha=1.4, onoff_rate_bps=1e5)
    r = generate(ct, np.full(2**16, 1e9), 1.0, np.random.default_rng(7))
    assert abs(hurst_aggregated_variance(r.unresponsive_bps) - 0.8) < 0.1


def test_iid_noise_has_hurst_one_half():
    # Beran 1994 (Statistics for Long-Memory Processes): short-range dependent series have H = 1/2.
    x = np.random.default_rng(3).standard_normal(2**16)
    assert abs(hurst_aggregated_variance(x) - 0.5) < 0.05


@pytest.mark.parametrize("hurst", [0.7, 0.9])
def test_estimator_recovers_fractional_gaussian_noise(hurst):
    # fGn of known H (exact generator: Davies & Harte 1987); the aggregated-variance estimate is biased
    # slightly low at finite n (Taqqu, Teverovsky & Willinger 1995), so the tolerance is one-sided-ish.
    est = np.mean([hurst_aggregated_variance(fgn(2**15, hurst, np.random.default_rng(s))) for s in range(4)])
    assert hurst - 0.08 < est < hurst + 0.04


def test_hurst_refuses_short_or_constant_series():
    with pytest.raises(TracegenError, match="at least 1000"):
        hurst_aggregated_variance(np.ones(50))
    with pytest.raises(TracegenError, match="zero variance"):
        hurst_aggregated_variance(np.ones(5000))
    with pytest.raises(TracegenError, match="block_sizes"):
        hurst_aggregated_variance(np.arange(100.0), block_sizes=[10])


# --- on/off sources -------------------------------------------------------------------------------------

def test_onoff_sources_start_stationary():
    # Alternating renewal process (e.g. Ross, Stochastic Processes, 1996, Thm 3.4.4): in steady state a
    # source is on with probability E[on]/(E[on]+E[off]) at every time. Sources start from the residual-
    # life law, so that holds from t = 0, not only after a warm-up.
    n, on, off = 20_000, 1.0, 3.0
    x = superposed_onoff(n, on, off, 1.3, 1.0, 4.0, 0.2, np.random.default_rng(11))
    p = on / (on + off)
    sd = np.sqrt(p * (1 - p) / n)   # per-instant binomial sd; step averages vary less
    assert np.all(np.abs(x / n - p) < 5 * sd)


def test_onoff_rate_bounds_and_mean():
    x = superposed_onoff(10, 0.5, 0.5, 1.8, 2e6, 500.0, 0.1, np.random.default_rng(2))
    assert x.shape == (5000,)
    assert x.min() >= -1e-6 and x.max() <= 10 * 2e6 + 1e-6
    # mean rate = sources x rate x on share (renewal-reward theorem), loose: alpha 1.8 converges slowly
    assert abs(x.mean() / (10 * 2e6 * 0.5) - 1) < 0.1


def test_onoff_validation():
    rng = np.random.default_rng(0)
    for args, field in [((5, 1.0, 1.0, 1.0, 1e6, 10.0, 1.0), "alpha"),
                        ((5, 0.0, 1.0, 1.5, 1e6, 10.0, 1.0), "on_mean_s"),
                        ((5, 1.0, 1.0, 1.5, -1.0, 10.0, 1.0), "rate_bps"),
                        ((-1, 1.0, 1.0, 1.5, 1e6, 10.0, 1.0), "n_sources"),
                        ((5, 1.0, 1.0, 1.5, 1e6, 1.0, 10.0), "step_s")]:
        with pytest.raises(TracegenError) as info:
            superposed_onoff(*args, rng)
        assert info.value.field == field


# --- flow arrivals and sizes ---------------------------------------------------------------------------

def test_poisson_arrival_counts_per_step():
    # Poisson process: counts in disjoint steps are i.i.d. Poisson(rate x step): mean = variance = 1.5,
    # and the count histogram passes a chi-square test against scipy.stats.poisson.
    rate, step, n_steps = 3.0, 0.5, 40_000
    t = poisson_arrivals_s(rate, n_steps * step, np.random.default_rng(5))
    counts = np.bincount((t // step).astype(int), minlength=n_steps)
    lam = rate * step
    se_mean = np.sqrt(lam / n_steps)
    assert abs(counts.mean() - lam) < 4 * se_mean
    # var of the sample variance of Poisson counts ~ (mu4 - sigma^4)/n = (lam + 2 lam^2)/n
    assert abs(counts.var(ddof=1) - lam) < 4 * np.sqrt((lam + 2 * lam**2) / n_steps)
    k = np.arange(8)
    observed = np.append(np.bincount(counts, minlength=8)[:7], (counts >= 7).sum())
    expected = n_steps * np.append(stats.poisson.pmf(k[:7], lam), stats.poisson.sf(6, lam))
    assert stats.chisquare(observed, expected).pvalue > 0.001


def test_pareto_sizes_have_the_configured_mean():
    # alpha > 2: finite variance, sample mean within 4 standard errors (variance from scipy.stats.pareto).
    mean, alpha, n = 50_000.0, 3.0, 200_000
    x = pareto_samples(mean, alpha, n, np.random.default_rng(1))
    ref = stats.pareto(b=alpha, scale=mean * (alpha - 1) / alpha)
    assert ref.mean() == pytest.approx(mean)
    assert abs(x.mean() - mean) < 4 * np.sqrt(ref.var() / n)


def test_heavy_tailed_sizes_match_pareto_law():
    # alpha 1.3: the sample mean is unreliable, so check the median (binomial CI) and a KS test against
    # scipy.stats.pareto with scale x_m = mean (alpha - 1)/alpha.
    mean, alpha, n = 1e6, 1.3, 50_000
    x = pareto_samples(mean, alpha, n, np.random.default_rng(4))
    ref = stats.pareto(b=alpha, scale=mean * (alpha - 1) / alpha)
    below = int((x < ref.median()).sum())
    assert stats.binomtest(below, n, 0.5).pvalue > 0.001
    assert stats.kstest(x, ref.cdf).pvalue > 0.001


# --- fair share --------------------------------------------------------------------------------------------

def test_fair_share_with_k_flows_gives_foreground_one_over_k_plus_one():
    # max-min fair share without demand limits: k long flows + the foreground each get C/(k+1).
    cap = np.full(10, 12e6)
    for k in (1, 2, 3, 5):
        r = fair_share(cap, 0.5, np.zeros(k), np.full(k, 1e12))
        np.testing.assert_allclose(r.available_bps, 12e6 / (k + 1), rtol=1e-12)
        np.testing.assert_allclose(r.cross_bps, 12e6 * k / (k + 1), rtol=1e-12)
        np.testing.assert_allclose(r.n_responsive, k)


def test_fair_share_hand_computed_departures():
    # By hand: C = 3 Mbit/s, flows of 1 and 2 Mbit at t = 0. Three-way split (1 Mbit/s each) until the
    # small flow ends at 1 s; then 1.5 Mbit/s each, the big flow's last 1 Mbit ends at 1 + 2/3 s. Step
    # 1 s: foreground 1, (2/3 x 1.5 + 1/3 x 3) = 2, 3, 3 Mbit/s; responsive flows 2, 2/3, 0, 0 on average.
    r = fair_share(np.full(4, 3e6), 1.0, np.array([0.0, 0.0]), np.array([1e6, 2e6]) / 8)
    np.testing.assert_allclose(r.available_bps, [1e6, 2e6, 3e6, 3e6], rtol=1e-12)
    np.testing.assert_allclose(r.n_responsive, [2, 2 / 3, 0, 0], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(r.cross_bps + r.available_bps, 3e6, rtol=1e-12)


def test_fair_share_flow_stalls_while_unresponsive_load_fills_the_link():
    # By hand: C = 2 Mbit/s, unresponsive 2 Mbit/s in step 0 (nothing left), 0 after. A 1 Mbit flow from
    # t = 0 gets 0 in step 0, then 1 Mbit/s (two-way split): it ends at t = 2 s.
    r = fair_share(np.full(4, 2e6), 1.0, np.array([0.0]), np.array([1e6 / 8]),
                   unresponsive_bps=np.array([2e6, 0, 0, 0]))
    np.testing.assert_allclose(r.available_bps, [0, 1e6, 2e6, 2e6], atol=1e-6)
    np.testing.assert_allclose(r.n_responsive, [1, 1, 0, 0], atol=1e-12)


def test_unresponsive_load_above_capacity_leaves_foreground_nothing():
    cap = np.full(6, 5e6)
    r = fair_share(cap, 1.0, np.array([0.5]), np.array([1e9]), unresponsive_bps=np.array([8e6, 5e6, 9e6, 1e6, 0, 6e6]))
    hot = np.array([True, True, True, False, False, True])
    assert np.all(r.available_bps[hot] == 0.0)
    np.testing.assert_allclose(r.cross_bps[hot], 5e6)
    np.testing.assert_allclose(r.offered_bps[hot], [8e6, 5e6, 9e6, 6e6])
    assert np.all(r.available_bps[~hot] > 0)


def test_generate_unresponsive_overload_through_the_random_path():
    ct = CrossTraffic(flow_rate_per_s=20.0, size_bytes_mean=2e6, pareto_alpha=1.5, responsive_share=0.0,
                      unresponsive_rate_bps=4e6)
    cap = np.full(2000, 10e6)
    r = generate(ct, cap, 0.1, np.random.default_rng(9))
    over = r.unresponsive_bps >= cap
    assert over.any() and (~over).any()
    assert np.all(r.available_bps[over] == 0.0)
    np.testing.assert_allclose(r.cross_bps + r.available_bps, cap, rtol=1e-9)
    assert np.all(r.offered_bps >= r.cross_bps - 1e-6)
    np.testing.assert_allclose(r.n_responsive, 0.0)


def test_generate_conserves_capacity_and_is_seeded():
    ct = CrossTraffic(flow_rate_per_s=2.0, size_bytes_mean=300_000, responsive_share=0.7, onoff_sources=5)
    cap = np.random.default_rng(0).uniform(2e6, 20e6, 3000)
    a = generate(ct, cap, 0.1, np.random.default_rng(42))
    b = generate(ct, cap, 0.1, np.random.default_rng(42))
    c = generate(ct, cap, 0.1, np.random.default_rng(43))
    for name in ("cross_bps", "available_bps", "offered_bps", "n_active"):
        assert getattr(a, name).tobytes() == getattr(b, name).tobytes()
    assert a.available_bps.tobytes() != c.available_bps.tobytes()
    np.testing.assert_allclose(a.cross_bps + a.available_bps, cap, rtol=1e-9)
    assert np.all(a.available_bps >= 0) and np.all(a.available_bps <= cap)
    np.testing.assert_allclose(a.responsive_bps, a.cross_bps - np.minimum(a.unresponsive_bps, cap), atol=1e-6)
    assert np.all(a.n_active >= a.n_responsive - 1e-9)


# --- processor sharing: an independent reference and a closed form -------------------------------------------------

def ps_reference(arrive, size_bits, left, step):
    """Processor sharing in time, event by event: n flows + the foreground share left_bps equally; returns
    the per-step mean number of flows (exact integration of the count between events)."""
    n_steps = len(left)
    active = {}   # flow -> bits still to send
    t, i, k, area = 0.0, 0, 0, np.zeros(n_steps)
    arrive = list(arrive)
    while k < n_steps:
        rate = left[k] / (len(active) + 1)                 # per flow, until the step ends
        t_step = (k + 1) * step
        t_arr = arrive[i] if i < len(arrive) else math.inf
        t_dep = t + min(active.values()) / rate if active and rate > 0 else math.inf
        t_next = min(t_arr, t_dep, t_step)
        area[k] += len(active) * (t_next - t)
        for f in active:
            active[f] -= rate * (t_next - t)
        t = t_next
        if t_dep <= t_arr and t_dep <= t_step:
            del active[min(active, key=active.get)]
        elif t_arr <= t_step:
            active[i] = size_bits[i]
            i += 1
        else:
            k += 1
    return area / step


@pytest.mark.parametrize("seed", range(6))
def test_processor_sharing_matches_a_time_stepping_reference(seed):
    rng = np.random.default_rng(seed)
    n, step = int(rng.integers(20, 300)), float(rng.choice([0.1, 1.0]))
    left = rng.uniform(1e5, 1e6, n) * (rng.random(n) < 0.85)      # with stretches where nothing is left
    arrive = np.sort(rng.uniform(0, n * step, int(rng.integers(1, 40))))
    size = rng.exponential(4e5 * step, arrive.size)
    got = fair_share(left, step, arrive, size / 8.0).n_responsive
    np.testing.assert_allclose(got, ps_reference(arrive, size, left, step), rtol=1e-7, atol=1e-7)


@pytest.mark.parametrize("sizes, rho", [("exp", 0.5), ("exp", 0.7), ("pareto", 0.7)])
def test_mean_number_of_flows_matches_the_birth_death_chain(sizes, rho):
    # n flows + the foreground share C equally, so n flows finish at rate mu n/(n+1): a birth-death chain
    # with pi_n = (1 - rho)^2 (n + 1) rho^n (hand-derived), mean 2 rho/(1 - rho). Processor sharing is a
    # symmetric queue, so the mean holds for any size law (insensitivity, Kelly 1979, Reversibility and
    # Stochastic Networks, ch. 3), here also Pareto with alpha 2.5. Sampling error below 1 % at this length.
    rng = np.random.default_rng(3)
    horizon, c, mean_bytes = 400_000.0, 8e6, 1e6          # mean service 1 s at the full rate
    arrive = poisson_arrivals_s(rho * c / (8 * mean_bytes), horizon, rng)
    size = rng.exponential(mean_bytes, arrive.size) if sizes == "exp" else \
        pareto_samples(mean_bytes, 2.5, arrive.size, rng)
    r = fair_share(np.full(int(horizon), c), 1.0, arrive, size)
    assert r.n_responsive[20_000:].mean() == pytest.approx(2 * rho / (1 - rho), rel=0.03)
    # work conservation: the foreground gets what the flows leave, C (1 - rho) on average
    assert r.available_bps[20_000:].mean() == pytest.approx(c * (1 - rho), rel=0.03)


def test_step_averages_are_exact_integrals_in_any_chunking():
    # per-step averages of a step function = (integral over the step)/step, computed here from the
    # cumulative integral at the step edges; producing them chunk by chunk gives the same bytes
    rng = np.random.default_rng(2)
    times = np.concatenate([[0.0], np.sort(rng.uniform(0, 500.0, 300))])
    times[100:110] = np.round(times[100:110])        # some jumps exactly on step edges
    times = np.sort(times)
    values = rng.integers(0, 6, times.size).astype(float)
    n, step = 1000, 0.5
    got = _bin_step_function(times, values, n, step)
    edges = np.arange(n + 1) * step
    cum = np.concatenate([[0.0], np.cumsum(values[:-1] * np.diff(times))])
    j = np.searchsorted(times, edges, side="right") - 1
    np.testing.assert_allclose(got, np.diff(cum[j] + values[j] * (edges - times[j])) / step, rtol=1e-9, atol=1e-9)
    fn = _StepFn(times, values, n, step)
    pieces = np.concatenate([fn.mean(k, min(k + 137, n))[0] for k in range(0, n, 137)])
    assert pieces.tobytes() == got.tobytes()


# --- validation -----------------------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, field, numbers", [
    (dict(flow_rate_per_s=-2.0), "cross_traffic.flow_rate_per_s", "-2"),
    (dict(flow_rate_per_s=1.0, size_bytes_mean=0.0), "cross_traffic.size_bytes_mean", "0"),
    (dict(flow_rate_per_s=1.0, unresponsive_rate_bps=-5.0), "cross_traffic.unresponsive_rate_bps", "-5"),
    (dict(onoff_sources=3, onoff_rate_bps=0.0), "cross_traffic.onoff_rate_bps", "0"),
    (dict(onoff_sources=3, on_mean_s=-1.0), "cross_traffic.on_mean_s", "-1"),
    (dict(flow_rate_per_s=1.0, pareto_alpha=1.0), "cross_traffic.pareto_alpha", "1"),
    (dict(onoff_sources=3, onoff_alpha=0.5), "cross_traffic.onoff_alpha", "0.5"),
    (dict(flow_rate_per_s=1.0, responsive_share=1.5), "cross_traffic.responsive_share", "1.5"),
    (dict(flow_rate_per_s=1.0, responsive_share=-0.1), "cross_traffic.responsive_share", "-0.1"),
    (dict(onoff_sources=2.5), "cross_traffic.onoff_sources", "2.5"),
    (dict(flow_rate_per_s=1.0, responsive_probe=-0.5), "cross_traffic.responsive_probe", "-0.5"),
    (dict(flow_rate_per_s=1.0, responsive_probe=float("inf")), "cross_traffic.responsive_probe", "inf"),
    (dict(flow_rate_per_s=1.0, responsive_probe=True), "cross_traffic.responsive_probe", "True"),
    (dict(flow_rate_per_s=1.0, responsive_rtt_ms=0.0), "cross_traffic.responsive_rtt_ms", "0"),
    (dict(flow_rate_per_s="2/s"), "cross_traffic.flow_rate_per_s", "'2/s'"),
    (dict(flow_rate_per_s=float("nan")), "cross_traffic.flow_rate_per_s", "nan"),
    (dict(), "cross_traffic", "0"),
])
def test_validation_names_field_and_value(kwargs, field, numbers):
    with pytest.raises(TracegenError) as info:
        CrossTraffic(**kwargs)
    assert info.value.field == field
    assert numbers in info.value.message


def test_generate_refuses_bad_capacity():
    ct = CrossTraffic(flow_rate_per_s=1.0)
    with pytest.raises(TracegenError, match="-1"):
        generate(ct, np.array([1e6, -1.0]), 1.0, np.random.default_rng(0))
    with pytest.raises(TracegenError) as info:
        generate(ct, np.ones(3), 0.0, np.random.default_rng(0))
    assert info.value.field == "step_s"
