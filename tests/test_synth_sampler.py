"""The core sampler against outside references: scipy.stats, statsmodels, scipy.signal and closed forms.

Every model here is built in the test from known, invented parameters and goes through the validating
loader; every random input comes from the sampler itself with a fixed seed, so each check is
deterministic, and each would fail if the sampler drew from another law (some tests show that too).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter, lfiltic
from statsmodels.tsa.arima_process import arma_acf

from builders import ar, dwell
from builders import level_state as level
from builders import model as build
from tracegen import Trace, TracegenError
from tracegen.fit.loss import GilbertElliott
from tracegen.model import PathModel
from tracegen.synth import sampler
from tracegen.synth.events import HandoverPlan
from tracegen.synth.sampler import MIN_STEP_S, sample_trace, sample_traces, trace_generator

ALPHA = 1e-3  # significance of the goodness-of-fit tests (fixed seeds: each outcome is deterministic)


# Small models with known parameters (invented for these tests) come from builders.py.


# AR laws of the three states of MODEL: AR(1), AR(2), AR(3)
PHI = {0: (0.8,), 1: (0.5, 0.3), 2: (0.6, -0.3, 0.2)}
SIGMA2 = {0: 0.01, 1: 0.02, 2: 0.015}


def three_states(**kw) -> PathModel:
    states = [level(1e6, 0.3, dwell("lognormal", mu=math.log(6.0), sigma=0.6), ar_fit=ar(PHI[0], SIGMA2[0])),
              level(4e6, 0.4, dwell("gamma", shape=3.0, scale_s=3.0), ar_fit=ar(PHI[1], SIGMA2[1])),
              level(12e6, 0.3, dwell("geometric", p=0.15), ar_fit=ar(PHI[2], SIGMA2[2]))]
    return build(states, [[0, 0.7, 0.3], [0.5, 0, 0.5], [0.4, 0.6, 0]], **kw)


MODEL = three_states()


def runs(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(start index, length, value) of the runs of equal values in x."""
    cut = np.flatnonzero(x[1:] != x[:-1]) + 1
    start = np.concatenate(([0], cut))
    return start, np.diff(np.append(start, x.size)), x[start]


def stat_var(phi, sigma2) -> float:
    # Reference: the ARMA autocovariance of statsmodels (arma_acovf), gamma_0 of the AR(p) with unit innovation
    # variance times sigma2.
    from statsmodels.tsa.arima_process import arma_acovf

    return float(arma_acovf(np.r_[1.0, -np.asarray(phi)], np.array([1.0]), nobs=1, sigma2=sigma2)[0])


@pytest.fixture(scope="module")
def long_path():
    """100 000 s of MODEL at its own step: one sample per model step, no events."""
    return sample_trace(MODEL, 100_000.0, 1.0, trace_generator(11, 0))


# --------------------------------------------------------------------------------------------------
# Levels: stationary marginals, AR autocorrelation, exact restarts


def test_log_bandwidth_per_state_follows_the_stationary_ar_law(long_path):
    # Every segment restarts its AR residual from the stationary law, so the first sample of each segment
    # is an independent draw of N(mean, gamma_0): one value per segment gives i.i.d. samples for a KS test.
    # Reference: scipy.stats.kstest against scipy.stats.norm; gamma_0 from statsmodels arma_acovf.
    s = long_path
    start, _, state = runs(s.state)
    first = np.log(s.bandwidth_bps[start])
    for k, st in enumerate(MODEL.states):
        x = first[state == k]
        assert x.size > 2000
        sd = math.sqrt(stat_var(PHI[k], SIGMA2[k]))
        assert sd == pytest.approx(math.sqrt(st.ar.stationary_variance), rel=1e-9)
        assert stats.kstest(x, "norm", args=(st.mean[0], sd)).pvalue > ALPHA
    # the test has power: the innovation sd alone (a plausible bug) is rejected for the strong AR(1) state
    x0 = first[state == 0]
    assert stats.kstest(x0, "norm", args=(MODEL.states[0].mean[0], math.sqrt(SIGMA2[0]))).pvalue < ALPHA


