import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracegen.errors import InputError, TracegenError
from tracegen.ingest import describe_file, packets, read_file
from tracegen.jitter import interarrival_jitter

DATA = Path(__file__).parent / "data"
RTP = DATA / "packets_rtp.csv"
RTP_OPTIONS = dict(time_column="arrival_ms", bytes_column="size", seq_column="rtp_seq", seq_bits=16,
                   send_time_column="send_ms", time_unit="ms", interval_s=0.5)


def write_rows(tmp_path, rows, delim=",", header=None, name="p.pkts"):
    p = tmp_path / name
    text = "" if header is None else delim.join(header) + "\n"
    text += "".join(delim.join(str(c) for c in r) + "\n" for r in rows)
    p.write_text(text)
    return p


def one(path, **options):
    traces = read_file(path, "packets", **options)
    assert len(traces) == 1
    return traces[0]


def test_hand_computed_rate(tmp_path):
    # 1250-byte packets, 100 per second for 2 s, 0.5 s bins: 50 packets per bin
    # -> 1250 * 8 * 50 / 0.5 = 1e6 bit/s in every bin (last arrival 1.99 s: last bin kept)
    p = write_rows(tmp_path, [(f"{k / 100:.2f}", 1250) for k in range(200)])
    t = one(p, interval_s=0.5)
    assert t["t_s"].tolist() == [0.0, 0.5, 1.0, 1.5]
    np.testing.assert_allclose(t["bandwidth_bps"], [1e6] * 4, rtol=1e-12)
    assert np.isnan(t["loss"]).all() and np.isnan(t["jitter_ms"]).all() and np.isnan(t["rtt_ms"]).all()


def test_partial_last_bin_rule(tmp_path):
    # arrivals 0.00..1.20 s: the third 0.5 s bin is covered 0.20 s < 0.25 s -> dropped
    t = one(write_rows(tmp_path, [(f"{k / 100:.2f}", 1250) for k in range(121)]), interval_s=0.5)
    assert len(t) == 2 and t.provenance["dropped_last_bin"] is True
    # arrivals 0.00..1.30 s: covered 0.30 s >= 0.25 s -> kept, rate over the full interval:
    # 31 packets (1.00..1.30) * 1250 * 8 / 0.5 = 620 000 bit/s
    t = one(write_rows(tmp_path, [(f"{k / 100:.2f}", 1250) for k in range(131)]), interval_s=0.5)
    assert len(t) == 3 and t.provenance["dropped_last_bin"] is False
    assert t["bandwidth_bps"][2] == pytest.approx(620_000.0, rel=1e-12)


def test_loss_from_a_known_gap(tmp_path):
    # 1000-byte packets every 10 ms, seq 0..199, seq 60..69 never arrive (their slots 0.60..0.69 s)
    rows = [(f"{k / 100:.2f}", 1000, k) for k in range(200) if not 60 <= k < 70]
    t = one(write_rows(tmp_path, rows), interval_s=0.5, seq_column="2")
    # bin [0.5, 1.0): 40 received, 10 missing placed between the arrivals of 59 (0.59 s) and 70 (0.70 s)
    # -> loss 10 / 50 = 0.2, rate 40 * 1000 * 8 / 0.5 = 640 000 bit/s
    np.testing.assert_allclose(t["loss"], [0.0, 0.2, 0.0, 0.0], atol=1e-15)
    np.testing.assert_allclose(t["bandwidth_bps"], [800_000.0, 640_000.0, 800_000.0, 800_000.0], rtol=1e-12)


def test_long_gap_spreads_over_the_bins_it_spans(tmp_path):
    # seq 0..99 at 0.00..0.99 s, an outage, then seq 200..299 at 2.00..2.99 s; the 100 missing numbers
    # are placed evenly between 0.99 s and 2.00 s (1.00, 1.01, ..., 1.99 s): all in the 1 s bin [1, 2)
    rows = [(f"{k / 100:.2f}", 100, k) for k in range(100)] + [(f"{k / 100:.2f}", 100, k) for k in range(200, 300)]
    t = one(write_rows(tmp_path, rows), seq_column="2")
    np.testing.assert_allclose(t["loss"], [0.0, 1.0, 0.0], atol=1e-15)
    assert t["bandwidth_bps"][1] == 0.0  # nothing arrived: a measured outage, not unknown


