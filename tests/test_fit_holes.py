"""Coverage holes: the outage-entry slope on the slow level (fit/holes.py) and the sampler's use of it."""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy import linalg, stats

from builders import with_outage
import tracegen
from tracegen import Trace
from tracegen.fit.holes import (block_entries, fit_outage_slope, outage_entry_rate, poisson_slope, rate_weight_map,
                                weighted_jumps)
from tracegen.fit.prepare import prepare
from tracegen.fit.slow import SlowFit
from tracegen.model import ModelError, PathModel
from tracegen.synth import sampler


def test_poisson_slope_is_statsmodels_poisson_glm_with_an_exposure_offset():
    import statsmodels.api as sm

    rng = np.random.default_rng(1)
    x = rng.normal(0.0, 0.7, 800)
    exposure = rng.integers(20, 61, 800).astype(float)
    counts = rng.poisson(exposure * np.exp(-4.0 - 1.2 * x))
    a, b, ll, ll0 = poisson_slope(counts, exposure, x)
    ref = sm.GLM(counts, sm.add_constant(x), family=sm.families.Poisson(), offset=np.log(exposure)).fit()
    null = sm.GLM(counts, np.ones((x.size, 1)), family=sm.families.Poisson(), offset=np.log(exposure)).fit()
    assert a == pytest.approx(ref.params[0], abs=1e-6)
    assert b == pytest.approx(ref.params[1], abs=1e-6)
    # ours leave out log(count!), the same in both: the likelihood-ratio statistic is statsmodels'
    assert ll - ll0 == pytest.approx(ref.llf - null.llf, rel=1e-8)


def _trace_with_entries(rng: np.random.Generator, level_per_block: np.ndarray, slope: float, rate_per_s: float,
                        per: int = 60) -> tuple[Trace, np.ndarray]:
    """A 1 s trace whose one-sample outages start at rate rate_per_s exp(slope x_block) (a plain loop over
    samples: the reference generator), and the per-sample slow level it was made from."""
    bw, slow = [], []
    for x in level_per_block:
        p = rate_per_s * math.exp(slope * x)
        prev_out = False
        for _ in range(per):
            out = (not prev_out) and rng.random() < p
            bw.append(0.0 if out else 5e6 * math.exp(x))
            slow.append(x)
            prev_out = out
    bw = np.array(bw)
    return Trace.from_columns(np.arange(bw.size, dtype=float), bandwidth_bps=bw), np.array(slow)


def test_fit_recovers_the_slope_of_its_own_law_and_finds_none_without_one():
    rng = np.random.default_rng(5)
    made = [_trace_with_entries(rng, rng.normal(0.0, 0.6, 40), -1.3, 0.02) for _ in range(12)]
    prep = prepare([t for t, _ in made], step_s=1.0)
    slope = fit_outage_slope(prep, [s for _, s in made], 60.0)
    c, e, x = block_entries(prep, [s for _, s in made], 60.0)
    # the standard error of the slope from the Fisher information of the Poisson GLM
    mu = e * (c.sum() / e.sum()) * np.exp(-1.3 * (x - x.mean()))
    se = 1.0 / math.sqrt(float(np.sum(mu * (x - np.average(x, weights=mu)) ** 2)))
    assert slope == pytest.approx(-1.3, abs=4 * se)
    flat = [_trace_with_entries(rng, rng.normal(0.0, 0.6, 40), 0.0, 0.02) for _ in range(12)]
    prep = prepare([t for t, _ in flat], step_s=1.0)
    assert fit_outage_slope(prep, [s for _, s in flat], 60.0) == 0.0   # BIC keeps no slope
    quiet = [_trace_with_entries(rng, rng.normal(0.0, 0.6, 10), -1.3, 1e-4) for _ in range(2)]
    prep = prepare([t for t, _ in quiet], step_s=1.0)
    assert fit_outage_slope(prep, [s for _, s in quiet], 60.0) == 0.0   # too few entries to say