def test_ar_residual_autocorrelation_matches_statsmodels(long_path):
    # Reference: statsmodels.tsa.arima_process.arma_acf of each state's AR polynomial. Sample ACF pooled over
    # the pairs that lie inside one segment (segments are independent restarts); known mean (the state's).
    s = long_path
    start, length, state = runs(s.state)
    seg = np.repeat(np.arange(start.size), length)
    for k, st in enumerate(MODEL.states):
        x = np.log(s.bandwidth_bps) - st.mean[0]
        mine = np.repeat(state == k, length)
        var = np.mean(x[mine] ** 2)
        lags = 6
        sample = [1.0]
        for lag in range(1, lags):
            pair = mine[:-lag] & (seg[:-lag] == seg[lag:])
            sample.append(np.mean(x[:-lag][pair] * x[lag:][pair]) / var)
        ref = arma_acf(np.r_[1.0, -np.asarray(PHI[k])], np.array([1.0]), lags=lags)
        np.testing.assert_allclose(sample, ref, atol=0.03)


def test_restarted_ar_equals_scipy_lfilter_per_segment():
    # Reference: scipy.signal.lfilter run on each segment alone, its initial state from scipy.signal.lfiltic of
    # the segment's pre-sample values. The sampler filters all segments at once and corrects their starts.
    plan = sampler._build_plan(MODEL, None)
    lengths = np.array([1, 2, 3, 7, 40, 1, 250, 5])
    for k in range(3):
        lv = plan.levels[k]
        out = sampler._ar_residuals(lv, np.random.default_rng(3), lengths)
        rng = np.random.default_rng(3)   # the same draws in the same order: innovations, then pre-samples
        e = math.sqrt(SIGMA2[k]) * rng.standard_normal(int(lengths.sum()))
        w = rng.standard_normal((lengths.size, len(PHI[k]))) @ lv.chol.T
        a = np.r_[1.0, -np.asarray(PHI[k])]
        ref = np.concatenate([lfilter([1.0], a, part, zi=lfiltic([1.0], a, w[j]))[0]
                              for j, part in enumerate(np.split(e, np.cumsum(lengths)[:-1]))])
        np.testing.assert_allclose(out, ref, rtol=1e-10, atol=1e-12)


# --------------------------------------------------------------------------------------------------
# Dwell times


@pytest.mark.parametrize("family,params", [("geometric", {"p": 0.2}),
                                           ("lognormal", {"mu": math.log(4.0), "sigma": 0.7}),
                                           ("gamma", {"shape": 2.5, "scale_s": 2.0})])
def test_dwell_runs_follow_the_discretised_family(family, params):
    # The fit reads a dwell X as k = ceil(X / step) steps (dwell.py), so at the model step the runs of a state
    # must follow P(k) = F(k) - F(k - 1) (k >= 2), P(1) = F(1), F the continuous family's cdf.
    # Reference: scipy.stats.geom / lognorm / gamma, compared by scipy.stats.chisquare.
    m = build([level(1e6, 0.5, dwell(family, **params), sd=0.1),
               level(5e6, 0.5, dwell("geometric", p=0.5), sd=0.1)], [[0, 1], [1, 0]])
    s = sample_trace(m, 60_000.0, 1.0, trace_generator(5, 0))
    _, length, state = runs(s.state)
    k = length[:-1][state[:-1] == 0]          # the last run is cut by the trace's end
    assert k.size > 3000
    top = 14
    edges = np.arange(1, top + 1)
    if family == "geometric":
        pmf = stats.geom.pmf(edges, params["p"])
    else:
        dist = stats.lognorm(params["sigma"], scale=math.exp(params["mu"])) if family == "lognormal" \
            else stats.gamma(params["shape"], scale=params["scale_s"])
        pmf = np.diff(np.r_[0.0, dist.cdf(edges)])
    expected = np.r_[pmf[:-1], 1.0 - pmf[:-1].sum()] * k.size   # k = 1..top-1 and a tail k >= top
    observed = np.r_[np.bincount(np.minimum(k, top), minlength=top + 1)[1:top]]
    observed = np.r_[observed, np.sum(k >= top)]
    assert expected.min() > 5
    assert stats.chisquare(observed, expected).pvalue > ALPHA
    if family != "geometric":
        # power: rounding down instead (k = max(floor(X), 1), half a step short on average) is rejected
        floor_pmf = np.diff(np.r_[0.0, dist.cdf(edges + 1)])
        wrong = np.r_[floor_pmf[:-1], 1.0 - floor_pmf[:-1].sum()] * k.size
        assert stats.chisquare(observed, wrong).pvalue < ALPHA


