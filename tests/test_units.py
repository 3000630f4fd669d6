"""Unit conversions and duration parsing."""

from __future__ import annotations

import numpy as np
import pytest

from tracegen import InputError
from tracegen.units import bandwidth_to_bps, delay_scale_ms, loss_scale, parse_duration_s, time_scale_s


def test_bytes_per_interval_hand_computed():
    # 1 500 bytes in 10 ms is 1 500 * 8 / 0.01 = 1 200 000 bit/s; 62 500 bytes in 0.5 s is 1 Mbit/s.
    np.testing.assert_allclose(bandwidth_to_bps(np.array([1500.0, 62500.0]), "bytes", np.array([0.01, 0.5])),
                               [1.2e6, 1e6])


@pytest.mark.parametrize("unit, factor", [("bps", 1), ("kbps", 1e3), ("Mbps", 1e6), ("Gbps", 1e9),
                                          ("Bps", 8), ("kBps", 8e3), ("MBps", 8e6)])
def test_rate_units_are_decimal(unit, factor):
    # Network rates use SI (decimal) prefixes: 1 kbit/s = 1000 bit/s (common practice; ITU-T and IEEE usage).
    assert bandwidth_to_bps(np.array([2.0]), unit)[0] == pytest.approx(2 * factor)


def test_case_carries_meaning():
    assert bandwidth_to_bps(np.array([1.0]), "MBps")[0] == 8 * bandwidth_to_bps(np.array([1.0]), "Mbps")[0]
    with pytest.raises(InputError, match="unknown bandwidth unit 'mbps'"):
        bandwidth_to_bps(np.array([1.0]), "mbps")


def test_other_scales():
    assert time_scale_s("ms") == 1e-3 and time_scale_s("us") == 1e-6
    assert delay_scale_ms("s") == 1000.0
    assert loss_scale("percent") == 0.01
    with pytest.raises(InputError, match="use one of"):
        time_scale_s("minutes")


@pytest.mark.parametrize("text, seconds", [("1s", 1.0), ("250ms", 0.25), ("2min", 120.0), ("1.5h", 5400.0),
                                           ("30", 30.0), ("1e-2 s", 0.01)])
def test_durations(text, seconds):
    assert parse_duration_s(text) == pytest.approx(seconds)


@pytest.mark.parametrize("text", ["", "fast", "-1s", "0", "1 fortnight"])
def test_bad_durations(text):
    with pytest.raises(InputError):
        parse_duration_s(text)
