import numpy as np
import pytest

from tracegen.errors import TracegenError
from tracegen.jitter import interarrival_jitter


def reference(transit):
    """RFC 3550 appendix A.8 recurrence, written as the RFC states it (one packet at a time)."""
    out = []
    jitter, prev = 0.0, None
    for x in transit:
        if np.isnan(x):
            out.append(np.nan)
            continue
        if prev is not None:
            d = abs(x - prev)
            jitter += (d - jitter) / 16.0
        prev = x
        out.append(jitter)
    return np.array(out)


def test_hand_computed_sequence():
    # RFC 3550 A.8: J += (|D| - J)/16, J = 0 at the first packet. Worked by hand:
    # transits 0, 10, 5, 5, 20 -> |D| = 10, 5, 0, 15
    # J1 = 0 + (10 - 0)/16                  = 0.625
    # J2 = 0.625 + (5 - 0.625)/16           = 0.8984375
    # J3 = 0.8984375 + (0 - 0.8984375)/16   = 0.84228515625
    # J4 = 0.84228515625 + (15 - 0.84228515625)/16 = 1.727142333984375
    got = interarrival_jitter(np.array([0.0, 10.0, 5.0, 5.0, 20.0]))
    np.testing.assert_allclose(got, [0.0, 0.625, 0.8984375, 0.84228515625, 1.727142333984375],
                               rtol=0, atol=1e-15)


def test_missing_packets_are_skipped():
    # the same hand-computed sequence with NaN (missing packets) interleaved: D spans the gaps,
    # so the known positions carry the values above and the missing ones are NaN
    got = interarrival_jitter(np.array([np.nan, 0.0, 10.0, np.nan, np.nan, 5.0, 5.0, np.nan, 20.0]))
    expect = [np.nan, 0.0, 0.625, np.nan, np.nan, 0.8984375, 0.84228515625, np.nan, 1.727142333984375]
    np.testing.assert_allclose(got, expect, rtol=0, atol=1e-15)


def test_matches_rfc_loop_on_random_data():
    rng = np.random.default_rng(3550)
    transit = rng.normal(50.0, 8.0, 5000)
    transit[rng.random(5000) < 0.1] = np.nan
    np.testing.assert_allclose(interarrival_jitter(transit), reference(transit), rtol=1e-12, atol=1e-12)


def test_constant_transit_has_zero_jitter():
    # equal transit times mean D = 0 for every packet, so J stays at its start value 0 (RFC 3550 A.8)
    assert np.array_equal(interarrival_jitter(np.full(10, 42.0)), np.zeros(10))


def test_edge_shapes():
    assert interarrival_jitter(np.array([])).shape == (0,)
    assert np.isnan(interarrival_jitter(np.array([np.nan, np.nan]))).all()
    assert interarrival_jitter(np.array([7.0])).tolist() == [0.0]


@pytest.mark.parametrize("bad", [np.zeros((2, 2)), np.array([1.0, np.inf])])
def test_bad_input_is_a_tracegen_error(bad):
    with pytest.raises(TracegenError):
        interarrival_jitter(bad)