# --------------------------------------------------------------------------------------------------
# Loss and RTT


P_GE, R_GE, GOOD, BAD = 0.05, 0.25, 0.01, 0.3


def ge_model(**state_kw) -> PathModel:
    ge = GilbertElliott(P_GE, R_GE, GOOD, BAD)
    return build([level(2e6, 0.5, dwell("geometric", p=0.1), **state_kw),
                  level(8e6, 0.5, dwell("geometric", p=0.1), **state_kw)], [[0, 1], [1, 0]], loss=ge)


def test_gilbert_elliott_stationary_loss_and_burst_length():
    # Closed forms (Gilbert 1960, Elliott 1963): bad share pi = p/(p+r), loss pi*loss_bad + (1-pi)*loss_good,
    # mean bad burst 1/r steps. Standard errors: a two-state chain's lag-k correlation is (1-p-r)^k, so the
    # variance of a mean of N steps is var * (1 + lam) / (1 - lam) / N; a burst length is geometric, var (1-r)/r^2.
    m = ge_model()
    n = 200_000
    s = sample_trace(m, float(n), 1.0, trace_generator(21, 0))
    pi = P_GE / (P_GE + R_GE)
    want = pi * BAD + (1 - pi) * GOOD
    lam = 1 - P_GE - R_GE
    se = math.sqrt((BAD - GOOD) ** 2 * pi * (1 - pi) * (1 + lam) / (1 - lam) / n)
    assert abs(s.loss.mean() - want) < 4 * se
    start, length, value = runs(s.loss)
    bursts = length[1:-1][value[1:-1] == BAD]
    se_b = math.sqrt((1 - R_GE) / R_GE**2 / bursts.size)
    assert abs(bursts.mean() - 1 / R_GE) < 4 * se_b
    # the chain steps once per model step whatever the output step: at 100 ms a burst lasts 1/r seconds
    f = sample_trace(m, 20_000.0, 0.1, trace_generator(22, 0))
    _, length, value = runs(f.loss)
    secs = length[1:-1][value[1:-1] == BAD] * 0.1
    assert abs(secs.mean() - 1 / R_GE) < 4 * math.sqrt((1 - R_GE) / R_GE**2 / secs.size)


def test_state_loss_means_are_kept_under_the_chain():
    # With a state loss_mean the chain modulates it: b = min(1, c loss_bad), a = (loss_mean - pi b)/(1 - pi),
    # so pi b + (1 - pi) a = loss_mean exactly (closed form), and each state's long-run mean is its loss_mean.
    ge = GilbertElliott(P_GE, R_GE, GOOD, BAD)
    m = build([level(2e6, 0.5, dwell("geometric", p=0.1), loss_mean=0.002),
               level(8e6, 0.5, dwell("geometric", p=0.1), loss_mean=0.05)], [[0, 1], [1, 0]], loss=ge)
    n = 200_000
    s = sample_trace(m, float(n), 1.0, trace_generator(23, 0))
    pi = P_GE / (P_GE + R_GE)
    lam = 1 - P_GE - R_GE
    for k, mean in enumerate((0.002, 0.05)):
        c = mean / (pi * BAD + (1 - pi) * GOOD)
        b = min(1.0, c * BAD)
        a = (mean - pi * b) / (1 - pi)
        x = s.loss[s.state == k]
        np.testing.assert_allclose(np.unique(x), sorted({a, b}), rtol=1e-12)
        se = math.sqrt((b - a) ** 2 * pi * (1 - pi) * (1 + lam) / (1 - lam) / x.size)
        assert abs(x.mean() - mean) < 5 * se


