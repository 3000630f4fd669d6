"""Condition cells: binning against numpy's own digitize, window values worked out by hand, key parsing."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tracegen.curate.cells import DIMENSIONS, CellScheme, Dimension, cell_table, parse_number, trace_cell_counts
from tracegen.curate.mix import parse_mix
from tracegen.errors import TracegenError
from tracegen.trace import Trace


def flat(level_bps: float, seconds: int = 180, *, rtt: float | None = 30.0, loss: float | None = 0.0,
         outage_from: int | None = None, source: str = "s", group: str = "g") -> Trace:
    t = np.arange(seconds, dtype=float)
    bw = np.full(seconds, level_bps)
    if outage_from is not None:
        bw[outage_from:] = 0.0
    return Trace.from_columns(t, bandwidth_bps=bw, rtt_ms=None if rtt is None else np.full(seconds, rtt),
                              loss=None if loss is None else np.full(seconds, loss), source=source, group=group)


def test_codes_match_numpy_digitize():
    # reference: numpy.digitize with right=False puts x in bin i when edges[i-1] <= x < edges[i]
    rng = np.random.default_rng(3)
    dim = Dimension("level", "mean_log_bw", (1e6, 5e6, 20e6), "bps")
    x = np.concatenate([rng.uniform(0, 4e7, 500), [1e6, 5e6, 20e6, 0.0]])
    assert np.array_equal(dim.codes(x), np.digitize(x, dim.edges))
    assert dim.codes(np.array([np.nan]))[0] == -1
    assert dim.labels == ("<1M", "1M-5M", "5M-20M", "20M+")


def test_zero_bin_is_exactly_zero():
    dim = Dimension("outage", "outage_share", (0.1,), "share", zero_bin=True)
    assert dim.labels == ("none", "<10%", "10%+")
    assert dim.codes(np.array([0.0, 1e-9, 0.0999, 0.1, 1.0])).tolist() == [0, 1, 1, 2, 2]


def test_window_values_by_hand():
    # three 60 s windows at 3 Mbit/s, RTT 80 ms, loss 2 %: level 1M-5M, cv 0, rtt 50-150, loss 1-5, no outage
    tr = flat(3e6, 180, rtt=80.0, loss=0.02)
    table = cell_table([tr])
    assert len(table) == 3
    assert table.keys == ["level=1M-5M,variability=<0.2,rtt=50ms-150ms,loss=1%-5%,outage=none"]
    # the last 30 s of a 120 s trace are outage: window 2 has half its samples at 0 bit/s
    tr = flat(30e6, 120, rtt=None, loss=None, outage_from=90)
    table = cell_table([tr], CellScheme.build("level,variability,rtt,outage"))
    keys = [table.keys[c] for c in table.cell]
    assert keys[0] == "level=20M+,variability=<0.2,rtt=unknown,outage=none"
    # cv of a half-zero window is sd/mean = 1 (population sd of {0, x} halves is x/2, mean x/2)
    assert keys[1] == "level=20M+,variability=0.5+,rtt=unknown,outage=10%+"


def test_all_outage_window_is_lowest_level():
    tr = flat(5e6, 120, outage_from=60)
    table = cell_table([tr], CellScheme.build("level,outage"))
    assert [table.keys[c] for c in table.cell] == ["level=5M-20M,outage=none", "level=<1M,outage=10%+"]


def test_counts_per_trace():
    keys, counts = trace_cell_counts([flat(3e6, 180), flat(30e6, 120), flat(3e6, 60)], CellScheme.build("level"))
    assert keys == ["level=1M-5M", "level=20M+"]
    assert counts.tolist() == [[3, 0], [0, 2], [1, 0]]


def test_build_from_command_line_texts():
    s = CellScheme.build("level,rtt", ["level=2M,8M", "rtt=40ms,100"], 30.0)
    assert s.names == ("level", "rtt") and s.scale_s == 30.0
    assert s.dims[0].edges == (2e6, 8e6) and s.dims[1].edges == (40.0, 100.0)
    assert s.parse_key("rtt=40ms-100ms") == {"rtt": 1}
    assert parse_number("1%", "x") == pytest.approx(0.01)
    assert parse_number("2.5k", "x") == 2500.0


@pytest.mark.parametrize("dims, bins, words", [
    ("level,speed", (), "no dimension named 'speed'"),
    ("level,level", (), "repeat"),
    (None, ("level=5M,1M",), "increasing"),
    (None, ("level=abc",), "not a number"),
    (None, ("level",), "cannot read"),
    (None, ("outage=0,0.1",), "above 0"),
])
def test_bad_schemes(dims, bins, words):
    with pytest.raises(TracegenError, match=words):
        CellScheme.build(dims, list(bins))


@pytest.mark.parametrize("key, words", [
    ("level=<2M", "not a bin of level"),
    ("speed=fast", "no dimension named 'speed'"),
    ("level", "cannot read cell"),
    ("level=<1M,level=20M+", "twice"),
])
def test_bad_keys_name_the_problem(key, words):
    with pytest.raises(TracegenError, match=words):
        CellScheme().parse_key(key)


def test_default_scheme_has_five_dimensions():
    assert [d.name for d in DIMENSIONS] == ["level", "variability", "rtt", "loss", "outage"]
    assert math.isclose(CellScheme().scale_s, 60.0)


def test_mix_checks():
    s = CellScheme()
    mix = parse_mix({"cells": {"level=<1M": 0.25, "level=1M-5M": 0.75}, "tags": {"access": {"lte": 1.0}}}, s)
    assert mix.cell_dims == ("level",) and mix.cells == {"level=<1M": 0.25, "level=1M-5M": 0.75}
    with pytest.raises(TracegenError, match="sum to 0.9"):
        parse_mix({"cells": {"level=<1M": 0.5, "level=1M-5M": 0.4}}, s)
    with pytest.raises(TracegenError, match="same dimensions"):
        parse_mix({"cells": {"level=<1M": 0.5, "outage=none": 0.5}}, s)
    with pytest.raises(TracegenError, match="sum to 1.2"):
        parse_mix({"tags": {"access": {"lte": 0.6, "wifi": 0.6}}}, s)
    with pytest.raises(TracegenError, match="unknown table"):
        parse_mix({"cels": {}}, s)
    with pytest.raises(TracegenError, match="not a bin"):
        parse_mix({"cells": {"level=<3M": 1.0}}, s)
    with pytest.raises(TracegenError, match=">= 0"):
        parse_mix({"cells": {"level=<1M": -0.5, "level=1M-5M": 1.5}}, s)
