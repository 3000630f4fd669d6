"""Personal-data handling defaults."""

from __future__ import annotations

import numpy as np
import pytest

from tracegen.privacy import coarsen_degrees, is_personal_field, pseudonym, scrub_mapping, scrub_text


@pytest.mark.parametrize("name", ["src_ip", "IMSI", "imei", "device_id", "robot_id", "lat", "Longitude",
                                  "subscriber", "cname", "mac", "gps.lat", "ue_id"])
def test_personal_names(name):
    assert is_personal_field(name)


@pytest.mark.parametrize("name", ["bandwidth_bps", "rtt_ms", "loss", "segment", "mode", "scenario", "cell",
                                  "latency_ms", "template"])
def test_plain_names(name):
    assert not is_personal_field(name)


def test_pseudonym_is_stable_and_hides_the_value():
    assert pseudonym("R-17") == pseudonym("R-17") != pseudonym("R-18")
    assert "R-17" not in pseudonym("R-17")


def test_coarsening_rounds_to_about_a_kilometre():
    # 0.01 degree of latitude is about 1.11 km (Earth's meridian circumference ~40 008 km / 36 000; from memory).
    np.testing.assert_allclose(coarsen_degrees(np.array([51.123456, np.nan])), [51.12, np.nan])


def test_scrubbing():
    assert scrub_text("PING host (192.0.2.7) and 2001:db8::1") == "PING host (<address>) and <address>"
    assert scrub_mapping({"ssrc": 1, "cname": "a@b", "src_ip": "x"}, keep_personal=False) == {"ssrc": 1}
    assert scrub_mapping({"cname": "a@b"}, keep_personal=True) == {"cname": "a@b"}
