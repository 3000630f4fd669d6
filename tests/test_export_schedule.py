"""The per-packet delivery schedule: hand-worked examples, an exact-arithmetic reference, the
one-packet guarantee per interval, the NaN rules, the files (read back with pyarrow and pandas) and
bad input."""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from tracegen.errors import TracegenError
from tracegen.export.schedule import (
    FORMAT,
    METADATA_KEY,
    delivery_schedule,
    schedule_file_names,
    write_schedule,
    write_schedules,
)
from tracegen.trace import Trace


def hand_trace(**meta) -> Trace:
    return Trace.from_columns([0.0, 1.0, 2.0], bandwidth_bps=[12_000.0, 0.0, 24_000.0], **meta)


# --- hand-worked examples -----------------------------------------------------------------------------


def test_hand_worked_outage_example() -> None:
    # 1500-byte packets are 12,000 bits each.
    # 0-1 s at 12 kbit/s carries 12,000 bits: packet 1 is complete exactly at 1.0 s.
    # 1-2 s is an outage: nothing.
    # 2-3 s at 24 kbit/s: packet 2 needs 12,000 more bits, 12,000 / 24,000 = 0.5 s -> 2.5 s;
    # packet 3 another 0.5 s -> 3.0 s, the end of the trace (36,000 bits = 3 whole packets, none left over).
    s = delivery_schedule(hand_trace())
    assert s.delivery_us.tolist() == [1_000_000, 2_500_000, 3_000_000]
    assert s.sample.tolist() == [0, 2, 2]
    assert s.duration_us == 3_000_000
    df = s.to_pandas()
    assert df["packet"].tolist() == [1, 2, 3] and df["bytes"].tolist() == [1500] * 3


def test_hand_worked_rounding_and_carry_over() -> None:
    # 100-byte packets = 800 bits; the trace starts at t = 100 s (times count from its first sample).
    # 0-1 s at 3,000 bit/s: packets at 800/3000 = 0.2666.. s -> rounded up to 266,667 us,
    #   1600/3000 = 0.5333.. s -> 533,334 us, 2400/3000 = 0.8 s exactly -> 800,000 us;
    #   600 bits are left over at 1 s.
    # 1-2 s at 1,000 bit/s: packet 4 needs 200 more bits -> 1.2 s; packet 5 800 more -> 2.0 s exactly.
    tr = Trace.from_columns([100.0, 101.0], bandwidth_bps=[3_000.0, 1_000.0])
    s = delivery_schedule(tr, packet_bytes=100)
    assert s.delivery_us.tolist() == [266_667, 533_334, 800_000, 1_200_000, 2_000_000]
    assert s.sample.tolist() == [0, 0, 0, 1, 1]


def test_last_partial_packet_is_not_delivered() -> None:
    # 2 s at 10,000 bit/s = 20,000 bits: one 12,000-bit packet (at 1.2 s); the other 8,000 bits are dropped.
    tr = Trace.from_columns([0.0, 1.0], bandwidth_bps=[10_000.0, 10_000.0])
    assert delivery_schedule(tr).delivery_us.tolist() == [1_200_000]


# --- against an exact reference -----------------------------------------------------------------------


def exact_reference(t_ms: list[int], bw: list[float], packet_bytes: int) -> list[int]:
    """Delivery times by the definition, one packet at a time in exact rational arithmetic: packet k is
    delivered when the integral of the step-wise bandwidth first reaches k * S * 8 bits, rounded up to
    the microsecond, counted from the first sample. The last sample holds for the median spacing."""
    edges_us = [(m - t_ms[0]) * 1000 for m in t_ms]
    edges_us.append(edges_us[-1] + int(np.median(np.diff(t_ms))) * 1000)
    bits = 8 * packet_bytes
    out, k, cum = [], 1, Fraction(0)
    for i, rate in enumerate(bw):
        rate = Fraction(rate)
        end = cum + rate * Fraction(edges_us[i + 1] - edges_us[i], 10**6)
        while k * bits <= end:
            out.append(edges_us[i] + math.ceil((k * bits - cum) * 10**6 / rate))
            k += 1
        cum = end
    return out


