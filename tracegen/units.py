"""Units a measured file may use, and their conversion to the Trace's units.

Names are case-sensitive where case carries meaning (``Mbps`` is megabits, ``MBps`` megabytes per second).
Prefixes are decimal (k = 1e3, M = 1e6, G = 1e9), as network rates are quoted (common practice).
"""

from __future__ import annotations

import re

import numpy as np

from .errors import InputError

# bit/s per unit. "bytes" (bytes counted per interval) is handled by bandwidth_to_bps since it needs
# the interval lengths.
BANDWIDTH_UNITS: dict[str, float] = {
    "bps": 1.0, "kbps": 1e3, "Mbps": 1e6, "Gbps": 1e9,
    "Bps": 8.0, "kBps": 8e3, "MBps": 8e6, "GBps": 8e9,
}
BYTES_PER_INTERVAL = "bytes"
BANDWIDTH_UNIT_NAMES = tuple(BANDWIDTH_UNITS) + (BYTES_PER_INTERVAL,)

# seconds per unit, for relative time stamps; "iso8601" is parsed as calendar time.
TIME_UNITS: dict[str, float] = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9}
ISO8601 = "iso8601"
TIME_UNIT_NAMES = tuple(TIME_UNITS) + (ISO8601,)

# milliseconds per unit, for delays (RTT, jitter)
DELAY_UNITS: dict[str, float] = {"ms": 1.0, "s": 1e3, "us": 1e-3}

# fraction per unit, for loss
LOSS_UNITS: dict[str, float] = {"fraction": 1.0, "percent": 0.01}

_DURATION = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(ns|us|ms|s|min|h)?\s*$")
_DURATION_SCALE = {"ns": 1e-9, "us": 1e-6, "ms": 1e-3, "s": 1.0, "min": 60.0, "h": 3600.0, None: 1.0}


def _pick(unit: str, table: dict, what: str, option: str, extra: tuple[str, ...] = ()) -> float:
    if unit in table:
        return table[unit]
    names = tuple(table) + extra
    raise InputError(f"unknown {what} unit '{unit}'", field=option, hint=f"use one of: {', '.join(names)}")


def check_bandwidth_unit(unit: str) -> str:
    """Return ``unit`` if it is a known bandwidth unit, else raise naming the known ones."""
    if unit != BYTES_PER_INTERVAL:
        _pick(unit, BANDWIDTH_UNITS, "bandwidth", "bandwidth unit", (BYTES_PER_INTERVAL,))
    return unit


def bandwidth_to_bps(values: np.ndarray, unit: str, interval_s: np.ndarray | None = None) -> np.ndarray:
    """Convert a bandwidth column to bit/s.

    For ``bytes`` (bytes counted over each sample's interval) ``interval_s`` gives each interval's length:
    bps = bytes * 8 / interval. Example: 125 000 bytes in a 0.5 s interval is 2 000 000 bit/s.
    """
    if unit == BYTES_PER_INTERVAL:
        if interval_s is None:
            raise InputError("bytes per interval needs the interval lengths", field="bandwidth unit")
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.asarray(values, dtype=np.float64) * 8.0 / interval_s
    return np.asarray(values, dtype=np.float64) * _pick(unit, BANDWIDTH_UNITS, "bandwidth", "bandwidth unit",
                                                        (BYTES_PER_INTERVAL,))


def time_scale_s(unit: str) -> float:
    """Seconds per unit of a relative time stamp."""
    return _pick(unit, TIME_UNITS, "time", "time unit", (ISO8601,))


def delay_scale_ms(unit: str, option: str = "delay unit") -> float:
    """Milliseconds per unit of a delay column."""
    return _pick(unit, DELAY_UNITS, "delay", option)


def loss_scale(unit: str) -> float:
    """Fraction per unit of a loss column."""
    return _pick(unit, LOSS_UNITS, "loss", "loss unit")


def parse_duration_s(text: str | float, option: str = "duration") -> float:
    """Parse ``'1s'``, ``'250ms'``, ``'2min'`` or a bare number of seconds into seconds (> 0)."""
    if isinstance(text, (int, float)):
        value = float(text)
    else:
        m = _DURATION.match(str(text))
        if not m:
            raise InputError(f"'{text}' is not a duration", field=option,
                             hint="write a number with an optional unit: ns, us, ms, s, min, h (e.g. 250ms)")
        value = float(m.group(1)) * _DURATION_SCALE[m.group(2)]
    if not (np.isfinite(value) and value > 0):
        raise InputError(f"duration {text!r} must be positive", field=option)
    return value