def test_jitter_matches_reference_estimator(tmp_path):
    rng = np.random.default_rng(7)
    arrival = np.cumsum(rng.uniform(0.001, 0.02, 400))
    send = arrival - rng.uniform(0.030, 0.060, 400)  # transit 30..60 ms
    rows = [(f"{a:.6f}", 1200, f"{s:.6f}") for a, s in zip(arrival, send)]
    t = one(write_rows(tmp_path, rows, delim="\t"), send_time_column="2", interval_s=0.25)
    a = np.array([float(r[0]) for r in rows])
    transit = a - np.array([float(r[2]) for r in rows])
    j = interarrival_jitter(transit)
    # per bin, the estimate after the bin's last packet (index found by a plain loop, independent of the reader)
    last = {}
    for i, x in enumerate(a):
        last[int((x - a[0]) // 0.25)] = i
    expect = [j[last[b]] * 1000 if b in last else np.nan for b in range(len(t))]
    np.testing.assert_allclose(t["jitter_ms"], expect, rtol=1e-9, atol=1e-12)


def test_fixture_with_header_wrap_loss_and_jitter():
    t = one(RTP, **RTP_OPTIONS)
    # arrivals 0..1000 ms, 0.5 s bins: the last bin [1.0, 1.5) is covered 0 s -> dropped
    assert t["t_s"].tolist() == [0.0, 0.5]
    # bin 0: 4 x 1000 bytes -> 64 000 bit/s; bin 1: 2 x 1000 + 3 x 500 bytes -> 56 000 bit/s
    np.testing.assert_allclose(t["bandwidth_bps"], [64_000.0, 56_000.0], rtol=1e-12)
    # seq 65533, 65534, 65535, 0, (1 missing), 2 ... 7: with 16-bit wrap, one number missing, placed
    # between 300 ms and 500 ms -> bin 0 expected 5, lost 1 -> 0.2; bin 1 none lost
    np.testing.assert_allclose(t["loss"], [0.2, 0.0], atol=1e-15)
    # transit 20, 20, 20, 20, 25, 20, 20, 20, 20 ms (RFC 3550 A.8, by hand): J stays 0 to packet 4,
    # then 5/16 = 0.3125, 0.3125 + (5 - 0.3125)/16 = 0.60546875, then * 15/16 for each D = 0:
    # bin 1 ends at packet 9 (900 ms): 0.60546875 * (15/16)**3 = 0.4988908767700195 ms
    np.testing.assert_allclose(t["jitter_ms"], [0.0, 0.4988908767700195], rtol=1e-9)
    assert t.provenance["columns"] == {"time_column": "arrival_ms", "bytes_column": "size",
                                       "seq_column": "rtp_seq", "send_time_column": "send_ms"}


def test_fixture_without_seq_bits_does_not_wrap():
    # the numbers are then taken as they are: 7 -> 65533 looks like 65525 missing packets
    t = one(RTP, **{**RTP_OPTIONS, "seq_bits": None})
    assert t["loss"][0] > 0.9


def test_fixture_personal_column_not_stored():
    t = one(RTP, **RTP_OPTIONS)
    assert "192.0.2" not in json.dumps(t.meta())
    text = describe_file(RTP, "packets", **RTP_OPTIONS)
    assert "personal columns not read: src_ip" in text
    assert "12 lines, 10 packets, comma-delimited, with header" in text
    assert "(last partial bin dropped)" in text
    assert "192.0.2" not in text


@pytest.mark.parametrize("delim", [",", ";", "\t", " ", "  \t "])
def test_delimiters_give_the_same_trace(tmp_path, delim):
    rows = [(f"{k / 10:.1f}", 125 * (k % 3), k) for k in range(30)]
    base = one(write_rows(tmp_path, rows, name="base.pkts"), seq_column="2")
    t = one(write_rows(tmp_path, rows, delim=delim, header=["t", "bytes", "seq"]), seq_column="seq")
    assert t.id == base.id


@pytest.mark.parametrize("unit, factor", [("ms", 1e3), ("us", 1e6), ("ns", 1e9)])
def test_time_units(tmp_path, unit, factor):
    # the same arrivals in another unit give the same bins (units: SI prefixes)
    rows = [(int(round(k / 100 * factor)), 1250) for k in range(200)]
    t = one(write_rows(tmp_path, rows), time_unit=unit, interval_s="500ms")
    np.testing.assert_allclose(t["bandwidth_bps"], [1e6] * 4, rtol=1e-12)


@pytest.mark.parametrize("text, options, line, field", [
    ("0,100\n1,-5\n", {}, 2, "bytes_column"),                           # negative bytes
    ("0,100\n1,12.5\n", {}, 2, "bytes_column"),                         # fractional bytes
    ("0,100\n1,abc\n", {}, 2, "bytes_column"),                          # not a number
    ("0,100\n,100\n", {}, 2, "time_column"),                            # missing (NaN) time
    ("0,100\nnan,100\n", {}, 2, "time_column"),
    ("0,100\ninf,100\n", {}, 2, "time_column"),
    ("0,100\n2,100\n1,100\n", {}, 3, "time_column"),                    # backwards
    ("0,100\n1;100\n", {}, 2, None),                                    # mixed delimiters
    ("0,100;5\n", {}, 1, None),
    ("0 100\n1,100\n", {}, 2, None),
    ("0,100\n1,100,7\n", {}, 2, None),                                  # field count
    ("t,b,s\n0,100,1\n1,100,2.5\n", {"seq_column": "s"}, 3, "seq_column"),
    ("0,100,70000\n1,100,1\n", {"seq_column": "2", "seq_bits": 16}, 1, "seq_column"),
    ("0,100,1\n1,100,9999999999\n", {"seq_column": "2"}, 2, "seq_column"),  # absurd jump
    ("0,100\n1e300,100\n", {}, 2, "time_column"),                       # absurd span
    ("0,100,5\n1,100,inf\n", {"send_time_column": "2"}, 2, "send_time_column"),
])
def test_bad_lines_name_line_and_field(tmp_path, text, options, line, field):
    p = tmp_path / "bad.pkts"
    p.write_text(text)
    with pytest.raises(InputError) as e:
        read_file(p, "packets", **options)
    assert (e.value.line, e.value.field) == (line, field)
    assert e.value.path == str(p)


@pytest.mark.parametrize("text, options, field", [
    ("time,bytes\n0,1\n1,1\n", {"time_column": "when"}, "time_column"),   # no such name
    ("0,1\n1,1\n", {"bytes_column": "size"}, "bytes_column"),             # name without a header
    ("0,1\n1,1\n", {"seq_column": "5"}, "seq_column"),                    # no such column number
    ("0,1\n1,1\n", {"time_unit": "min"}, "time_unit"),
    ("0,1\n1,1\n", {"interval_s": "0"}, "interval_s"),
    ("0,1,1\n1,1,2\n", {"seq_column": "2", "seq_bits": 8}, "seq_bits"),
    ("0,1\n1,1\n", {"seq_bits": 16}, "seq_bits"),
])
def test_bad_options(tmp_path, text, options, field):
    p = tmp_path / "bad.pkts"
    p.write_text(text)
    with pytest.raises(InputError) as e:
        read_file(p, "packets", **options)
    assert e.value.field == field


def test_empty_short_and_non_utf8(tmp_path):
    p = tmp_path / "e.pkts"
    for text in ("", "# only a comment\n", "time,bytes\n"):
        p.write_text(text)
        with pytest.raises(InputError, match="holds no packet lines"):
            read_file(p, "packets")
    p.write_text("0,100\n0.2,100\n")  # 0.2 s of arrivals: less than half of one 1 s bin
    with pytest.raises(InputError, match="less than half"):
        read_file(p, "packets")
    p.write_text("0,100\n0.5,100\n1.2,100\n")  # 1.2 s: the second bin is covered less than half
    with pytest.raises(InputError, match="covers 1.2 s, a single 1 s interval") as e:
        read_file(p, "packets")
    assert e.value.line == 3 and "--interval" in str(e.value) and "interval_s" not in str(e.value)
    p.write_bytes(b"0,100\n1,100\n2,\xff\n")
    with pytest.raises(InputError) as e:
        read_file(p, "packets")
    assert e.value.line == 3


def test_equal_arrival_times_allowed(tmp_path):
    t = one(write_rows(tmp_path, [(0, 100), (0, 100), (1, 100), (1.5, 100)]))
    assert t["bandwidth_bps"].tolist() == [1600.0, 1600.0]  # 2 x 100 bytes * 8 / 1 s in each bin


def test_reader_protocol():
    assert set(packets.OPTIONS) == {"time_column", "bytes_column", "time_unit", "seq_column", "seq_bits",
                                    "send_time_column", "interval_s"}
    assert set(packets.PATTERNS) == {"*.pkts", "*.pkts.csv", "*.packets.csv", "*.packets.txt"}


FUZZ = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_bytes_only_tracegen_errors(tmp_path, blob):
    p = tmp_path / "fuzz.pkts"
    p.write_bytes(blob)
    try:
        read_file(p, "packets", seq_column="2", send_time_column="3")
    except TracegenError:
        pass


_cell = st.one_of(st.integers(-5, 10**6).map(str), st.floats(allow_nan=True, allow_infinity=True).map(repr),
                  st.sampled_from(["", "-", "x", "1e308", "-1e308", "65535", "4294967296"]))


@FUZZ
@given(st.lists(st.tuples(_cell, _cell, _cell, _cell), min_size=1, max_size=10), st.sampled_from([",", "\t", " "]),
       st.sampled_from([None, 16]), st.sampled_from(["s", "ms", "ns"]))
def test_fuzz_rows_only_tracegen_errors(tmp_path, rows, delim, bits, unit):
    p = tmp_path / "fuzz.pkts"
    p.write_text("".join(delim.join(r) + "\n" for r in rows))
    try:
        t = one(p, seq_column="2", send_time_column="3", seq_bits=bits, time_unit=unit, interval_s=0.1)
    except TracegenError:
        return
    assert (t["bandwidth_bps"] >= 0).all()