def test_joint_rtt_conditional_slope_is_recovered():
    # Conditional Gaussian: E[log RTT | log bw] = mean_rtt + cov01/cov00 (log bw - mean_bw), residual sd
    # sqrt(cov11 - cov01^2/cov00). Reference: least squares by scipy.stats.linregress within each state.
    joints = [(math.log(80.0), -0.01, 0.02), (math.log(40.0), 0.006, 0.01)]
    m = build([level(2e6, 0.5, dwell("geometric", p=0.05), ar_fit=ar((0.6,), 0.02), rtt_joint=joints[0]),
               level(8e6, 0.5, dwell("geometric", p=0.05), sd=0.15, rtt_joint=joints[1])], [[0, 1], [1, 0]])
    s = sample_trace(m, 100_000.0, 1.0, trace_generator(31, 0))
    for k, (mu, c01, c11) in enumerate(joints):
        sel = s.state == k
        x, y = np.log(s.bandwidth_bps[sel]), np.log(s.rtt_ms[sel])
        fit = stats.linregress(x, y)
        c00 = m.states[k].cov[0][0]
        assert abs(fit.slope - c01 / c00) < 4 * fit.stderr
        resid = y - fit.intercept - fit.slope * x
        assert resid.std() == pytest.approx(math.sqrt(c11 - c01**2 / c00), rel=0.02)
        assert y.mean() == pytest.approx(mu, abs=0.01)


# --------------------------------------------------------------------------------------------------
# Grid: any output step, coarser steps average the rates


def test_coarser_output_averages_the_model_step_samples():
    # With r = 3 model steps per output sample the base grid is the model grid, and the same seed draws the
    # same base samples: bandwidth and loss are the means of each three, RTT and state the first of them.
    m = three_states(loss=GilbertElliott(P_GE, R_GE, GOOD, BAD))
    fine = sample_trace(m, 3000.0, 1.0, trace_generator(41, 0))
    coarse = sample_trace(m, 3000.0, 3.0, trace_generator(41, 0))
    np.testing.assert_allclose(coarse.bandwidth_bps, fine.bandwidth_bps.reshape(-1, 3).mean(1), rtol=1e-12)
    np.testing.assert_allclose(coarse.loss, fine.loss.reshape(-1, 3).mean(1), rtol=1e-12)
    np.testing.assert_array_equal(coarse.rtt_ms, fine.rtt_ms[::3])
    np.testing.assert_array_equal(coarse.state, fine.state[::3])
    np.testing.assert_array_equal(coarse.t_s, np.arange(1000) * 3.0)


@pytest.mark.parametrize("step", [MIN_STEP_S, 0.013, 0.37, 1.0, 1.7, 2.5])
def test_any_step_from_10_ms_gives_a_valid_trace(step):
    s = sample_trace(MODEL, 120.0, step, trace_generator(42, 0))
    n = math.ceil(120.0 / step - 1e-9)
    assert len(s) == n
    np.testing.assert_array_equal(s.t_s, np.arange(n) * step)
    Trace.from_columns(s.t_s, bandwidth_bps=s.bandwidth_bps, rtt_ms=s.rtt_ms, loss=s.loss, jitter_ms=s.jitter_ms,
                       state=s.state, event=list(s.event))  # validates every column
    assert s.state.dtype == np.int64 and set(np.unique(s.state)) <= {0, 1, 2}
    # held values: below the model step a level holds for a whole step (1 s = 1/step samples)
    if step < 1.0:
        _, length, _ = runs(s.bandwidth_bps)
        assert np.median(length) >= math.floor(1.0 / step)


# --------------------------------------------------------------------------------------------------
# Determinism


