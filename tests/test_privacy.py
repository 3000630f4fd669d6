"""Personal-data handling defaults."""

from __future__ import annotations

import numpy as np
import pytest

from tracegen.privacy import (coarsen_degrees, identifier, is_address, is_personal_field, pseudonym, scrub_mapping,
                              scrub_text)


@pytest.mark.parametrize("name", ["src_ip", "IMSI", "imei", "device_id", "robot_id", "lat", "Longitude",
                                  "subscriber", "cname", "mac", "gps.lat", "ue_id",
                                  # camelCase and run-together names (common practice in log exports)
                                  "userId", "clientIp", "srcIP", "robotId", "macaddr", "serial_number", "bssid"])
def test_personal_names(name):
    assert is_personal_field(name)


@pytest.mark.parametrize("name", ["bandwidth_bps", "rtt_ms", "loss", "segment", "mode", "scenario", "cell",
                                  "latency_ms", "template", "throughputKbps", "snr", "rsrp", "operator"])
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


# Address shapes: IPv4 dotted quad (RFC 791), IPv6 text form (RFC 4291 section 2.2), MAC as six hex pairs
# with ':' or '-' (IEEE 802 canonical form).
@pytest.mark.parametrize("value", ["192.0.2.7", "2001:db8::1", "fe80::1", "00:1a:2b:3c:4d:5e", "00-1A-2B-3C-4D-5E"])
def test_addresses_are_recognised(value):
    assert is_address(value)


@pytest.mark.parametrize("value", ["lte", "QR-122", "12:30:45", "1.5", "bus-57", "00:1a:2b"])
def test_plain_values_are_not_addresses(value):
    assert not is_address(value)


def test_identifier_pseudonymises_personal_columns_and_address_values():
    assert identifier("QR-122", "robotId", keep_personal=False) == pseudonym("QR-122")
    assert identifier("192.0.2.7", "site", keep_personal=False) == pseudonym("192.0.2.7")
    assert identifier("lte", "access", keep_personal=False) == "lte"
    assert identifier("QR-122", "robotId", keep_personal=True) == "QR-122"
