"""Gilbert-Elliott loss model: fitted on data from a test-only chain with known parameters.

Closed forms used (from memory; Gilbert 1960, Elliott 1963, and any Markov-chain text):
- two-state chain with p = P(good->bad), r = P(bad->good): stationary bad share pi = p / (p + r);
- stationary loss = pi * loss_bad + (1 - pi) * loss_good;
- bad sojourns are Geometric(r): mean 1 / r, variance (1 - r) / r^2;
- the transition-count estimate p^ = #(g->b) / #(pairs from g) is a binomial proportion, standard error
  sqrt(p (1 - p) / #(pairs from g));
- the indicator of the bad state has lag-k autocorrelation lambda^k with lambda = 1 - p - r, so the mean of
  f(state) over n steps has variance Var f * (1 + lambda) / (1 - lambda) / n.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracegen.errors import TracegenError
from tracegen.fit.loss import GilbertElliott, fit_gilbert_elliott, loss_by_state

# the test data's true parameters
P, R, LOSS_GOOD, LOSS_BAD, PACKETS = 0.02, 0.25, 0.002, 0.3, 200
N_TOTAL, N_TRACES = 100_000, 8


def chain_states(rng: np.random.Generator, n: int, p: float, r: float) -> np.ndarray:
    """Test-only sampler: the two-state chain stepped one interval at a time (1 = bad)."""
    u = rng.random(n)
    out = np.empty(n, dtype=np.int8)
    bad = bool(rng.random() < p / (p + r))  # stationary start
    for i in range(n):
        out[i] = bad
        bad = bool(u[i] >= r) if bad else bool(u[i] < p)
    return out


def interval_fractions(rng: np.random.Generator, states: np.ndarray, loss_good: float, loss_bad: float,
                       packets: int = PACKETS) -> np.ndarray:
    """Interval loss fractions: Binomial(packets, loss of the state) / packets."""
    return rng.binomial(packets, np.where(states == 1, loss_bad, loss_good)) / packets


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(20240611)
    states = [chain_states(rng, N_TOTAL // N_TRACES, P, R) for _ in range(N_TRACES)]
    loss = [interval_fractions(rng, s, LOSS_GOOD, LOSS_BAD) for s in states]
    return states, loss, fit_gilbert_elliott(loss)


def markov_mean_se(p: float, r: float, lg: float, lb: float, n: int, packets: int | None) -> float:
    """Standard error of the mean loss over n steps of the chain (closed form in the module docstring)."""
    pi = p / (p + r)
    lam = 1.0 - p - r
    var_state = (lb - lg) ** 2 * pi * (1 - pi) * (1 + lam) / (1 - lam)
    var_binom = 0.0 if packets is None else (pi * lb * (1 - lb) + (1 - pi) * lg * (1 - lg)) / packets
    return math.sqrt((var_state + var_binom) / n)


def test_p_and_r_within_three_binomial_standard_errors(data):
    _, _, m = data
    assert m.n_intervals == N_TOTAL
    # pairs are formed within traces only: N_TRACES fewer than intervals
    assert m.n_transitions_good + m.n_transitions_bad == N_TOTAL - N_TRACES
    se_p = math.sqrt(P * (1 - P) / m.n_transitions_good)
    se_r = math.sqrt(R * (1 - R) / m.n_transitions_bad)
    assert abs(m.p - P) < 3 * se_p, (m.p, P, se_p)
    assert abs(m.r - R) < 3 * se_r, (m.r, R, se_r)
    # state means: a mean of Binomial(200, l)/200 fractions, standard error sqrt(l(1-l)/200/n_state)
    n_bad = m.n_intervals * P / (P + R)
    n_good = m.n_intervals - n_bad
    assert abs(m.loss_bad - LOSS_BAD) < 4 * math.sqrt(LOSS_BAD * (1 - LOSS_BAD) / PACKETS / n_bad)
    assert abs(m.loss_good - LOSS_GOOD) < 4 * math.sqrt(LOSS_GOOD * (1 - LOSS_GOOD) / PACKETS / n_good)


def test_stationary_loss_matches_closed_form_and_empirical_mean(data):
    _, loss, m = data
    closed = P / (P + R) * LOSS_BAD + R / (P + R) * LOSS_GOOD  # 0.024074... for the true parameters
    assert closed == pytest.approx(0.0240740, abs=1e-6)
    se = markov_mean_se(P, R, LOSS_GOOD, LOSS_BAD, N_TOTAL, PACKETS)
    assert abs(m.stationary_loss - closed) < 4 * se, (m.stationary_loss, closed, se)
    assert m.stationary_bad == pytest.approx(m.p / (m.p + m.r))
    empirical = float(np.mean(np.concatenate(loss)))
    assert abs(empirical - closed) < 4 * se
    # the fitted stationary loss and the sample mean estimate the same figure from the same data; they
    # differ only through the chains' first and last runs, far below one standard error
    assert abs(m.stationary_loss - empirical) < se


def test_mean_bad_burst_is_one_over_r(data):
    states, _, m = data
    assert m.mean_bad_burst_intervals == pytest.approx(1.0 / m.r)
    # delta method: se(1/r^) = se(r^) / r^2
    se = math.sqrt(R * (1 - R) / m.n_transitions_bad) / R**2
    assert abs(m.mean_bad_burst_intervals - 1.0 / R) < 3 * se
    # bad runs in the test data itself (interior runs only: the first and last of a trace are cut)
    lengths = []
    for s in states:
        edges = np.flatnonzero(np.diff(np.concatenate(([0], s, [0]))))
        starts, ends = edges[0::2], edges[1::2]
        interior = (starts > 0) & (ends < len(s))
        lengths.append(ends[interior] - starts[interior])
    lengths = np.concatenate(lengths)
    se_runs = math.sqrt(1 - R) / R / math.sqrt(len(lengths))  # geometric sd / sqrt(n)
    assert abs(lengths.mean() - 1.0 / R) < 3 * se_runs


def test_binary_series_give_gilberts_simple_model():
    rng = np.random.default_rng(5)
    series = [chain_states(rng, 20_000, 0.05, 0.4).astype(float) for _ in range(3)]  # 0/1 per probe
    m = fit_gilbert_elliott(series)
    assert m.loss_good == 0.0 and m.loss_bad == 1.0
    assert abs(m.p - 0.05) < 3 * math.sqrt(0.05 * 0.95 / m.n_transitions_good)
    assert abs(m.r - 0.4) < 3 * math.sqrt(0.4 * 0.6 / m.n_transitions_bad)


def test_no_transition_across_traces_or_unknown_intervals():
    g, b = 0.0, 0.5  # good and bad fractions at the default threshold 0.05
    # counted by hand: trace 1 pairs g->b, b->b; trace 2 pairs g->g, g->b, b->g
    # from good: 3 pairs, 2 to bad -> p = 2/3; from bad: 2 pairs, 1 to good -> r = 1/2.
    # Joining the traces would add the pair b (end of 1) -> g (start of 2) and give r = 2/3.
    m = fit_gilbert_elliott([np.array([g, b, b]), np.array([g, g, b, g])])
    assert (m.p, m.r) == (pytest.approx(2 / 3), pytest.approx(1 / 2))
    assert (m.n_transitions_good, m.n_transitions_bad) == (3, 2)
    # an unknown interval splits the pairs: g->b, b->b | g->g; p = 1/2, r = 0/1 = 0.
    # Dropping the NaN (or reading it as 0) would add b->g and give r = 1/2.
    m = fit_gilbert_elliott([np.array([g, b, b, np.nan, g, g])])
    assert (m.p, m.r) == (0.5, 0.0)
    assert m.n_intervals == 5


def test_degenerate_cases():
    assert fit_gilbert_elliott([np.full(10, np.nan), np.array([])]) is None
    assert fit_gilbert_elliott([]) is None
    never = fit_gilbert_elliott([np.array([0.0, 0.01, 0.0, np.nan, 0.02])])
    assert (never.p, never.r, never.loss_bad) == (0.0, 1.0, 1.0)
    assert never.loss_good == pytest.approx(0.03 / 4)
    assert never.stationary_bad == 0.0 and never.stationary_loss == pytest.approx(0.03 / 4)
    always = fit_gilbert_elliott([np.array([0.5, 1.0, 0.2])])
    assert (always.p, always.r, always.loss_good) == (1.0, 0.0, 0.0)
    assert always.stationary_loss == pytest.approx(1.7 / 3)
    assert always.mean_bad_burst_intervals == math.inf
    # both states seen, neither left: one pseudo-exit each, 1 / (pairs + 1)
    split = fit_gilbert_elliott([np.zeros(4), np.ones(3)])
    assert (split.p, split.r) == (pytest.approx(1 / 4), pytest.approx(1 / 3))
    with pytest.raises(TracegenError, match="bad_threshold"):
        fit_gilbert_elliott([np.zeros(3)], bad_threshold=1.5)


def test_sample_reproduces_p_r_and_stationary_loss():
    model = GilbertElliott(p=P, r=R, loss_good=LOSS_GOOD, loss_bad=LOSS_BAD)
    n = 200_000
    state, loss = model.sample(np.random.default_rng(11), n)
    assert state.shape == loss.shape == (n,)
    assert set(np.unique(state)) <= {0, 1}
    assert np.all(loss == np.where(state == 1, LOSS_BAD, LOSS_GOOD))
    # transition counts, done here without the library
    a, b = state[:-1], state[1:]
    from_good, from_bad = int(np.sum(a == 0)), int(np.sum(a == 1))
    p_hat = np.sum((a == 0) & (b == 1)) / from_good
    r_hat = np.sum((a == 1) & (b == 0)) / from_bad
    assert abs(p_hat - P) < 3 * math.sqrt(P * (1 - P) / from_good)
    assert abs(r_hat - R) < 3 * math.sqrt(R * (1 - R) / from_bad)
    closed = P / (P + R) * LOSS_BAD + R / (P + R) * LOSS_GOOD
    assert abs(loss.mean() - closed) < 4 * markov_mean_se(P, R, LOSS_GOOD, LOSS_BAD, n, None)
    # the start state is honoured; the same seed gives the same draw
    assert model.sample(np.random.default_rng(1), 50, start=1)[0][0] == 1
    assert model.sample(np.random.default_rng(1), 50, start=0)[0][0] == 0
    again = model.sample(np.random.default_rng(11), n)[0]
    assert np.array_equal(again, state)
    assert model.sample(np.random.default_rng(1), 0)[0].size == 0
    # degenerate chains
    assert np.all(GilbertElliott(p=0.0, r=1.0, loss_good=0.0, loss_bad=1.0).sample(
        np.random.default_rng(2), 1000)[0] == 0)
    assert np.all(GilbertElliott(p=1.0, r=0.0, loss_good=0.0, loss_bad=1.0).sample(
        np.random.default_rng(2), 1000, start=1)[0] == 1)
    with pytest.raises(TracegenError, match="start"):
        model.sample(np.random.default_rng(1), 5, start=2)


def test_dict_round_trip_and_validation(data):
    m = data[2]
    back = GilbertElliott.from_dict(json.loads(json.dumps(m.to_dict())))
    assert back == m
    for bad_p in (1.5, -0.1, float("nan")):
        with pytest.raises(TracegenError, match="'p'") as err:
            GilbertElliott.from_dict({**m.to_dict(), "p": bad_p})
        assert str(bad_p) in str(err.value)
    with pytest.raises(TracegenError, match="'loss_bad'"):
        GilbertElliott.from_dict({**m.to_dict(), "loss_bad": 2})
    with pytest.raises(TracegenError, match="'n_intervals'"):
        GilbertElliott.from_dict({**m.to_dict(), "n_intervals": -3})
    with pytest.raises(TracegenError, match="'r'"):
        GilbertElliott.from_dict({k: v for k, v in m.to_dict().items() if k != "r"})
    with pytest.raises(TracegenError, match="'p'"):
        GilbertElliott.from_dict({**m.to_dict(), "p": 0.0, "r": 0.0})
    with pytest.raises(TracegenError, match="'extra'"):
        GilbertElliott.from_dict({**m.to_dict(), "extra": 1})


def test_loss_by_state_hand_worked():
    loss = [np.array([0.1, 0.3, np.nan, 0.0]), np.array([0.5, 0.2])]
    state = [np.array([0, 1, 1, -1]), np.array([1, 0])]
    # state 0: 0.1 and 0.2 -> 0.15; state 1: 0.3 and 0.5 (the NaN skipped) -> 0.4; state 2: none
    assert loss_by_state(loss, state, 3) == [pytest.approx(0.15), pytest.approx(0.4), None]
    with pytest.raises(TracegenError, match="state 3"):
        loss_by_state(loss, [np.array([0, 3, 1, 1]), np.array([1, 0])], 3)
    with pytest.raises(TracegenError, match="4 loss values but 3 states"):
        loss_by_state(loss, [np.array([0, 1, 1]), np.array([1, 0])], 3)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.lists(st.one_of(st.floats(0, 1), st.just(float("nan"))), max_size=30), max_size=5))
def test_counts_are_the_pairs_of_known_neighbours(lists):
    series = [np.array(x, dtype=float) for x in lists]
    m = fit_gilbert_elliott(series)
    known = sum(int(np.sum(~np.isnan(a))) for a in series)
    if known == 0:
        assert m is None
        return
    pairs = sum(int(np.sum(~np.isnan(a[:-1]) & ~np.isnan(a[1:]))) for a in series)
    assert m.n_intervals == known
    assert m.n_transitions_good + m.n_transitions_bad == pairs
    assert 0 <= m.p <= 1 and 0 <= m.r <= 1 and m.p + m.r > 0
    assert 0 <= m.stationary_loss <= 1
