"""tracegen.synth composition: the sampler's columns, then the shared link on top of them."""

from __future__ import annotations

import numpy as np
import pytest

import tracegen
from builders import events, with_outage
from tracegen.synth import STREAM_SAMPLER, Bottleneck, CrossTraffic, HandoverPlan, synth_one, trace_rng
from tracegen.synth.link import share_link
from tracegen.synth.sampler import sample_trace

MODEL = with_outage(event_model=events(rate_per_hour=30.0, post=[0.0, 0.5, 0.5]))


def test_the_link_sits_on_the_sampled_capacity_and_adds_queue_delay_and_drops():
    cross = CrossTraffic(flow_rate_per_s=0.3, size_bytes_mean=2e6)
    bn = Bottleneck(buffer_ms=120.0, policy="drop-tail")
    tr = synth_one(MODEL, 3, 300.0, 0.1, 7, cross_traffic=cross, bottleneck=bn, handover=HandoverPlan(rate_per_min=2))
    plain = sample_trace(MODEL, 300.0, 0.1, trace_rng(7, 3, STREAM_SAMPLER), handover=HandoverPlan(rate_per_min=2))
    link = share_link(plain.bandwidth_bps, 0.1, cross, bn, trace_rng(7, 3, 1), trace_rng(7, 3, 2))
    # what the trace's own flow gets plus what cross traffic carries is the sampled capacity
    np.testing.assert_allclose(tr["bandwidth_bps"] + tr["cross_bps"], plain.bandwidth_bps, rtol=1e-9, atol=1e-6)
    np.testing.assert_array_equal(tr["queue_ms"], link.queue_ms)
    np.testing.assert_allclose(tr["rtt_ms"], plain.rtt_ms + link.queue_ms, equal_nan=True)
    # independent losses combine as 1 - (1 - a)(1 - b)
    np.testing.assert_allclose(tr["loss"], 1 - (1 - np.nan_to_num(plain.loss)) * (1 - link.drop_share), atol=1e-12)
    assert np.nanmax(tr["queue_ms"]) > 50.0  # loss-based cross flows fill a drop-tail buffer
    assert list(tr["event"]) == list(plain.event) and np.array_equal(tr["state"], plain.state)


def test_without_link_parts_there_are_no_link_columns():
    tr = synth_one(MODEL, 0, 120.0, 1.0, 1)
    assert "cross_bps" not in tr.columns and "queue_ms" not in tr.columns
    only_queue = synth_one(MODEL, 0, 120.0, 1.0, 1, bottleneck=Bottleneck(buffer_ms=50.0))
    assert "queue_ms" in only_queue.columns and "cross_bps" not in only_queue.columns


@pytest.mark.parametrize("policy", ["drop-tail", "red", "codel"])
def test_link_runs_give_the_same_bytes_whatever_the_count(policy):
    opts = dict(cross_traffic=CrossTraffic(flow_rate_per_s=0.5, onoff_sources=2),
                bottleneck=Bottleneck(buffer_ms=80.0, policy=policy))
    a = tracegen.synth(MODEL, 2, 120.0, 0.05, 9, **opts)
    b = tracegen.synth(MODEL, 3, 120.0, 0.05, 9, **opts)
    assert [t.id for t in a] == [t.id for t in b[:2]]
    assert a[0].id != a[1].id