def test_same_seed_same_bytes_and_trace_i_is_independent_of_the_run():
    a = sample_traces(MODEL, 3, 300.0, 0.05, seed=7)
    b = sample_traces(MODEL, 3, 300.0, 0.05, seed=7)
    late = sample_traces(MODEL, 1, 300.0, 0.05, seed=7, start=2)[0]
    other = sample_traces(MODEL, 3, 300.0, 0.05, seed=8)
    for x, y in zip(a, b):
        for col in ("t_s", "bandwidth_bps", "rtt_ms", "loss", "jitter_ms", "state"):
            assert getattr(x, col).tobytes() == getattr(y, col).tobytes()
        assert list(x.event) == list(y.event)
    assert a[2].bandwidth_bps.tobytes() == late.bandwidth_bps.tobytes()
    assert a[2].loss.tobytes() == late.loss.tobytes()
    assert a[0].bandwidth_bps.tobytes() != a[1].bandwidth_bps.tobytes()
    assert all(x.bandwidth_bps.tobytes() != y.bandwidth_bps.tobytes() for x, y in zip(a, other))


# --------------------------------------------------------------------------------------------------
# Events


def test_breaks_spikes_bursts_and_explicit_handovers_are_applied():
    # Interruptions of exactly 0.5 s (zero spread) at 10 s and 25.5 s; spike and burst by events.py's
    # definitions: RTT + peak (end - t)/(end - start) over [resume, resume + decay), loss >= burst level.
    m = three_states()
    plan = dict(times_s=(10.0, 25.5), interruption_ms=500.0, interruption_sigma_log=0.0, failure_probability=0.0,
                rtt_spike_decay_s=2.0, loss_burst_s=1.0, loss_burst_loss=0.5, new_level="keep")
    step = 0.1
    with_spike = sample_trace(m, 60.0, step, trace_generator(51, 0), handover=HandoverPlan(rtt_spike_ms=200.0, **plan))
    without = sample_trace(m, 60.0, step, trace_generator(51, 0), handover=HandoverPlan(rtt_spike_ms=0.0, **plan))
    for t in (10.0, 25.5):
        i = round(t / step)
        assert with_spike.event[i] == "handover"
        down = slice(i, i + 5)                      # [t, t + 0.5)
        assert np.all(with_spike.bandwidth_bps[down] == 0) and np.all(with_spike.loss[down] == 1)
        assert np.all(np.isnan(with_spike.rtt_ms[down]))
        assert with_spike.bandwidth_bps[i + 5] > 0 and with_spike.bandwidth_bps[i - 1] > 0
        after = np.arange(i + 5, i + 25)            # [t + 0.5, t + 2.5): the spike decays linearly
        tt = after * step
        np.testing.assert_allclose(with_spike.rtt_ms[after] - without.rtt_ms[after],
                                   200.0 * (t + 2.5 - tt) / 2.0, rtol=1e-9)
        assert np.all(with_spike.loss[i + 5:i + 15] >= 0.5)
    marked = np.flatnonzero(with_spike.event != None)  # noqa: E711  (object array: elementwise)
    np.testing.assert_array_equal(marked, [100, 255])
    # new_level="keep": apart from the event windows the two runs are the same draws
    np.testing.assert_array_equal(with_spike.state, without.state)


def test_failures_are_marked_and_outages_break_the_link():
    m = three_states()
    s = sample_trace(m, 100.0, 0.5, trace_generator(52, 0),
                     handover=HandoverPlan(times_s=(20.0,), failure_probability=1.0, failure_outage_s=3.0,
                                           failure_sigma_log=0.0))
    assert s.event[40] == "handover-failure"
    assert np.all(s.bandwidth_bps[40:46] == 0) and s.bandwidth_bps[46] > 0


# --------------------------------------------------------------------------------------------------
# Bad input


@pytest.mark.parametrize("kw,field", [
    (dict(step_s=0.005), "step_s"), (dict(step_s=0.0), "step_s"), (dict(step_s=float("nan")), "step_s"),
    (dict(duration_s=0.0), "duration_s"), (dict(duration_s=-5.0), "duration_s"),
    (dict(duration_s=float("inf")), "duration_s"),
    (dict(start_state=3), "start_state"), (dict(start_state=-1), "start_state"),
    (dict(start_state=True), "start_state"), (dict(start_state=1.0), "start_state"),
    (dict(handover={"rate_per_min": 1}), "handover"),
])
def test_bad_input_names_the_field(kw, field):
    args = dict(duration_s=60.0, step_s=0.1)
    args.update({k: v for k, v in kw.items() if k in args})
    extra = {k: v for k, v in kw.items() if k not in args}
    with pytest.raises(TracegenError) as err:
        sample_trace(MODEL, args["duration_s"], args["step_s"], trace_generator(1, 0), **extra)
    assert err.value.field == field
    assert field in str(err.value)