@pytest.mark.parametrize("seed,packet_bytes", [(1, 68), (2, 200), (3, 1500)])
def test_matches_exact_reference(seed: int, packet_bytes: int) -> None:
    rng = np.random.default_rng(seed)
    n = 60
    t_ms = np.cumsum(rng.integers(5, 60, n)).tolist()          # irregular spacing on a millisecond grid
    bw = rng.lognormal(math.log(300e3), 1.0, n)
    bw[rng.random(n) < 0.15] = 0.0                            # outages
    tr = Trace.from_columns(np.array(t_ms) / 1000.0, bandwidth_bps=bw)
    got = delivery_schedule(tr, packet_bytes=packet_bytes).delivery_us.tolist()
    want = exact_reference(t_ms, bw.tolist(), packet_bytes)
    assert len(want) > 50
    assert got == want


def integer_reference(rates_bps: np.ndarray, step_us: int, packet_bytes: int) -> np.ndarray:
    """Delivery times by the definition in exact integer arithmetic, for whole-number rates on a grid of
    whole microseconds: bits are counted in millionths (a rate times microseconds), so nothing rounds
    until the final ceiling division."""
    carried = np.concatenate(([0], np.cumsum(rates_bps * step_us)))     # millionths of a bit, int64
    packet = packet_bytes * 8 * 10**6
    k = np.arange(1, carried[-1] // packet + 1, dtype=np.int64) * packet
    i = np.searchsorted(carried, k, side="left") - 1                    # first edge reaching k packets
    return i * step_us + -(-(k - carried[i]) // rates_bps[i])            # ceil of millionths / (bit/s) = us


@pytest.mark.parametrize("n,top_bps,packet_bytes", [(20_000, 3_000, 68), (60_000, 50_000_000, 1500)])
def test_matches_integer_reference(n: int, top_bps: int, packet_bytes: int) -> None:
    # 10 ms steps, whole-number rates whose bits per step are not whole (rate / 100), so the float sums
    # are inexact while many true delivery times fall on whole microseconds: this checks both the
    # rounding-up and the tolerance against float error (module docstring of tracegen.export.schedule).
    rates = np.random.default_rng(1).integers(1, top_bps, n)
    tr = Trace.from_columns(np.arange(n) * 0.01, bandwidth_bps=rates.astype(np.float64))
    got = delivery_schedule(tr, packet_bytes=packet_bytes).delivery_us
    want = integer_reference(rates, 10_000, packet_bytes)
    assert len(want) > 500
    np.testing.assert_array_equal(got, want)


def test_no_drift_after_a_long_fast_stretch() -> None:
    # 1000 s at 123,456,789 bit/s (1,234,567.89 bits per 10 ms step, not whole) carries 1.2e11 bits;
    # a plain float running sum drifts by hundredths of a bit over that, which at the slow rates that
    # follow (1 to 100 kbit/s) moves delivery times by whole microseconds.
    rates = np.concatenate((np.full(100_000, 123_456_789), np.random.default_rng(1).integers(1, 100_003, 20_000)))
    tr = Trace.from_columns(np.arange(rates.size) * 0.01, bandwidth_bps=rates.astype(np.float64))
    got = delivery_schedule(tr, packet_bytes=65535).delivery_us
    want = integer_reference(rates, 10_000, 65535)
    assert len(want) > 235_000
    np.testing.assert_array_equal(got, want)


# --- the guarantee ------------------------------------------------------------------------------------


def random_trace(seed: int, n: int = 3000) -> Trace:
    rng = np.random.default_rng(seed)
    t = np.cumsum(rng.uniform(0.001, 0.2, n)) + 5.0             # irregular, not on a microsecond grid
    bw = rng.lognormal(math.log(2e6), 1.5, n)
    bw[rng.random(n) < 0.1] = 0.0
    return Trace.from_columns(t, bandwidth_bps=bw)


@pytest.mark.parametrize("packet_bytes", [68, 1500, 65535])
def test_within_one_packet_per_interval_and_overall(packet_bytes: int) -> None:
    tr = random_trace(7)
    s = delivery_schedule(tr, packet_bytes=packet_bytes)
    bits = 8 * packet_bytes
    t = tr["t_s"]
    # planned bits from the definition, exactly: interval i runs from sample i's time to the next
    # (the last for the median spacing), both taken to the nearest microsecond from the first sample
    step_us = round(float(np.median(np.diff(t))) * 1e6)
    start_us = [round((x - t[0]) * 1e6) for x in t.tolist()]
    edges_us = start_us + [start_us[-1] + step_us]
    planned = [Fraction(b) * Fraction(edges_us[i + 1] - edges_us[i], 10**6)
               for i, b in enumerate(tr["bandwidth_bps"].tolist())]
    # delivered per interval, counted from the times alone: deliveries in (start, end]
    upto = np.searchsorted(s.delivery_us, np.array(edges_us), side="right")
    delivered = np.diff(upto)
    assert upto[0] == 0
    for p, d in zip(planned, delivered.tolist()):
        assert abs(d * bits - p) < bits
    cum_planned = np.cumsum(np.array(planned, dtype=object))
    behind = cum_planned - np.cumsum(delivered) * bits
    assert all(0 <= x < bits for x in behind)                 # never ahead, never a packet behind
    # mean rates over the trace's span: equal within one packet over the whole span
    span_s = Fraction(edges_us[-1], 10**6)
    assert abs(len(s) * bits / span_s - sum(planned) / span_s) < bits / span_s
    # the sample column names the interval that delivered each packet
    np.testing.assert_array_equal(np.bincount(s.sample, minlength=len(tr)), delivered)
    assert np.all(np.diff(s.delivery_us) >= 0)


def test_one_hour_at_50_mbit_per_s() -> None:
    # 50e6 bit/s * 3600 s / 12,000 bit = 15,000,000 packets, one every 240 us.
    n = 360_000
    tr = Trace.from_columns(np.arange(n) * 0.01, bandwidth_bps=np.full(n, 50e6))
    s = delivery_schedule(tr)
    assert len(s) == 15_000_000
    assert s.delivery_us[:3].tolist() == [240, 480, 720]
    assert s.delivery_us[-1] == 3_600_000_000
    assert np.all(np.diff(s.delivery_us[::997]) > 0)


# --- unknown bandwidth --------------------------------------------------------------------------------


def test_unknown_bandwidth_is_refused_by_default() -> None:
    tr = Trace.from_columns([0.0, 1.0, 2.0, 3.0], bandwidth_bps=[1e6, np.nan, 1e6, np.nan], source="walk.csv")
    with pytest.raises(TracegenError) as err:
        delivery_schedule(tr)
    e = err.value
    assert e.field == "bandwidth_bps" and e.path == "walk.csv"
    assert "at 2 of 4 samples, first at t = 1 s" in e.message
    assert "hold" in e.hint and "zero" in e.hint


def test_zero_rule_is_an_outage() -> None:
    # the hand-worked outage example with the outage unknown instead of 0
    tr = Trace.from_columns([0.0, 1.0, 2.0], bandwidth_bps=[12_000.0, np.nan, 24_000.0])
    s = delivery_schedule(tr, nan="zero")
    assert s.delivery_us.tolist() == [1_000_000, 2_500_000, 3_000_000] and s.nan_rule == "zero"


def test_hold_rule_keeps_the_last_known_rate() -> None:
    # 12 kbit/s held over 0-2 s: packets at 1.0 and 2.0 s; 2-3 s at 24 kbit/s: 2.5 and 3.0 s.
    tr = Trace.from_columns([0.0, 1.0, 2.0], bandwidth_bps=[12_000.0, np.nan, 24_000.0])
    assert delivery_schedule(tr, nan="hold").delivery_us.tolist() == [1_000_000, 2_000_000, 2_500_000, 3_000_000]


def test_hold_rule_before_the_first_known_rate_takes_that_rate() -> None:
    # 24 kbit/s over all 3 s: packets every 0.5 s
    tr = Trace.from_columns([0.0, 1.0, 2.0], bandwidth_bps=[np.nan, np.nan, 24_000.0])
    assert delivery_schedule(tr, nan="hold").delivery_us.tolist() == [500_000 * k for k in range(1, 7)]


def test_all_unknown() -> None:
    tr = Trace.from_columns([0.0, 1.0], bandwidth_bps=[np.nan, np.nan])
    for rule in ("error", "hold"):
        with pytest.raises(TracegenError) as err:
            delivery_schedule(tr, nan=rule)
        assert err.value.field == "bandwidth_bps"
    assert len(delivery_schedule(tr, nan="zero")) == 0


def test_unknown_rule() -> None:
    with pytest.raises(TracegenError) as err:
        delivery_schedule(hand_trace(), nan="interpolate")
    assert err.value.field == "nan" and "error, hold, zero" in err.value.hint


# --- bad input ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("size", [67, 65536, 1500.5, 0, -1500, True, "1500", None, float("nan")])
def test_packet_size_out_of_range(size) -> None:
    # 68: the datagram every IPv4 host must accept, 65535: the largest total length (RFC 791)
    with pytest.raises(TracegenError) as err:
        delivery_schedule(hand_trace(), packet_bytes=size)
    assert err.value.field == "packet_bytes" and "68" in err.value.message and "65535" in err.value.message


@pytest.mark.parametrize("size", [68, 65535, 1500.0, np.int32(1500)])
def test_packet_size_limits_are_accepted(size) -> None:
    assert delivery_schedule(hand_trace(), packet_bytes=size).packet_bytes == int(size)


def test_trace_without_samples() -> None:
    empty = Trace(data={"t_s": np.array([]), "bandwidth_bps": np.array([])})  # bypasses validation
    with pytest.raises(TracegenError, match="no samples"):
        delivery_schedule(empty)


def test_trace_of_one_sample() -> None:
    with pytest.raises(TracegenError, match="one sample") as err:
        delivery_schedule(Trace.from_columns([0.0], bandwidth_bps=[1e6]))
    assert err.value.field == "t_s"


# --- files --------------------------------------------------------------------------------------------


def test_parquet_file(tmp_path: Path) -> None:
    tr = hand_trace(tags={"direction": "uplink"})
    write_schedule(tr, tmp_path / "s.parquet")
    table = pq.read_table(tmp_path / "s.parquet")              # reference reader: pyarrow.parquet
    assert [(f.name, str(f.type)) for f in table.schema] == [
        ("packet", "int64"), ("delivery_us", "int64"), ("bytes", "int32"), ("sample", "int32")]
    assert table.column("delivery_us").to_pylist() == [1_000_000, 2_500_000, 3_000_000]
    meta = json.loads(table.schema.metadata[METADATA_KEY])
    assert meta == {"format": FORMAT, "version": 1, "packet_bytes": 1500, "trace_id": tr.id,
                    "direction": "uplink", "nan_rule": "error", "packets": 3, "duration_us": 3_000_000,
                    "time_unit": "us", "time_origin": "the trace's first sample"}


def test_csv_file_reads_back_with_pandas(tmp_path: Path) -> None:
    tr = random_trace(3, n=200)
    s = write_schedule(tr, tmp_path / "s.csv", packet_bytes=576)
    text = (tmp_path / "s.csv").read_text()
    assert text.split("\n", 1)[0] == "packet,delivery_us,bytes,sample"
    df = pd.read_csv(tmp_path / "s.csv")                      # reference reader: pandas
    pd.testing.assert_frame_equal(df, s.to_pandas(), check_dtype=False)
    assert len(df) > 100


def test_empty_schedule_is_written(tmp_path: Path) -> None:
    tr = Trace.from_columns([0.0, 1.0], bandwidth_bps=[0.0, 0.0])
    write_schedule(tr, tmp_path / "s.parquet")
    assert pq.read_table(tmp_path / "s.parquet").num_rows == 0


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_same_trace_same_bytes(tmp_path: Path, fmt: str) -> None:
    write_schedule(random_trace(5, n=500), tmp_path / f"a.{fmt}")
    write_schedule(random_trace(5, n=500), tmp_path / f"b.{fmt}")
    assert (tmp_path / f"a.{fmt}").read_bytes() == (tmp_path / f"b.{fmt}").read_bytes()


def test_existing_file_needs_force(tmp_path: Path) -> None:
    path = tmp_path / "s.parquet"
    path.write_text("keep me")
    with pytest.raises(TracegenError) as err:
        write_schedule(hand_trace(), path)
    assert err.value.hint == "pass --force to replace it" and path.read_text() == "keep me"
    write_schedule(hand_trace(), path, force=True)
    assert pq.read_table(path).num_rows == 3


def test_unknown_file_ending(tmp_path: Path) -> None:
    with pytest.raises(TracegenError) as err:
        write_schedule(hand_trace(), tmp_path / "s.txt")
    assert ".parquet or .csv" in err.value.hint


# --- several traces -----------------------------------------------------------------------------------


def pair_and_single() -> list[Trace]:
    down = hand_trace(group="drive 7", tags={"direction": "downlink"})
    up = Trace.from_columns([0.0, 1.0], bandwidth_bps=[12_000.0, 12_000.0], group="drive 7",
                            tags={"direction": "uplink"})
    lone = Trace.from_columns([0.0, 1.0], bandwidth_bps=[24_000.0, 24_000.0], group="walk",
                              tags={"direction": "downlink"})
    return [down, up, lone]


def test_pairs_are_named_by_group_and_direction(tmp_path: Path) -> None:
    down, up, lone = pair_and_single()
    written = write_schedules([down, up, lone], tmp_path)
    assert [w.path.name for w in written] == ["drive_7.downlink.schedule.parquet", "drive_7.uplink.schedule.parquet",
                                              f"{lone.id}.schedule.parquet"]
    assert [(w.trace_id, w.direction, w.packets) for w in written] == [
        (down.id, "downlink", 3), (up.id, "uplink", 2), (lone.id, "downlink", 4)]
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(w.path.name for w in written)
    meta = json.loads(pq.read_table(written[1].path).schema.metadata[METADATA_KEY])
    assert meta["trace_id"] == up.id and meta["direction"] == "uplink"


def test_csv_names(tmp_path: Path) -> None:
    assert schedule_file_names(pair_and_single()[:2], "csv") == ["drive_7.downlink.schedule.csv",
                                                                 "drive_7.uplink.schedule.csv"]


def test_existing_files_refused_before_anything_is_written(tmp_path: Path) -> None:
    traces = pair_and_single()
    (tmp_path / "drive_7.uplink.schedule.parquet").write_text("keep me")
    with pytest.raises(TracegenError) as err:
        write_schedules(traces, tmp_path)
    assert "drive_7.uplink.schedule.parquet" in err.value.message and "--force" in err.value.hint
    assert [p.name for p in tmp_path.iterdir()] == ["drive_7.uplink.schedule.parquet"]
    assert len(write_schedules(traces, tmp_path, force=True)) == 3


def test_two_traces_on_one_name_are_refused(tmp_path: Path) -> None:
    with pytest.raises(TracegenError, match="both be written"):
        write_schedules([hand_trace(), hand_trace()], tmp_path)   # same samples, same id
    assert not list(tmp_path.iterdir())


def test_unknown_bandwidth_in_a_later_trace_stops_all(tmp_path: Path) -> None:
    traces = pair_and_single() + [Trace.from_columns([0.0, 1.0], bandwidth_bps=[1e6, np.nan])]
    with pytest.raises(TracegenError) as err:
        write_schedules(traces, tmp_path)
    assert err.value.field == "bandwidth_bps"
    assert not list(tmp_path.iterdir())
    assert len(write_schedules(traces, tmp_path, nan="zero")) == 4


def test_bad_options_for_many(tmp_path: Path) -> None:
    with pytest.raises(TracegenError) as err:
        write_schedules(pair_and_single(), tmp_path, fmt="json")
    assert err.value.field == "format"
    with pytest.raises(TracegenError) as err:
        write_schedules(pair_and_single(), tmp_path, packet_bytes=67)
    assert err.value.field == "packet_bytes"
    assert not list(tmp_path.iterdir())
