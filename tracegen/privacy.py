"""Personal data in measured traces: what counts as personal, and how ingest drops or coarsens it.

Defaults (what every reader does unless ``keep_personal`` is set):
- identifiers (IP and MAC addresses, IMSI/IMEI/MSISDN, device, subscriber or user ids, RTCP CNAMEs) are
  never stored; where one is used as a group, a tag or a split column it is replaced by a salted hash (a
  pseudonym), which still keeps one device's traces together for leak-free splits. The salt is fixed, so
  the same id gives the same pseudonym in every catalog, and a guessable id can be found by trying it;
- locations are rounded to 0.01 degree (about 1.1 km of latitude);
- calendar start times are kept to the day only.
This is a technical default, not legal advice: follow the data-protection law that applies to you.
"""

from __future__ import annotations

import hashlib
import re
from typing import Any, Mapping

import numpy as np

LOCATION_DECIMALS = 2

_PERSONAL_NAME = re.compile(
    r"(^|[_\-. ])(ip|ipv4|ipv6|addr|address|src|dst|host|hostname|mac|imsi|imei|msisdn|iccid|phone|"
    r"subscriber|user|username|userid|uid|uuid|account|device|device_id|deviceid|id|ue_id|serial|sn|bssid|"
    r"macaddr|ipaddr|cname|email|lat|latitude|lon|lng|longitude|gps|location)([_\-. ]|$)",
    re.IGNORECASE,
)
_CAMEL_BREAK = re.compile(r"(?<=[a-z0-9])(?=[A-Z])")  # userId -> user_Id, srcIP -> src_IP
_MAC = re.compile(r"[0-9a-fA-F]{2}(?:([:-])[0-9a-fA-F]{2})(?:\1[0-9a-fA-F]{2}){4}")
_IPV4 = re.compile(r"\b(?:\d{1,3}\.){3}\d{1,3}\b")
_IPV6 = re.compile(r"(?<![0-9A-Za-z:])[0-9a-fA-F]{0,4}(?::[0-9a-fA-F]{0,4}){2,7}(?![0-9A-Za-z:])")


def is_personal_field(name: str) -> bool:
    """True when a column or key name suggests an identifier or a location (``user_id``, ``userId``)."""
    return bool(_PERSONAL_NAME.search(_CAMEL_BREAK.sub("_", name.strip())))


def is_address(value: str) -> bool:
    """True when a whole value is an IPv4, IPv6 or MAC address."""
    text = value.strip()
    return bool(_MAC.fullmatch(text)) or scrub_text(text) == "<address>"  # scrub_text knows IPv4 and IPv6


def identifier(value: str, name: str, keep_personal: bool) -> str:
    """A label value as stored: its pseudonym when the column ``name`` looks personal or the value is an
    address, else the value itself (always the value with ``keep_personal``)."""
    if keep_personal or not (is_personal_field(name) or is_address(value)):
        return value
    return pseudonym(value)


def pseudonym(value: str, *, salt: str = "tracegen") -> str:
    """A stable pseudonym for an identifier: the same value always maps to the same 12 hex characters."""
    return "p-" + hashlib.sha256(f"{salt}\0{value}".encode()).hexdigest()[:12]


def coarsen_degrees(values: np.ndarray, decimals: int = LOCATION_DECIMALS) -> np.ndarray:
    """Round coordinates to ``decimals`` decimal places (NaN stays NaN)."""
    return np.round(np.asarray(values, dtype=np.float64), decimals)


def scrub_text(text: str) -> str:
    """Replace IP addresses inside free text by a placeholder."""
    def v6(m: re.Match) -> str:  # "::" or eight groups; leaves clock times such as 12:30:45 alone
        word = m.group(0)
        return "<address>" if "::" in word or word.count(":") == 7 else word

    return _IPV6.sub(v6, _IPV4.sub("<address>", text))


def scrub_mapping(values: Mapping[str, Any], keep_personal: bool) -> dict[str, Any]:
    """Drop keys that look personal (unless ``keep_personal``)."""
    if keep_personal:
        return dict(values)
    return {k: v for k, v in values.items() if not is_personal_field(k)}


def calendar_start(iso_text: str, keep_personal: bool) -> str:
    """A start time for provenance: full when kept, else the day only (``YYYY-MM-DD``)."""
    return iso_text if keep_personal else iso_text[:10]