def test_entry_rate_is_the_renewal_reward_rate_of_the_semi_markov_chain():
    # an alternating renewal process (outage, level, outage, ...) enters an outage once per cycle:
    # rate 1 / (d_out + d_level) (renewal-reward theorem; Ross, Stochastic Processes, 2nd ed., 3.6)
    assert outage_entry_rate(np.array([[0.0, 1.0], [1.0, 0.0]]), 0, np.array([2.0, 18.0]), np.ones(1))[0] == \
        pytest.approx(1 / 20.0)
    # three states: the embedded chain's stationary law from scipy's null space, the rate by the same theorem
    p = np.array([[0.0, 0.6, 0.4], [0.2, 0.0, 0.8], [0.1, 0.9, 0.0]])
    d = np.array([2.0, 10.0, 16.0])
    for w in (0.3, 1.0, 4.0):
        pw = weighted_jumps(p, 0, np.array([w]))[0]
        assert pw[1, 0] == pytest.approx(0.2 * w / (0.8 + 0.2 * w))
        assert pw[1, 2] == pytest.approx(0.8 / (0.8 + 0.2 * w))
        f = linalg.null_space(pw.T - np.eye(3))[:, 0]
        f = f / f.sum()
        assert outage_entry_rate(p, 0, d, np.array([w]))[0] == pytest.approx(f @ pw[:, 0] / (f @ d), rel=1e-10)


def test_the_weights_give_the_fitted_rate_slope_and_keep_the_long_run_rate():
    p = np.array([[0.0, 0.6, 0.4], [0.3, 0.0, 0.7], [0.05, 0.95, 0.0]])
    d = np.array([2.0, 10.0, 16.0])
    offsets, weights, spread = np.array([-0.8, 0.1, 0.6]), np.array([0.2, 0.5, 0.3]), 0.35
    s_nodes, log_w = rate_weight_map(-1.5, offsets, weights, spread, p, 0, d)
    # the renewal-reward rate of the chain weighted by w(s) is c exp(-1.5 s): its log is linear in s, up to
    # the most the chain can do (every jump into the outage: 0.0694 per s here, reached near s = -1.5)
    s = np.linspace(-1.25, 1.5, 12)
    rate = outage_entry_rate(p, 0, d, np.exp(np.interp(s, s_nodes, log_w)))
    assert np.diff(np.log(rate)) / np.diff(s) == pytest.approx(np.full(11, -1.5), abs=2e-3)
    # the plain weight exp(-1.5 s) would not: state 1 already jumps to the outage with 0.3, so a
    # renormalised row saturates and the rate follows a flatter slope at low levels
    plain = outage_entry_rate(p, 0, d, np.exp(-1.5 * s))
    assert (np.log(plain[1]) - np.log(plain[0])) / (s[1] - s[0]) > -1.3
    # Monte Carlo over the slow level's own law (not the quadrature the map uses): the long-run rate stays
    rng = np.random.default_rng(3)
    s = offsets[rng.choice(3, 200_000, p=weights)] + math.sqrt(spread) * rng.standard_normal(200_000)
    rate = outage_entry_rate(p, 0, d, np.exp(np.interp(s, s_nodes, log_w))).mean()
    assert rate == pytest.approx(outage_entry_rate(p, 0, d, np.ones(1))[0], rel=0.01)
    assert rate_weight_map(0.0, offsets, weights, spread, p, 0, d)[0].size == 0


def test_a_rate_beyond_reach_is_clipped_to_the_chain_s_limits():
    # a two-state chain cannot enter its outage more often than once per cycle of the two dwells
    # (renewal-reward, as above): at a steep slope the lowest levels ask for more and get the limit
    p = np.array([[0.0, 1.0], [0.5, 0.5]])
    d = np.array([5.0, 5.0])
    s_nodes, log_w = rate_weight_map(-4.0, np.array([0.0]), np.array([1.0]), 0.5, p, 0, d)
    rate = outage_entry_rate(p, 0, d, np.exp(np.interp(np.array([-3.0, 3.0]), s_nodes, log_w)))
    assert rate[0] <= 1 / 10.0 * (1 + 1e-9) and rate[0] == pytest.approx(1 / 10.0, rel=1e-3)
    assert np.all(np.isfinite(log_w)) and np.all(np.diff(log_w) <= 0)   # w falls as the level rises


def _holes_model(slope: float = -1.5) -> PathModel:
    slow = SlowFit(60.0, 15.0, 0.3, 0.3, 120.0, 0.01, 0.0, 0.0, 100, 3, (-0.6, 0.0, 0.6), (0.3, 0.4, 0.3), 0.05,
                   slope)
    return PathModel.from_dict(json.loads(dataclasses.replace(with_outage(), slow=slow).to_json()))


