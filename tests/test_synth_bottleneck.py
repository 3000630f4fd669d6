"""Bottleneck queue: each check names the outside result (or the hand computation) it is held to."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracegen.errors import TracegenError
from tracegen.synth.bottleneck import (MAX_QUEUE_MS, Bottleneck, _queue, _reflect, _standing, _track,
                                       hold_level_bytes, lindley_waits, queue, standing_queue)


def lindley_loop(service, gaps):
    """W_0 = 0, W_n = max(0, W_{n-1} + S_{n-1} - A_n): the recursion as written (Lindley 1952)."""
    w = [0.0]
    for i in range(1, len(service)):
        w.append(max(0.0, w[-1] + service[i - 1] - gaps[i]))
    return np.array(w)


def droptail_loop(x, top):
    """b_{k+1} = min(top, max(0, b_k + x_k)) step by step."""
    b, out = 0.0, []
    for v in x:
        b = min(top, max(0.0, b + v))
        out.append(b)
    return np.array(out)


# --- packet level ---------------------------------------------------------------------------------------

def test_lindley_reproduces_mm1_mean_wait():
    # M/M/1 (Kleinrock, Queueing Systems vol. 1, 1975, sec. 3.2): mean wait in queue W_q = rho/(mu - lambda).
    lam, mu, n = 0.7, 1.0, 2_000_000
    rng = np.random.default_rng(2024)
    w = lindley_waits(rng.exponential(1 / mu, n), rng.exponential(1 / lam, n))
    expected = (lam / mu) / (mu - lam)
    assert w[20_000:].mean() == pytest.approx(expected, rel=0.05)


def fluid_poisson_queue(sizes: str, seed: int, rho: float = 0.7, horizon: float = 300_000.0, dt: float = 0.1):
    """Mean backlog of the fluid drop-tail queue fed by Poisson arrivals (rate rho) of mean-1 byte jobs on a
    1 byte/s link with a huge buffer: each step carries the bytes of the jobs that arrived in it."""
    rng = np.random.default_rng(seed)
    n = int(horizon / dt)
    m = rng.poisson(rho * horizon)
    t = rng.uniform(0.0, horizon, m)
    s = rng.exponential(1.0, m) if sizes == "exp" else np.ones(m)
    work = np.bincount((t // dt).astype(np.int64), weights=s, minlength=n)[:n]
    r = queue(np.full(n, 8.0), work * 8.0 / dt, dt, Bottleneck(buffer_bytes=1e9))
    return float(r.backlog_bytes[n // 50:].mean())


def test_fluid_queue_fed_by_poisson_jobs_reproduces_mm1():
    # The fluid queue itself, not only the packet recursion: its backlog is the workload, whose time
    # average equals the mean wait in queue (PASTA, Wolff 1982). M/M/1 (Kleinrock 1975, sec. 3.2):
    # W_q = rho/(mu - lambda) = 0.7/0.3 at rho = 0.7, mu = 1. The 10 ms-of-a-second grid puts jobs at their
    # step's start and samples at its end, a bias of order rho x dt/2 (1.5 %); sampling error ~1 %.
    assert fluid_poisson_queue("exp", 0) == pytest.approx(0.7 / 0.3, rel=0.05)


def test_fluid_queue_fed_by_poisson_jobs_reproduces_md1():
    # M/D/1, Pollaczek-Khinchine (Kleinrock 1975, sec. 5.6): W_q = rho/(2 mu (1 - rho)) = 7/6 at rho = 0.7.
    # Same grid bias (3 % of this smaller wait, low), so 6 %.
    assert fluid_poisson_queue("det", 1) == pytest.approx(0.7 / 0.6, rel=0.06)


def test_lindley_matches_the_plain_loop():
    rng = np.random.default_rng(8)
    s, a = rng.exponential(1.0, 20_000), rng.exponential(1 / 0.95, 20_000)
    ref = lindley_loop(s.tolist(), a.tolist())
    np.testing.assert_allclose(lindley_waits(s, a), ref, rtol=0, atol=1e-12 * max(1.0, ref.max()))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 10), st.floats(0, 10)), min_size=1, max_size=300))
def test_lindley_matches_the_plain_loop_on_any_input(pairs):
    s, a = (np.array(v) for v in zip(*pairs))
    ref = lindley_loop(s.tolist(), a.tolist())
    np.testing.assert_allclose(lindley_waits(s, a), ref, rtol=0, atol=1e-12 * max(1.0, ref.max()))


# --- fluid drop-tail ---------------------------------------------------------------------------------------

@settings(max_examples=80, deadline=None)
@given(st.lists(st.floats(-5e4, 5e4), min_size=1, max_size=3000), st.floats(1.0, 1e5))
def test_two_sided_reflection_matches_the_step_loop(x, top):
    x = np.array(x)
    ref = droptail_loop(x.tolist(), top)
    got = _reflect(x, 0.0, top)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9 * max(top, np.abs(x).sum()))
    assert got.max() <= top and got.min() >= 0.0


def test_two_sided_reflection_with_boundary_hits_every_step():
    # alternations every step (stepped directly) between long calm stretches (vectorised passes)
    x = np.concatenate([np.tile([3e5, -3e5], 2000), np.full(5000, 10.0), np.tile([-7e5, 7e5, 1e3], 1000),
                        np.full(3000, -1.0)])
    np.testing.assert_allclose(_reflect(x, 0.0, 2e5), droptail_loop(x.tolist(), 2e5), rtol=0, atol=1e-6)


def test_constant_overload_fills_then_drops_the_excess():
    # By hand: C = 8 Mbit/s = 100 000 B per 0.1 s step, offered 12 Mbit/s = 150 000 B: +50 000 B a step
    # into a 200 000 B buffer: full after 4 steps, then 50 000 B (1/3 of the offered) dropped every step.
    r = queue(np.full(10, 8e6), np.full(10, 12e6), 0.1, Bottleneck(buffer_bytes=200_000))
    np.testing.assert_allclose(r.backlog_bytes, [50e3, 100e3, 150e3, 200e3, 200e3, 200e3, 200e3, 200e3, 200e3, 200e3])
    np.testing.assert_allclose(r.dropped_bytes, [0, 0, 0, 0] + [50e3] * 6, atol=1e-6)
    np.testing.assert_allclose(r.drop_share, [0, 0, 0, 0] + [1 / 3] * 6, atol=1e-12)
    np.testing.assert_allclose(r.delivered_bps, 8e6)
    np.testing.assert_allclose(r.queue_ms, [50, 100, 150, 200, 200, 200, 200, 200, 200, 200])


@pytest.mark.parametrize("policy", ["drop-tail", "red", "codel"])
def test_buffer_is_never_exceeded_and_bytes_are_conserved(policy):
    # conservation per step: offered = delivered + dropped + change in backlog
    rng = np.random.default_rng(1)
    c, o = rng.uniform(0, 20e6, 50_000), rng.uniform(0, 25e6, 50_000)
    r = queue(c, o, 0.01, Bottleneck(buffer_ms=50.0, policy=policy))
    assert r.buffer_bytes == pytest.approx(0.05 * c.mean() / 8)
    assert r.backlog_bytes.max() <= r.buffer_bytes and r.backlog_bytes.min() >= 0
    assert r.dropped_bytes.sum() > 0
    b_start = np.concatenate([[0.0], r.backlog_bytes[:-1]])
    np.testing.assert_allclose(o * 0.01 / 8, r.delivered_bps * 0.01 / 8 + r.dropped_bytes + r.backlog_bytes - b_start,
                               atol=1e-6)
    assert np.all(r.delivered_bps <= c + 1e-6)
    assert np.all((r.drop_share >= 0) & (r.drop_share <= 1))
    if policy == "drop-tail":
        np.testing.assert_allclose(r.backlog_bytes, droptail_loop((o * 0.01 / 8 - c * 0.01 / 8).tolist(),
                                                                  r.buffer_bytes), atol=1e-6)


def test_queue_delay_is_backlog_over_capacity():
    # By hand, 10 ms steps: +10 000 B in step 0 at C = 8 Mbit/s -> 10 000 x 8 / 8e6 = 10 ms; step 1 at
    # 4 Mbit/s takes 25 000 B in, 5 000 out -> 30 000 B / 4 Mbit/s = 60 ms; step 2 has C = 0: the buffer's
    # worth at the mean capacity (36/6 = 6 Mbit/s), 100 000 x 8 / 6e6 = 133.3 ms; step 3 serves 15 000 B
    # at 12 Mbit/s -> 15 000 B = 10 ms; step 4 empties it.
    c = np.array([8e6, 4e6, 0.0, 12e6, 12e6, 0.0])
    o = np.array([16e6, 20e6, 0.0, 0.0, 0.0, 0.0])
    r = queue(c, o, 0.01, Bottleneck(buffer_bytes=100_000))
    np.testing.assert_allclose(r.backlog_bytes, [10_000, 30_000, 30_000, 15_000, 0, 0], atol=1e-9)
    np.testing.assert_allclose(r.queue_ms, [10, 60, 800 / 6, 10, 0, 0], atol=1e-9)
    np.testing.assert_allclose(r.delivered_bps, [8e6, 4e6, 0, 12e6, 12e6, 0], atol=1e-6)


def test_rounding_residue_is_not_a_queue():
    # offered == capacity up to rounding (as cross traffic + foreground add up) must not show a queue,
    # not even on a zero-capacity step where any backlog would read as the buffer's worth
    rng = np.random.default_rng(3)
    c = rng.uniform(1e6, 2e7, 10_000)
    c[::997] = 0.0
    parts = rng.uniform(0.0, 1.0, (3, c.size))
    parts = parts / parts.sum(axis=0) * c   # three shares summing to c, with rounding
    r = queue(c, parts[0] + parts[1] + parts[2], 0.01, Bottleneck(buffer_ms=100.0))
    assert r.queue_ms.max() == 0.0 and r.dropped_bytes.max() == 0.0


def test_zero_capacity_everywhere_uses_the_documented_cap():
    r = queue(np.zeros(3), np.full(3, 1e6), 0.1, Bottleneck(buffer_bytes=1e6))
    np.testing.assert_allclose(r.queue_ms, MAX_QUEUE_MS)
    np.testing.assert_allclose(r.delivered_bps, 0.0)


# --- RED ---------------------------------------------------------------------------------------------------------

def test_red_average_is_the_ewma_and_drops_start_between_thresholds():
    # Floyd & Jacobson 1993: avg <- (1 - w_q) avg + w_q q per packet; p_b = max_p (avg - min_th)/(max_th -
    # min_th) between the thresholds, 0 below min_th, 1 from max_th. Here C = 12 Mbit/s and 1 ms steps: one
    # 1500 B packet a step, so the per-step weight is w_q itself; offered 24 Mbit/s adds 1500 B a step.
    bn = Bottleneck(buffer_bytes=100_000, policy="red", red_weight=0.5, red_max_p=0.1)
    n = 400
    r = queue(np.full(n, 12e6), np.full(n, 24e6), 0.001, bn)
    avg = r.avg_queue_bytes
    # hand recursion for the first steps (no drops yet): q = 0, 1500, 3000, ...
    hand, a = [], 0.0
    for k in range(6):
        a = 0.5 * a + 0.5 * 1500.0 * k
        hand.append(a)
    np.testing.assert_allclose(avg[:6], hand, rtol=1e-12)
    assert hand[:4] == [0.0, 750.0, 1875.0, 3187.5]
    lo, hi, inb = 25_000.0, 75_000.0, 3000.0
    first = int(np.argmax(r.dropped_bytes > 0))
    assert r.dropped_bytes[:first].sum() == 0 and np.all(avg[:first] < lo)
    assert lo <= avg[first] < hi
    mid = (avg >= lo) & (avg < hi) & (r.backlog_bytes < 100_000)
    np.testing.assert_allclose(r.dropped_bytes[mid], 0.1 * (avg[mid] - lo) / (hi - lo) * inb, rtol=1e-9)
    # the recursion holds at every step, drops or not: avg_k = (1-w) avg_{k-1} + w q_k (q at step start)
    q_start = np.concatenate([[0.0], r.backlog_bytes[:-1]])
    np.testing.assert_allclose(avg[1:], 0.5 * avg[:-1] + 0.5 * q_start[1:], rtol=1e-12)
    if (avg >= hi).any():
        np.testing.assert_allclose(r.drop_share[avg >= hi], 1.0)


def test_red_weight_per_step_counts_packets_at_the_mean_capacity():
    # Two packets a step (12 Mbit/s, 2 ms): per-step weight 1 - (1 - w_q)^2 (w_q applied once per packet).
    bn = Bottleneck(buffer_bytes=100_000, policy="red", red_weight=0.1)
    r = queue(np.full(5, 12e6), np.full(5, 24e6), 0.002, bn)
    w = 1 - 0.9**2
    hand, a = [], 0.0
    for k in range(5):
        a = (1 - w) * a + w * 3000.0 * k
        hand.append(a)
    np.testing.assert_allclose(r.avg_queue_bytes, hand, rtol=1e-12)


# --- CoDel -------------------------------------------------------------------------------------------------------

def test_codel_drops_after_an_interval_above_target_at_interval_over_sqrt_count():
    # Nichols & Jacobson 2012: drop once the sojourn time has stayed above target (5 ms) for an interval
    # (100 ms), then at gaps interval/sqrt(count). C = 10 Mbit/s, offered 11 Mbit/s, 1 ms steps: the queue
    # passes 5 ms (6250 B) at the end of step 49, so the first drop falls in step 50 + 100 = 150.
    step = 0.001
    r = queue(np.full(3000, 10e6), np.full(3000, 11e6), step, Bottleneck(buffer_bytes=1e9, policy="codel"))
    drops = r.dropped_bytes / 1500.0
    np.testing.assert_allclose(drops, np.round(drops), atol=1e-9)  # whole packets
    assert int(np.argmax(r.queue_ms >= 5.0)) == 49
    at = np.flatnonzero(drops > 0)
    assert at[0] == 150
    gaps = np.diff(at[:30]) * step
    expected = 0.1 / np.sqrt(np.arange(1, 30))
    assert np.all(np.abs(gaps - expected) <= step + 1e-12)


def test_codel_stays_idle_below_target():
    # 40 ms at +1 Mbit/s into a 10 Mbit/s link -> 5 000 B = 4 ms standing queue, below the 5 ms target:
    # CoDel (Nichols & Jacobson 2012) never drops.
    o = np.concatenate([np.full(40, 11e6), np.full(2000, 10e6)])
    r = queue(np.full(o.size, 10e6), o, 0.001, Bottleneck(buffer_bytes=1e9, policy="codel"))
    assert r.queue_ms.max() == pytest.approx(4.0)
    assert r.dropped_bytes.sum() == 0


@pytest.mark.parametrize("policy", ["red", "codel"])
def test_vectorised_idle_path_equals_the_step_loop(policy):
    # Same recursion two ways: per-step loop everywhere vs. vectorised while the AQM is idle.
    rng = np.random.default_rng(5)
    n = 30_000
    c = rng.uniform(5e6, 15e6, n)
    level = np.repeat(rng.uniform(0.5, 1.6, n // 500), 500)  # stretches of under- and overload
    o = c * level * rng.uniform(0.9, 1.1, n)
    bn = Bottleneck(buffer_ms=200.0, policy=policy, red_weight=0.02)
    fast, slow = _queue(c, o, 0.01, bn), _queue(c, o, 0.01, bn, force_loop=True)
    assert slow.dropped_bytes.sum() > 0
    np.testing.assert_allclose(fast.backlog_bytes, slow.backlog_bytes, rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(fast.dropped_bytes, slow.dropped_bytes, rtol=1e-9, atol=1e-6)


def test_queue_is_deterministic_and_ignores_rng():
    c, o = np.full(100, 1e6), np.full(100, 2e6)
    bn = Bottleneck(buffer_ms=100.0, policy="codel")
    a = queue(c, o, 0.01, bn, np.random.default_rng(1))
    b = queue(c, o, 0.01, bn, np.random.default_rng(2))
    assert a.queue_ms.tobytes() == b.queue_ms.tobytes()


# --- the responsive standing queue ------------------------------------------------------------------------------

def track_loop(level, up, down, b0=0.0):
    """b_{k+1} = median(b_k - down_k, level_k, b_k + up_k) step by step."""
    b, out = b0, []
    for lv, u, d in zip(level, up, down):
        b = min(max(lv, b - d), b + u)
        out.append(b)
    return np.array(out)


@settings(max_examples=80, deadline=None)
@given(st.lists(st.tuples(st.sampled_from([0.0, 0.0, 5e3, 2e4, 6e4]), st.floats(0, 3e4), st.floats(0, 3e4)),
                min_size=1, max_size=400), st.floats(0, 6e4))
def test_tracker_matches_the_step_loop(rows, b0):
    # levels that hold for a while and jump (as flows come and go), any climb and fall rates
    level, up, down = (np.repeat(np.array(v), 7) for v in zip(*rows))
    ref = track_loop(level.tolist(), up.tolist(), down.tolist(), b0)
    np.testing.assert_allclose(_track(level, up, down, b0), ref, rtol=0, atol=1e-9 * max(1.0, np.abs(ref).max()))


def test_tracker_follows_a_smoothly_moving_level():
    # a level that drifts by less than the rates a step is tracked exactly once reached (no jumps inside)
    rng = np.random.default_rng(3)
    level = 1e4 + np.cumsum(rng.uniform(-100, 100, 20_000))
    up, down = np.full(level.size, 150.0), np.full(level.size, 150.0)
    got = _track(level, up, down, 0.0)
    np.testing.assert_allclose(got, track_loop(level.tolist(), up.tolist(), down.tolist()), rtol=0, atol=1e-6)
    reached = int(np.argmax(got == level))
    assert 0 < reached < 200 and np.all(got[reached:] == level[reached:])


def random_link(rng, n):
    c = rng.uniform(5e6, 15e6, n) * (rng.random(n) > 0.01)
    busy = np.repeat(rng.random(n // 50 + 1) < 0.6, 50)[:n]
    unresp = np.repeat(rng.uniform(0, 1.4, n // 200 + 1), 200)[:n] * c
    over = np.maximum(unresp - c, 0.0)
    share = c - np.minimum(unresp, c)
    resp = np.minimum(np.where(busy, c * rng.uniform(0.2, 0.8, n), 0.0), share)
    loss = np.where(resp > 0, rng.uniform(0, 0.05, n), 0.0)
    return c, resp, share, loss, over


def standing_loop(c, resp, share, loss, over, step, top, level, probe, backoff):
    """Drop-tail with responsive traffic, as the module docstring states it, one step at a time."""
    b, out = 0.0, []
    per = step / 8
    for k in range(c.size):
        hot = over[k] > 0
        y = b + over[k] * per
        if not hot:
            lv = level[k] if resp[k] > 0 else 0.0
            y = min(max(lv, y - backoff * share[k] * per), y + probe * resp[k] * per)
        b = min(max(y, 0.0), top)
        out.append(b)
    return np.array(out)


def test_standing_drop_tail_matches_the_plain_loop():
    rng = np.random.default_rng(21)
    c, resp, share, loss, over = random_link(rng, 30_000)
    bn = Bottleneck(buffer_ms=120.0)
    q = standing_queue(c, 0.01, bn, responsive_bps=resp, share_bps=share, overload_bps=over, hold_loss=loss, probe=0.7)
    top = q.buffer_bytes
    ref = standing_loop(c, resp, share, loss, over, 0.01, top, np.full(c.size, top), 0.7, 0.5)
    np.testing.assert_allclose(q.backlog_bytes, ref, rtol=0, atol=1e-9 * top)
    assert (over > 0).any() and (q.backlog_bytes == top).any() and q.dropped_bytes.sum() > 0


@pytest.mark.parametrize("policy", ["drop-tail", "red", "codel"])
def test_standing_vectorised_path_equals_the_step_loop(policy):
    # same recursion two ways: the per-step loop everywhere vs. the tracker between overloaded stretches
    rng = np.random.default_rng({"drop-tail": 1, "red": 2, "codel": 3}[policy])
    for _ in range(4):
        n = int(rng.integers(100, 30_000))
        c, resp, share, loss, over = random_link(rng, n)
        bn = Bottleneck(buffer_ms=float(rng.uniform(20, 200)), policy=policy, red_weight=0.02)
        probe = float(rng.choice([0.05, 1.0, 3.0]))
        fast = _standing(c, 0.01, bn, resp, share, loss, over, probe)
        slow = _standing(c, 0.01, bn, resp, share, loss, over, probe, force_loop=True)
        np.testing.assert_allclose(fast.backlog_bytes, slow.backlog_bytes, rtol=0, atol=1e-9 * fast.buffer_bytes)
        np.testing.assert_allclose(fast.dropped_bytes, slow.dropped_bytes, rtol=0, atol=1e-9 * fast.buffer_bytes)
        np.testing.assert_array_equal(fast.hold, slow.hold)
        np.testing.assert_allclose(fast.drop_share, slow.drop_share, rtol=0, atol=1e-9)
        if policy != "drop-tail" and (over > 0).any():
            assert slow.dropped_bytes.sum() > 0


@pytest.mark.parametrize("policy", ["drop-tail", "red", "codel"])
def test_standing_queue_conserves_bytes(policy):
    rng = np.random.default_rng(8)
    c, resp, share, loss, over = random_link(rng, 40_000)
    q = standing_queue(c, 0.01, Bottleneck(buffer_ms=80.0, policy=policy), responsive_bps=resp, share_bps=share,
                       overload_bps=over, hold_loss=loss, probe=1.0)
    b_start = np.concatenate([[0.0], q.backlog_bytes[:-1]])
    np.testing.assert_allclose(q.offered_bps * 0.01 / 8,
                               q.delivered_bps * 0.01 / 8 + q.dropped_bytes + q.backlog_bytes - b_start,
                               atol=1e-6 * q.buffer_bytes)
    assert np.all(q.delivered_bps <= c + 1e-6) and q.backlog_bytes.max() <= q.buffer_bytes
    assert np.all((q.drop_share >= 0) & (q.drop_share <= 1))
    # on the level, the drop share is the responsive flows' loss (no overflow there; the AQM's drop law only
    # acts while an overload's backlog drains)
    calm = q.hold & (over == 0) & (q.dropped_bytes == 0)
    assert calm.mean() > 0.2
    np.testing.assert_allclose(q.drop_share[calm], loss[calm], rtol=1e-12)


def test_hold_levels_follow_the_published_operating_points():
    c = np.array([8e6, 16e6, 1e9])
    loss = np.array([0.0, 0.01, 0.05])
    top = 100_000.0
    # drop-tail: the buffer; CoDel (Nichols & Jacobson 2012): target x capacity, at most the buffer
    np.testing.assert_array_equal(hold_level_bytes(Bottleneck(buffer_bytes=top), c, loss, top), top)
    np.testing.assert_allclose(hold_level_bytes(Bottleneck(buffer_bytes=top, policy="codel"), c, loss, top),
                               [5_000, 10_000, top])
    # RED (Floyd & Jacobson 1993): p_b = max_p (avg - min_th)/(max_th - min_th) solved for avg, max_th above max_p
    red = Bottleneck(buffer_bytes=top, policy="red", red_max_p=0.02)
    np.testing.assert_allclose(hold_level_bytes(red, c, loss, top), [25_000, 50_000, 75_000])


def test_standing_queue_refuses_bad_inputs():
    bn = Bottleneck(buffer_ms=10.0)
    ok = dict(responsive_bps=np.ones(3), share_bps=np.ones(3), overload_bps=None, hold_loss=np.zeros(3), probe=1.0)
    for key, value, field in (("responsive_bps", np.ones(4), "responsive_bps"),
                              ("hold_loss", np.array([0.0, -1.0, 0.0]), "hold_loss"),
                              ("share_bps", np.array([1.0, np.nan, 1.0]), "share_bps"),
                              ("probe", -0.5, "probe"), ("probe", True, "probe"), ("backoff", 1.5, "backoff")):
        with pytest.raises(TracegenError) as info:
            standing_queue(np.ones(3), 0.01, bn, **{**ok, key: value})
        assert info.value.field == field
    with pytest.raises(TracegenError) as info:
        standing_queue(np.ones(3), 0.01, "red", **ok)
    assert info.value.field == "bottleneck"


# --- validation ------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, field, text", [
    (dict(buffer_bytes=0), "bottleneck.buffer_bytes", "got 0"),
    (dict(buffer_ms=-5.0), "bottleneck.buffer_ms", "got -5"),
    (dict(buffer_ms=0), "bottleneck.buffer_ms", "got 0"),
    (dict(buffer_ms=float("nan")), "bottleneck.buffer_ms", "nan"),
    (dict(buffer_ms="100ms"), "bottleneck.buffer_ms", "'100ms'"),
    (dict(buffer_ms=True), "bottleneck.buffer_ms", "True"),
    (dict(buffer_ms=10.0, codel_interval_ms=-1.0), "bottleneck.codel_interval_ms", "-1"),
    (dict(), "bottleneck", "exactly one"),
    (dict(buffer_ms=10.0, buffer_bytes=1e5), "bottleneck", "exactly one"),
    (dict(buffer_ms=10.0, red_min_th_frac=0.8, red_max_th_frac=0.5), "bottleneck.red_min_th_frac", "0.8 >= 0.5"),
    (dict(buffer_ms=10.0, red_max_p=1.5), "bottleneck.red_max_p", "1.5"),
    (dict(buffer_ms=10.0, red_max_th_frac=1.2), "bottleneck.red_max_th_frac", "1.2"),
    (dict(buffer_ms=10.0, red_weight=0.0), "bottleneck.red_weight", "got 0"),
    (dict(buffer_ms=10.0, codel_target_ms=0.0), "bottleneck.codel_target_ms", "got 0"),
    (dict(buffer_ms=10.0, packet_bytes=-1.0), "bottleneck.packet_bytes", "-1"),
])
def test_validation_names_field_and_value(kwargs, field, text):
    with pytest.raises(TracegenError) as info:
        Bottleneck(**kwargs)
    assert info.value.field == field
    assert text in info.value.message


def test_scenario_style_values_are_accepted():
    # TOML gives ints for whole numbers; the fields take them
    bn = Bottleneck(buffer_ms=50, policy="red", red_max_p=1)
    assert bn.buffer_bytes_for(np.full(3, 8e6)) == pytest.approx(50_000)


def test_unknown_policy_suggests_the_close_name():
    with pytest.raises(TracegenError) as info:
        Bottleneck(buffer_ms=10.0, policy="droptail")
    assert info.value.field == "bottleneck.policy"
    assert "did you mean 'drop-tail'?" in str(info.value)
    with pytest.raises(TracegenError, match="use one of: drop-tail, red, codel"):
        Bottleneck(buffer_ms=10.0, policy="fifo")
    for typed, meant in (("CoDel", "codel"), ("RED", "red"), ("drop_tail", "drop-tail")):
        with pytest.raises(TracegenError, match=f"did you mean '{meant}'"):
            Bottleneck(buffer_ms=10.0, policy=typed)


def test_queue_refuses_mismatched_or_negative_inputs():
    bn = Bottleneck(buffer_ms=10.0)
    with pytest.raises(TracegenError) as info:
        queue(np.ones(3), np.ones(4), 0.1, bn)
    assert info.value.field == "offered_bps"
    with pytest.raises(TracegenError, match="-2"):
        queue(np.array([1.0, -2.0]), np.ones(2), 0.1, bn)
    with pytest.raises(TracegenError, match="got 0"):
        queue(np.ones(2), np.ones(2), 0.0, bn)
    assert math.isfinite(queue(np.ones(2), np.ones(2), 0.1, bn).queue_ms.sum())