def test_bad_counts_and_seeds_name_the_field():
    with pytest.raises(TracegenError, match="count"):
        sample_traces(MODEL, 0, 10.0, 1.0, seed=1)
    with pytest.raises(TracegenError, match="seed"):
        trace_generator(-1, 0)
    with pytest.raises(TracegenError, match="start"):
        sample_traces(MODEL, 1, 10.0, 1.0, seed=1, start=-2)


def test_start_state_is_the_first_state():
    for k in range(3):
        assert sample_trace(MODEL, 30.0, 1.0, trace_generator(60, k), start_state=k).state[0] == k


@pytest.mark.parametrize("family, params, mean_residual", [
    # renewal theory: the equilibrium residual has density S(x)/E[X] and mean E[X^2] / (2 E[X]);
    # lognormal: E[X^2]/(2E[X]) = exp(mu + 3 sigma^2 / 2) / 2; gamma: (shape + 1) scale / 2
    ("lognormal", {"mu": math.log(10.0), "sigma": 0.8}, math.exp(math.log(10.0) + 1.5 * 0.64) / 2.0),
    ("gamma", {"shape": 2.5, "scale_s": 6.0}, 3.5 * 6.0 / 2.0),
])
def test_residual_dwell_has_the_equilibrium_law(family, params, mean_residual):
    from scipy.integrate import cumulative_trapezoid

    fit = dwell(family, **params)
    x = fit.sample_residual_s(np.random.default_rng(8), 20_000)
    assert abs(x.mean() - mean_residual) < 4 * x.std() / math.sqrt(x.size)
    ref = stats.lognorm(params["sigma"], scale=math.exp(params["mu"])) if family == "lognormal" else \
        stats.gamma(params["shape"], scale=params["scale_s"])
    grid = np.linspace(0.0, ref.ppf(1 - 1e-9), 200_001)
    cdf = cumulative_trapezoid(ref.sf(grid), grid, initial=0.0) / ref.mean()  # F_e(x) = int_0^x S / E[X]
    assert stats.kstest(x, lambda v: np.interp(v, grid, cdf)).pvalue > ALPHA


def test_a_trace_starts_in_steady_state():
    # stationarity: the state and the time to the next jump seen at t = 0 have the same law as at a
    # later time t = 200 s (semi-Markov renewal argument: both are the equilibrium law)
    shares = np.array([20.0 * math.exp(0.405), 30.0])  # time shares: mean dwells exp(mu + sigma^2/2), 2 x 15
    shares /= shares.sum()
    m = build([level(1e6, float(shares[0]), dwell("lognormal", mu=math.log(20.0), sigma=0.9)),
               level(5e6, float(shares[1]), dwell("gamma", shape=2.0, scale_s=15.0))], [[0, 1], [1, 0]])
    rng = np.random.default_rng(21)
    first, later, s0, s_mid = [], [], [], []
    for _ in range(1500):
        s = sample_trace(m, 400.0, 1.0, rng)
        jumps = np.flatnonzero(np.diff(s.state)) + 1
        after = jumps[jumps > 200]
        if not jumps.size or not after.size:
            continue
        first.append(jumps[0])
        later.append(after[0] - 200)
        s0.append(s.state[0])
        s_mid.append(s.state[200])
    assert stats.ks_2samp(first, later).pvalue > ALPHA  # scipy.stats two-sample KS
    table = np.array([np.bincount(s0, minlength=2), np.bincount(s_mid, minlength=2)])
    assert stats.chi2_contingency(table).pvalue > ALPHA
    assert stats.binomtest(int(np.sum(np.array(s0) == 0)), len(s0), shares[0]).pvalue > ALPHA