def _jump_counts(model: PathModel, n_walks: int, end_s: float, seed: int, tilt=None):
    """Outage entries and all jumps out of level state 1, split by the weight in force; plus llr per walk."""
    plan = sampler._build_plan(model, tilt)
    rng = np.random.default_rng(seed)
    counts = {}
    llrs = []
    for _ in range(n_walks):
        starts, states, llr = sampler._state_path(plan, model, rng, end_s, None, [], HOLE)
        llrs.append(llr)
        prev, nxt, t = states[:-1], states[1:], starts[1:]
        for key, w in (("low", 5.0), ("high", 0.2)):
            sel = (prev == 1) & (HOLE.at(t) == w)
            counts.setdefault(key, [0, 0, 0])
            counts[key][0] += int(np.sum(nxt[sel] == 0))
            counts[key][1] += int(np.sum(nxt[sel] == 2))
            counts[key][2] += int(sel.sum())
    return counts, np.array(llrs)


def _two_levels(t: np.ndarray) -> np.ndarray:
    # a coverage hole for the first 600 s of every 1200 s
    return np.where(np.asarray(t) % 1200.0 < 600.0, 5.0, 0.2)


HOLE = sampler._HoleWeights(_two_levels(np.arange(3601.0)), 1.0)   # the weights on a 1 s grid


def test_each_jump_enters_an_outage_with_the_weighted_probability_at_its_own_time():
    model = _holes_model()
    counts, _ = _jump_counts(model, 60, 3600.0, 11)
    for key, w in (("low", 5.0), ("high", 0.2)):
        to_out, to_two, n = counts[key]
        p = 0.2 * w / (0.8 + 0.2 * w)     # the outage column 0.2 weighted by w, the row renormalised
        # binomial: within 4 standard deviations
        assert abs(to_out - n * p) < 4 * math.sqrt(n * p * (1 - p)) + 1
        assert to_out + to_two == n       # the rest goes to the only other state


def test_the_walk_gives_the_law_of_a_plain_reference_walk():
    # the reference: a plain loop with its own draws, one jump at a time, deciding each at its own time
    model = _holes_model()
    plan = sampler._build_plan(model, None)
    p = np.array(model.jumps)
    rng = np.random.default_rng(8)

    def plain_walk(end_s: float) -> int:
        state = int(np.searchsorted(np.cumsum(plan.tilt.start_q), rng.random(), side="right"))
        t = math.ceil(float(plan.tilt.dwell_q[state].sample_residual_s(rng)))
        entries = 0
        while t < end_s:
            w = float(_two_levels(np.array([t]))[0])
            row = p[state].copy()
            row[0] *= w
            state = int(np.searchsorted(np.cumsum(row / row.sum())[:-1], rng.random(), side="right"))
            entries += state == 0
            t += max(math.ceil(float(plan.tilt.dwell_q[state].sample_s(rng, 1)[0]) - 1e-9), 1)
        return entries

    ref = np.array([plain_walk(2400.0) for _ in range(300)])
    ours = []
    for _ in range(300):
        _, states, _ = sampler._state_path(plan, model, rng, 2400.0, None, [], HOLE)
        ours.append(int(np.sum(states[1:] == 0)))
    ours = np.array(ours)
    # Welch's t test of equal means and a two-sample KS test of the whole count distribution (scipy.stats)
    assert stats.ttest_ind(ours, ref, equal_var=False).pvalue > 0.001
    assert stats.ks_2samp(ours, ref).pvalue > 0.001
    # a switch (a handover's new state) restarts the walk at its time in its state
    starts, states, _ = sampler._state_path(plan, model, rng, 2400.0, None, [(1000.0, 2)], HOLE)
    assert np.all(np.diff(starts) > 0) and states[starts == 1000.0].tolist() == [2]


