"""The shared link (cross traffic + bottleneck): each check names the outside result or hand computation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tracegen.errors import TracegenError
from tracegen.synth.bottleneck import BACKOFF, Bottleneck, queue, standing_queue
from tracegen.synth.crosstraffic import CrossTraffic, generate
from tracegen.synth.link import reno_loss, share_link

STEP = 0.01


def one_flow(n_on: int, n: int, capacity: float = 12e6):
    """One responsive cross flow served from step 0 to n_on, alone with the foreground (half each)."""
    c = np.full(n, capacity)
    resp = np.where(np.arange(n) < n_on, capacity / 2, 0.0)
    return c, resp


# --- Reno loss (Mathis et al. 1997) ------------------------------------------------------------------------------

def test_reno_loss_is_the_mathis_response_function():
    # Mathis, Semke, Mahdavi & Ott 1997: rate = MSS/RTT x sqrt(3/(2p)) => p = 1.5/W^2, W = rate RTT / MSS.
    # By hand: 6 Mbit/s per flow at 50 ms with 1500 B packets: W = 6e6 x 0.05 / 12000 = 25, p = 1.5/625.
    assert reno_loss(np.array([6e6]), np.array([1.0]), 50.0, 1500.0)[0] == pytest.approx(0.0024, rel=1e-12)
    # two flows on 12 Mbit/s are the same per-flow rate; inverting the formula returns the rate
    p = reno_loss(np.array([12e6, 3e6]), np.array([2.0, 0.5]), 80.0, 1200.0)
    for rate in p:
        assert 1200 * 8 / 0.08 * math.sqrt(1.5 / rate) == pytest.approx(6e6, rel=1e-12)
    # nobody served -> no loss; a window under sqrt(1.5) packets is capped at certain loss
    np.testing.assert_array_equal(reno_loss(np.array([0.0, 5e6, 1e3]), np.array([0.0, 0.0, 1.0]), 50.0, 1500.0),
                                  [0.0, 0.0, 1.0])


# --- the standing queue, by hand -----------------------------------------------------------------------------------

def test_drop_tail_fills_to_the_buffer_holds_and_drains_by_hand():
    # By hand, 10 ms steps: C = 12 Mbit/s = 15 000 B a step, one flow with half of it (7 500 B a step).
    # probe 1 (slow start's doubling) adds 7 500 B a step: 7 500, 15 000, ... the 60 000 B buffer after 8
    # steps, then the queue stands there (40 ms = 60 000 x 8 / 12e6) with the Reno loss 1.5/25^2 = 0.0024
    # (W = 6e6 x 0.05 / 12000 = 25). The flow leaves at step 300: responsive traffic backs off by half
    # (RFC 5681), so the queue drains 0.5 x 15 000 = 7 500 B a step: empty 8 steps later.
    n = 400
    c, resp = one_flow(300, n)
    loss = reno_loss(resp, (resp > 0).astype(float), 50.0, 1500.0)
    bn = Bottleneck(buffer_bytes=60_000)
    q = standing_queue(c, STEP, bn, responsive_bps=resp, share_bps=c, overload_bps=None, hold_loss=loss, probe=1.0)
    fill = 7_500.0 * np.arange(1, 9)
    np.testing.assert_allclose(q.backlog_bytes[:8], fill, rtol=1e-12)
    np.testing.assert_array_equal(q.backlog_bytes[7:300], 60_000.0)
    np.testing.assert_allclose(q.backlog_bytes[300:308], 60_000.0 - fill, atol=1e-6)
    assert np.all(q.backlog_bytes[307:] == 0.0)
    np.testing.assert_allclose(q.queue_ms[7:300], 40.0, rtol=1e-12)
    np.testing.assert_allclose(q.drop_share[7:300], 0.0024, rtol=1e-12)
    assert np.all(q.drop_share[:7] == 0.0) and np.all(q.drop_share[300:] == 0.0)
    # offered: capacity + the probe (twice the flow's share) while filling, capacity minus half the
    # responsive share (flow + foreground = C) while draining; the link delivers C throughout
    np.testing.assert_allclose(q.offered_bps[:7], 18e6, rtol=1e-12)
    np.testing.assert_allclose(q.offered_bps[300:307], 6e6, rtol=1e-9)
    np.testing.assert_allclose(q.delivered_bps[:307], 12e6, rtol=1e-12)
    assert BACKOFF == 0.5


def test_codel_holds_the_sojourn_at_target_by_hand():
    # Nichols & Jacobson 2012: CoDel drops until the sojourn time is back at target (5 ms). At 12 Mbit/s that
    # is 7 500 B; probe 0.25 adds 0.25 x 7 500 = 1 875 B a step: there after 4 steps, then exactly 5 ms.
    n = 200
    c, resp = one_flow(150, n)
    loss = reno_loss(resp, (resp > 0).astype(float), 50.0, 1500.0)
    q = standing_queue(c, STEP, Bottleneck(buffer_ms=100.0, policy="codel"), responsive_bps=resp, share_bps=c,
                       overload_bps=None, hold_loss=loss, probe=0.25)
    np.testing.assert_allclose(q.backlog_bytes[:4], 1_875.0 * np.arange(1, 5), rtol=1e-12)
    np.testing.assert_allclose(q.queue_ms[3:150], 5.0, rtol=1e-12)
    assert q.hold[3:150].all() and not q.hold[:3].any()
    assert q.dropped_bytes.sum() == 0.0  # CoDel's own drop law is idle: its action is the equilibrium loss
    np.testing.assert_allclose(q.drop_share[3:150], 0.0024, rtol=1e-12)


def test_codel_level_follows_the_capacity():
    # target x capacity: 5 ms of 8, 16 and 4 Mbit/s = 5 000, 10 000 and 2 500 B
    c = np.repeat([8e6, 16e6, 4e6], 100)
    resp = c / 2
    q = standing_queue(c, STEP, Bottleneck(buffer_ms=100.0, policy="codel"), responsive_bps=resp, share_bps=c,
                       overload_bps=None, hold_loss=np.zeros(300), probe=1.0)
    np.testing.assert_allclose(q.level_bytes[[50, 150, 250]], [5_000, 10_000, 2_500], rtol=1e-12)
    np.testing.assert_allclose(q.queue_ms[[90, 190, 290]], 5.0, rtol=1e-12)


def test_red_settles_where_its_drop_probability_is_the_reno_loss():
    # Floyd & Jacobson 1993: p_b = max_p (avg - min_th)/(max_th - min_th); the flows need p = 0.0024 (above),
    # so the operating point is avg = min_th + (0.0024/0.02)(max_th - min_th) = 25 000 + 0.12 x 50 000 =
    # 31 000 B for a 100 000 B buffer (thresholds 1/4 and 3/4). The level follows the loss through RED's
    # per-step weight w = 1 - (1 - 0.002)^10 (10 packets a step), i.e. an EWMA from 0 (hand recursion).
    n = 3000
    c, resp = one_flow(n, n)
    loss = reno_loss(resp, np.ones(n), 50.0, 1500.0)
    bn = Bottleneck(buffer_bytes=100_000, policy="red")
    q = standing_queue(c, STEP, bn, responsive_bps=resp, share_bps=c, overload_bps=None, hold_loss=loss, probe=1.0)
    w = 1 - 0.998 ** 10
    ewma = 0.0024 * (1 - (1 - w) ** np.arange(1, n + 1))
    np.testing.assert_allclose(q.level_bytes, 25_000 + ewma / 0.02 * 50_000, rtol=1e-9)
    assert q.level_bytes[-1] == pytest.approx(31_000, rel=1e-6)
    # the queue and RED's own averaged queue end up there, between the thresholds
    assert q.backlog_bytes[-1] == pytest.approx(31_000, rel=1e-6)
    assert 25_000 < q.avg_queue_bytes[-1] < 75_000
    assert q.avg_queue_bytes[-1] == pytest.approx(31_000, rel=1e-3)


def test_red_level_is_max_th_when_the_flows_need_more_than_max_p():
    # 20 flows sharing 6 Mbit/s: W = 0.3e6 x 0.05 / 12000 = 1.25, p = min(1, 1.5/1.5625) = 0.96 > max_p:
    # RED's linear law cannot deliver it below max_th, so the level is max_th (75 000 B)
    n = 3000
    c = np.full(n, 12e6)
    resp = np.full(n, 6e6)
    loss = reno_loss(resp, np.full(n, 20.0), 50.0, 1500.0)
    assert loss[0] == pytest.approx(0.96)
    q = standing_queue(c, STEP, Bottleneck(buffer_bytes=100_000, policy="red"), responsive_bps=resp, share_bps=c,
                       overload_bps=None, hold_loss=loss, probe=1.0)
    assert q.level_bytes[-1] == pytest.approx(75_000, rel=1e-9)


# --- the link with random flows --------------------------------------------------------------------------------

def active_steps(r):
    return r.cross.n_responsive >= 1.0 - 1e-9


@pytest.mark.parametrize("seed", [1, 2])
def test_responsive_flows_fill_a_drop_tail_buffer_while_active(seed):
    # Loss-based flows fill a drop-tail buffer (the standing queue of bufferbloat). Fill time from empty at
    # probe 1 is buffer/(flows' share) <= 0.2 s here, busy periods last seconds, so the mean queue while a
    # flow is active is within 10 % of the 100 ms buffer (and never above it).
    cap = np.full(60_000, 10e6)
    r = share_link(cap, STEP, CrossTraffic(flow_rate_per_s=0.5), Bottleneck(buffer_ms=100.0),
                   np.random.default_rng(seed), details=True)
    act = active_steps(r)
    assert act.mean() > 0.3
    assert 90.0 <= r.queue_ms[act].mean() <= 100.0 + 1e-9
    assert r.queue_ms.max() <= 100.0 + 1e-9
    # the queue drains once no responsive flow is left: half the capacity a step, so within 20 steps
    idle = ~(r.cross.n_responsive > 0)
    late_idle = idle & np.concatenate([np.zeros(20, bool), np.lib.stride_tricks.sliding_window_view(idle, 21).all(1)])
    assert late_idle.any() and np.all(r.queue_ms[late_idle] == 0.0)


def test_codel_keeps_the_queue_near_target_with_random_flows():
    # With CoDel the level is the 5 ms target; with probe 1 a new flow reaches it within a step or two and a
    # capacity that changes every 10 s moves it by at most the probe or the back-off a step, so it is
    # tracked exactly. Tolerance: 5 % of target for the steps spent climbing at busy-period starts.
    rng = np.random.default_rng(4)
    cap = np.repeat(rng.uniform(5e6, 20e6, 60), 1000)
    r = share_link(cap, STEP, CrossTraffic(flow_rate_per_s=1.0), Bottleneck(buffer_ms=200.0, policy="codel"),
                   np.random.default_rng(5), details=True)
    act = active_steps(r)
    assert act.mean() > 0.3
    assert abs(r.queue_ms[act].mean() - 5.0) < 0.25
    assert r.queue_ms[r.queue.hold].max() == pytest.approx(5.0, rel=1e-9)


def test_red_average_queue_sits_between_its_thresholds():
    # Floyd & Jacobson 1993: the averaged queue settles between min_th and max_th when the loss the flows
    # need is below max_p (here ~0.003 with one or two flows on 10 Mbit/s at 50 ms). Checked on active steps
    # more than 3 RED time constants (1/w steps) into a busy period, where the EWMA has caught up.
    cap = np.full(100_000, 10e6)
    bn = Bottleneck(buffer_ms=100.0, policy="red")
    r = share_link(cap, STEP, CrossTraffic(flow_rate_per_s=0.3, size_bytes_mean=3e6), bn, np.random.default_rng(7),
                   details=True)
    top = r.queue.buffer_bytes
    w = 1 - (1 - 0.002) ** (10e6 * STEP / 8 / 1500)
    busy = r.cross.n_responsive > 0
    starts = np.flatnonzero(busy & ~np.concatenate([[False], busy[:-1]]))
    idx = np.arange(busy.size)
    run = idx - starts[np.maximum(np.searchsorted(starts, idx, side="right") - 1, 0)]   # steps since it began
    settled = busy & (run > 3 / w)
    assert settled.mean() > 0.2
    avg = r.queue.avg_queue_bytes[settled]
    assert np.all(avg > 0.25 * top) and np.all(avg < 0.75 * top)
    assert 0.25 * top < r.queue.backlog_bytes[busy].mean() < 0.75 * top


def test_probe_zero_is_the_idealised_model_byte_for_byte():
    # responsive_probe = 0: the responsive flows take exactly their share, the queue runs on the offered
    # load of crosstraffic.generate as before (on/off overload included)
    cap = np.random.default_rng(0).uniform(3e6, 15e6, 20_000)
    ct = CrossTraffic(flow_rate_per_s=1.0, responsive_share=0.8, onoff_sources=3, onoff_rate_bps=3e6,
                      responsive_probe=0.0)
    for policy in ("drop-tail", "red", "codel"):
        bn = Bottleneck(buffer_ms=80.0, policy=policy)
        got = share_link(cap, STEP, ct, bn, np.random.default_rng(9))
        cr = generate(ct, cap, STEP, np.random.default_rng(9))
        q = queue(cap, cr.offered_bps + cr.available_bps, STEP, bn)
        for a, b in ((got.available_bps, cr.available_bps), (got.cross_bps, cr.cross_bps),
                     (got.queue_ms, q.queue_ms), (got.drop_share, q.drop_share)):
            assert a.tobytes() == b.tobytes()
    # and without unresponsive load the idealised flows never build a queue
    r = share_link(cap, STEP, CrossTraffic(flow_rate_per_s=1.0, responsive_probe=0.0), Bottleneck(buffer_ms=80.0),
                   np.random.default_rng(9))
    assert r.queue_ms.max() == 0.0 and r.drop_share.max() == 0.0


def test_overload_builds_a_queue_that_drains_after_it():
    # Unresponsive overload (4 on/off sources of 4 Mbit/s on 10 Mbit/s) fills the buffer and overflows. With
    # loss-based responsive traffic the backlog drains once the overload ends; with the idealised flows
    # (probe 0) the link stays exactly full after it, so at a drop-tail queue (no AQM drops either) the
    # backlog never falls (the documented limit of that model).
    cap = np.full(30_000, 10e6)
    base = dict(flow_rate_per_s=0.2, onoff_sources=4, onoff_rate_bps=4e6, on_mean_s=1.0, off_mean_s=3.0)
    for policy in ("drop-tail", "codel", "red"):
        bn = Bottleneck(buffer_ms=100.0, policy=policy)
        aimd = share_link(cap, STEP, CrossTraffic(**base), bn, np.random.default_rng(3), details=True)
        ideal = share_link(cap, STEP, CrossTraffic(**base, responsive_probe=0.0), bn, np.random.default_rng(3),
                           details=True)
        hot = aimd.cross.unresponsive_bps > cap
        assert hot.any() and (~hot).any()
        if policy == "drop-tail":
            assert np.all(np.diff(ideal.queue.backlog_bytes) >= -1e-6) and ideal.queue_ms[-1] > 0
        after = np.flatnonzero(~hot & (aimd.cross.n_responsive == 0))
        assert after.size and aimd.queue_ms[after].min() == 0.0
        assert aimd.queue.dropped_bytes[hot].sum() > 0
        assert np.all(aimd.drop_share >= 0) and np.all(aimd.drop_share <= 1)


@pytest.mark.parametrize("policy", ["drop-tail", "red", "codel"])
def test_link_conserves_bytes_and_respects_the_buffer(policy):
    # per step: offered = delivered + dropped + change in backlog; delivered <= capacity; backlog <= buffer;
    # foreground + cross traffic = capacity (processor sharing is work conserving)
    rng = np.random.default_rng(11)
    cap = np.repeat(rng.uniform(2e6, 20e6, 200), 150) * (rng.random(30_000) > 0.005)
    ct = CrossTraffic(flow_rate_per_s=1.5, responsive_share=0.8, onoff_sources=3, onoff_rate_bps=4e6)
    r = share_link(cap, STEP, ct, Bottleneck(buffer_ms=60.0, policy=policy), np.random.default_rng(12), details=True)
    q = r.queue
    b = q.backlog_bytes
    b_start = np.concatenate([[0.0], b[:-1]])
    np.testing.assert_allclose(q.offered_bps * STEP / 8, q.delivered_bps * STEP / 8 + q.dropped_bytes + b - b_start,
                               atol=1e-6 * q.buffer_bytes)
    assert np.all(q.delivered_bps <= cap + 1e-6) and np.all(q.offered_bps >= -1e-9)
    assert b.max() <= q.buffer_bytes + 1e-9 and b.min() >= 0
    np.testing.assert_allclose(r.available_bps + r.cross_bps, cap, rtol=1e-9, atol=1e-6)
    assert np.all((r.drop_share >= 0) & (r.drop_share <= 1))


def test_same_seed_same_bytes_and_details_do_not_change_them():
    cap = np.random.default_rng(1).uniform(2e6, 20e6, 30_000)
    ct = CrossTraffic(flow_rate_per_s=1.0, onoff_sources=2, onoff_rate_bps=5e6, responsive_share=0.9)
    for policy in ("drop-tail", "red", "codel"):
        bn = Bottleneck(buffer_ms=100.0, policy=policy)
        a = share_link(cap, STEP, ct, bn, np.random.default_rng(5), np.random.default_rng(0))
        b = share_link(cap, STEP, ct, bn, np.random.default_rng(5), np.random.default_rng(99), details=True)
        c = share_link(cap, STEP, ct, bn, np.random.default_rng(6))
        for name in ("available_bps", "cross_bps", "queue_ms", "drop_share"):
            assert getattr(a, name).tobytes() == getattr(b, name).tobytes()
        assert a.cross_bps.tobytes() != c.cross_bps.tobytes()


def test_either_part_may_be_absent():
    cap = np.random.default_rng(2).uniform(1e6, 9e6, 500)
    r = share_link(cap, STEP, None, Bottleneck(buffer_ms=50.0), None)
    np.testing.assert_array_equal(r.available_bps, cap)
    assert r.cross_bps.max() == 0 and r.queue_ms.max() == 0 and r.drop_share.max() == 0
    ct = CrossTraffic(flow_rate_per_s=2.0)
    r = share_link(cap, STEP, ct, None, np.random.default_rng(1))
    cr = generate(ct, cap, STEP, np.random.default_rng(1))
    assert r.available_bps.tobytes() == cr.available_bps.tobytes() and r.queue_ms.max() == 0


# --- bad input ------------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("args, field", [
    ((np.array([1e6, -1.0]), STEP), "capacity_bps"),
    ((np.array([1e6, np.nan]), STEP), "capacity_bps"),
    ((np.ones((2, 2)), STEP), "capacity_bps"),
    ((np.array([]), STEP), "capacity_bps"),
    ((np.ones(3), 0.0), "step_s"),
    ((np.ones(3), -0.01), "step_s"),
    ((np.ones(3), True), "step_s"),
])
def test_bad_series_names_the_argument(args, field):
    with pytest.raises(TracegenError) as info:
        share_link(*args, CrossTraffic(flow_rate_per_s=1.0), Bottleneck(buffer_ms=10.0), np.random.default_rng(0))
    assert info.value.field == field


def test_bad_parts_name_their_section():
    cap = np.ones(10)
    with pytest.raises(TracegenError) as info:
        share_link(cap, STEP, {"flow_rate_per_s": 1.0}, None, np.random.default_rng(0))
    assert info.value.field == "cross_traffic"
    with pytest.raises(TracegenError) as info:
        share_link(cap, STEP, None, "codel", None)
    assert info.value.field == "bottleneck"
    with pytest.raises(TracegenError) as info:
        share_link(cap, STEP, CrossTraffic(flow_rate_per_s=1.0), None, 42)
    assert info.value.field == "rng_cross"


def test_the_flows_round_trip_includes_the_standing_queue():
    from tracegen.synth.link import level_rtt_ms

    c = np.array([12e6, 6e6, 0.0])
    # drop-tail: 100 ms of buffer at the mean capacity (12 Mbit/s) is 150 000 B, i.e. 100 ms at 12 Mbit/s
    # and 200 ms at 6 Mbit/s (hand computation); no capacity: the base RTT
    np.testing.assert_allclose(level_rtt_ms(Bottleneck(buffer_ms=100.0), c, 12e6, 50.0), [150.0, 250.0, 50.0])
    np.testing.assert_allclose(level_rtt_ms(Bottleneck(buffer_ms=100.0, policy="codel"), c, 12e6, 50.0), 55.0)
    # RED: halfway between min_th (25 %) and max_th (75 %) of the buffer
    np.testing.assert_allclose(level_rtt_ms(Bottleneck(buffer_ms=100.0, policy="red"), c, 12e6, 50.0),
                               [100.0, 150.0, 50.0])


def test_a_deeper_drop_tail_buffer_means_more_delay_and_less_loss():
    # bufferbloat (common practice): loss-based flows fill whatever buffer there is, so a deep buffer
    # trades loss for delay; by the Reno response function p ~ 1/RTT^2 at a given rate
    rng = np.random.default_rng(4)
    cap = np.repeat(rng.uniform(5e6, 20e6, 120), 100)
    ct = CrossTraffic(flow_rate_per_s=0.3, size_bytes_mean=1e6)
    shallow = share_link(cap, 0.1, ct, Bottleneck(buffer_ms=20.0), np.random.default_rng(1))
    deep = share_link(cap, 0.1, ct, Bottleneck(buffer_ms=400.0), np.random.default_rng(1))
    assert deep.queue_ms.mean() > 5 * shallow.queue_ms.mean()
    assert deep.drop_share.mean() < 0.5 * shallow.drop_share.mean()