def test_a_tilted_walk_keeps_its_importance_weights_exact():
    from tracegen.synth.tilt import Tilt

    model = _holes_model()
    tilted = sampler._build_plan(model, Tilt(state_weights=(1.3, 1.0, 1.0)))   # favours outages
    plain = sampler._build_plan(model, None)
    rng = np.random.default_rng(22)
    weight, est, base = [], [], []
    for _ in range(1500):
        _, states, llr = sampler._state_path(tilted, model, rng, 600.0, None, [], HOLE)
        weight.append(math.exp(llr))
        est.append(math.exp(llr) * np.sum(states[1:] == 0))
        _, states, _ = sampler._state_path(plain, model, rng, 600.0, None, [], HOLE)
        base.append(np.sum(states[1:] == 0))
    weight, est, base = np.array(weight), np.array(est), np.array(base)
    # importance sampling: E_q[p/q] = 1 and E_q[f p/q] = E_p[f], each within 4 standard errors
    assert abs(weight.mean() - 1.0) < 4 * weight.std() / math.sqrt(weight.size)
    se = math.sqrt(est.var() / est.size + base.var() / base.size)
    assert abs(est.mean() - base.mean()) < 4 * se
    assert np.mean(est / np.maximum(weight, 1e-300)) > base.mean() * 1.05   # the tilt did favour outages


def test_sampled_traces_bunch_their_outages_and_keep_their_rate():
    model = _holes_model(-2.0)
    flat = dataclasses.replace(model, slow=dataclasses.replace(model.slow, outage_slope=0.0))
    per_trace = {}
    for name, m in (("holes", model), ("flat", flat)):
        made = sampler.sample_traces(m, 150, 1800.0, 1.0, seed=4)
        per_trace[name] = np.array([np.sum((t.state[1:] == 0) & (t.state[:-1] != 0)) for t in made])
    h, f = per_trace["holes"], per_trace["flat"]
    se = math.sqrt(h.var() / h.size + f.var() / f.size)
    assert abs(h.mean() - f.mean()) < 4 * se          # the norm keeps the rate
    # overdispersion across traces: the F test of equal variances (scipy.stats.f) rejects at 0.1 %
    assert stats.f.sf(h.var(ddof=1) / f.var(ddof=1), h.size - 1, f.size - 1) < 0.001


def test_the_slope_goes_through_json_and_a_bad_one_is_refused():
    model = _holes_model(-1.25)
    again = PathModel.from_dict(json.loads(model.to_json()))
    assert again.slow.outage_slope == -1.25 and again.to_json() == model.to_json()
    assert "coverage holes: outage entries x3.49 per unit lower slow level" in model.summary_text()  # e^1.25
    d = json.loads(model.to_json())
    d["slow"]["outage_slope"] = "steep"
    with pytest.raises(ModelError, match="slow.outage_slope"):
        PathModel.from_dict(d)
    d = json.loads(model.to_json())   # a version 2 file: a slow part without a slope, read as none
    d["schema_version"] = 2
    d["slow"].pop("outage_slope")
    assert PathModel.from_dict(d).slow.outage_slope == 0.0


def _field_like(rng: np.random.Generator, n_traces: int, duration_s: int, slope: float) -> list[Trace]:
    """Test-only generator with plain loops: offset + OU drift + noise in log bandwidth, and outages of 1-3 s
    that start at 0.01 exp(slope (u + s(t))) per level second."""
    out = []
    phi = math.exp(-1.0 / 150.0)
    for _ in range(n_traces):
        u, s = rng.normal(0.0, 0.6), rng.normal(0.0, 0.5)
        bw = np.empty(duration_s)
        left = 0
        for t in range(duration_s):
            s = phi * s + rng.normal(0.0, 0.5 * math.sqrt(1 - phi * phi))
            if left == 0 and rng.random() < 0.01 * math.exp(slope * (u + s)):
                left = int(rng.integers(1, 4))
            bw[t] = 0.0 if left else math.exp(15.5 + u + s + rng.normal(0.0, 0.3))
            left = max(left - 1, 0)
        out.append(Trace.from_columns(np.arange(duration_s, dtype=float), bandwidth_bps=bw))
    return out


def test_fit_finds_the_slope_of_field_like_traces_and_can_be_told_not_to():
    rng = np.random.default_rng(31)
    traces = _field_like(rng, 12, 2400, -1.5)
    model = tracegen.fit(traces, states=2, restarts=1)
    # the smoothed slow level is estimated from the level samples, so the slope is recovered only roughly
    assert model.slow is not None and -2.0 < model.slow.outage_slope < -1.0   # true: -1.5
    assert model.report["outage_slope"] is True
    off = tracegen.fit(traces, states=2, restarts=1, outage_slope=False)
    assert off.slow.outage_slope == 0.0 and off.report["outage_slope"] is False
    flat = tracegen.fit(_field_like(rng, 12, 2400, 0.0), states=2, restarts=1)
    assert flat.slow is None or abs(flat.slow.outage_slope) < 0.5
