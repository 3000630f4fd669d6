import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracegen.errors import InputError, TracegenError
from tracegen.ingest import describe_file, read_file, rtcp
from tracegen.ingest.common import Labels

DATA = Path(__file__).parent / "data"

# RFC 3550 section 6.4.1, Figure 2 (checked against the RFC's figure text): the SR left at
# ntp_sec 0xb44db705, ntp_frac 0x20000000 (10 Nov 1995 11:33:25.125 UTC); the RR arrived at
# 10 Nov 1995 11:33:36.5 UTC, A = 0xb710:8000 (46864.500 s); LSR = 0xb705:2000 (46853.125 s);
# DLSR = 0x0005:4000 (5.250 s); A - LSR - DLSR = 0x0006:2000 = 6.125 s.
RFC_ARRIVAL_NTP = (0xB44DB710 << 32) | 0x80000000
RFC_LSR = 0xB7052000
RFC_DLSR = 0x00054000


def write_log(tmp_path, lines, name="log.jsonl"):
    p = tmp_path / name
    p.write_text("\n".join(x if isinstance(x, str) else json.dumps(x) for x in lines) + "\n")
    return p


def one(path, **options):
    traces = read_file(path, "rtcp", **options)
    assert len(traces) == 1
    return traces[0]


def test_rfc3550_rtt_worked_example_from_ntp(tmp_path):
    # a second report without an SR makes a trace of two samples (one sample has no step)
    p = write_log(tmp_path, [{"arrival_ntp": RFC_ARRIVAL_NTP, "lsr": RFC_LSR, "dlsr": RFC_DLSR},
                             {"arrival_ntp": RFC_ARRIVAL_NTP + 2**32}])
    rtt = one(p)["rtt_ms"]
    assert rtt[0] == 6125.0 and np.isnan(rtt[1])


def test_rfc3550_rtt_worked_example_from_unix_seconds(tmp_path):
    # the same arrival as a calendar time from the RFC figure; NTP = Unix + 2208988800 (RFC 868)
    unix = dt.datetime(1995, 11, 10, 11, 33, 36, 500000, tzinfo=dt.timezone.utc).timestamp()
    p = write_log(tmp_path, [{"arrival_s": unix, "lsr": RFC_LSR, "dlsr": RFC_DLSR}, {"arrival_s": unix + 1}])
    rtt = one(p)["rtt_ms"]
    assert rtt[0] == 6125.0 and np.isnan(rtt[1])


def test_no_sender_report_means_rtt_unknown(tmp_path):
    # RFC 3550 section 6.4.1: LSR is 0 when no SR has been received yet
    p = write_log(tmp_path, [{"arrival_ntp": RFC_ARRIVAL_NTP, "lsr": 0, "dlsr": 0},
                         {"arrival_ntp": RFC_ARRIVAL_NTP + 2**32, "lsr": RFC_LSR, "dlsr": RFC_DLSR}])
    rtt = one(p)["rtt_ms"]
    assert np.isnan(rtt[0])
    assert rtt[1] == 7125.0  # one second later than the RFC example, same LSR and DLSR


def test_dlsr_after_arrival_is_an_error(tmp_path):
    # second report arrives 1 s after the RFC example: A - LSR = 0xb711:8000 - 0xb705:2000 = 0x000c:6000
    # (12.375 s); a DLSR one 1/65536 s longer means the report left after it arrived
    p = write_log(tmp_path, [{"arrival_ntp": RFC_ARRIVAL_NTP, "lsr": 0, "dlsr": 0},
                         {"arrival_ntp": RFC_ARRIVAL_NTP + 2**32, "lsr": RFC_LSR, "dlsr": 0x000C6000 + 1}])
    with pytest.raises(InputError) as e:
        read_file(p, "rtcp")
    assert (e.value.line, e.value.field) == (2, "dlsr")
    # exactly A - LSR is a zero RTT: below the 1/65536 s resolution, so unknown rather than an error
    p = write_log(tmp_path, [{"arrival_ntp": RFC_ARRIVAL_NTP, "lsr": RFC_LSR, "dlsr": 0x000B6000},
                             {"arrival_ntp": RFC_ARRIVAL_NTP + 2**32}])
    assert np.isnan(one(p)["rtt_ms"]).all()


def test_fixture_interval_loss_jitter_and_ssrcs():
    traces = read_file(DATA / "rtcp_two_ssrc.jsonl", "rtcp", clock_rate_hz=48000)
    by_part = {t.provenance["part"]: t for t in traces}
    assert sorted(by_part) == ["ssrc-00001234", "ssrc-0000abcd"]
    a, b = by_part["ssrc-0000abcd"], by_part["ssrc-00001234"]
    assert a.source == "rtcp_two_ssrc.jsonl#ssrc-0000abcd"
    assert a["t_s"].tolist() == [0.0, 1.0, 2.0, 3.0]
    assert b["t_s"].tolist() == [0.0, 1.0]
    # Hand-computed (RFC 3550 appendix A.3: lost_interval / expected_interval):
    # report 1: first report -> fraction_lost 0/256 = 0
    # report 2: (5 - 0) / (1100 - 1000) = 0.05
    # report 3: sequence did not advance -> fraction_lost 64/256 = 0.25
    # report 4: (3 - 5) / (1300 - 1100) < 0 (duplicates) -> clipped to 0
    # each report's loss covers the interval since the previous report -> stored on that report's sample
    np.testing.assert_allclose(a["loss"], [0.05, 0.25, 0.0, np.nan], rtol=0, atol=1e-15)
    # ssrc 0x1234: first report 26/256 = 0.1015625, then (10 - 10) / (5200 - 5000) = 0
    assert b["loss"][0] == 0.0 and np.isnan(b["loss"][1])
    # jitter in RTP timestamp units / clock rate: 480 / 48000 Hz = 10 ms (option), 900 / 90000 Hz
    # = 10 ms (per-line clock rate overrides the option)
    assert a["jitter_ms"].tolist() == [10.0, 20.0, 5.0, 0.0]
    assert b["jitter_ms"].tolist() == [10.0, 5.0]
    assert np.isnan(a["bandwidth_bps"]).all() and np.isnan(a["rtt_ms"]).all()


def test_fixture_personal_keys(tmp_path):
    traces = read_file(DATA / "rtcp_two_ssrc.jsonl", "rtcp", clock_rate_hz=48000)
    for t in traces:
        blob = json.dumps(t.meta())
        assert "alice" not in blob and "192.0.2.7" not in blob
        assert t.provenance["dropped_personal_keys"] == ["cname"]
        assert t.provenance["ignored_keys"] == ["codec"]
    kept = read_file(DATA / "rtcp_two_ssrc.jsonl", "rtcp", Labels(keep_personal=True), clock_rate_hz=48000)
    by_part = {t.provenance["part"]: t for t in kept}
    assert by_part["ssrc-0000abcd"].provenance["personal"] == {"cname": ["alice@192.0.2.7"]}
    assert "personal" not in by_part["ssrc-00001234"].provenance


def test_jitter_needs_a_clock_rate():
    with pytest.raises(InputError) as e:
        read_file(DATA / "rtcp_two_ssrc.jsonl", "rtcp")
    assert (e.value.line, e.value.field) == (2, "clock_rate_hz")


def test_clock_rate_option_from_cli_text(tmp_path):
    p = write_log(tmp_path, [{"arrival_s": 10.0, "jitter": 480}, {"arrival_s": 11.0, "jitter": 960}])
    assert one(p, clock_rate_hz="48000")["jitter_ms"].tolist() == [10.0, 20.0]  # 480 / 48000 Hz = 10 ms
    with pytest.raises(InputError) as e:
        read_file(p, "rtcp", clock_rate_hz="fast")
    assert e.value.field == "clock_rate_hz"


def test_bandwidth_copied_and_nulls_are_absent(tmp_path):
    p = write_log(tmp_path, [{"arrival_s": 9.0, "bandwidth_bps": 1e6},
                         {"arrival_s": 10.0, "bandwidth_bps": 1.5e6, "jitter": None},
                         {"arrival_s": 11.0, "bandwidth_bps": None}])
    t = one(p)
    # a report's rate covers the interval since the previous report: 1.5e6 belongs to [9 s, 10 s)
    assert t["bandwidth_bps"][0] == 1.5e6 and np.isnan(t["bandwidth_bps"][1:]).all()
    assert np.isnan(t["loss"]).all() and np.isnan(t["jitter_ms"]).all()


def test_describe_names_counts_and_personal_keys():
    text = describe_file(DATA / "rtcp_two_ssrc.jsonl", "rtcp", clock_rate_hz=48000)
    assert "8 lines, 6 reports, 2 trace(s)" in text
    assert "ssrc 0x0000abcd: 4 reports over 3.000 s" in text
    assert "personal keys dropped: cname" in text
    assert "alice" not in text


@pytest.mark.parametrize("lines, line, field", [
    (['{"arrival_s": 1.0}', "[1, 2, 3]"], 2, None),                          # not an object
    (['{"arrival_s": 1.0}', '{"arrival_s": 2.0,'], 2, None),                 # invalid JSON
    (['{"arrival_s": NaN}'], 1, None),                                       # NaN is not JSON
    (['{"arrival_s": 1.0}', '{"arrival_s": 2.0, "fraction_lost": 256}'], 2, "fraction_lost"),
    (['{"arrival_s": 1.0, "jitter": -1, "clock_rate_hz": 8000}'], 1, "jitter"),
    (['{"arrival_s": 1.0, "cumulative_lost": 8388608}'], 1, "cumulative_lost"),
    (['{"arrival_s": 1.0, "ext_highest_seq": 4294967296}'], 1, "ext_highest_seq"),
    (['{"arrival_s": 1.0, "lsr": 5.5, "dlsr": 0}'], 1, "lsr"),                # float where integer
    (['{"arrival_s": 1.0, "ssrc": true}'], 1, "ssrc"),                       # bool where integer
    (['{"arrival_s": "soon"}'], 1, "arrival_s"),
    (['{"arrival_s": 1.0, "clock_rate_hz": 0}'], 1, "clock_rate_hz"),
    (['{"arrival_s": 1.0, "bandwidth_bps": -5}'], 1, "bandwidth_bps"),
    (['# header', '{"arrival_s": 2.0}', '{"arrival_s": 1.0}'], 3, "arrival_s"),  # time backwards
    (['{"arrival_s": 2.0}', '{"arrival_s": 2.0}'], 2, "arrival_s"),              # time repeats
    (['{"arrival_s": 1.0}', '{"fraction_lost": 3}'], 2, "arrival_ntp"),          # missing arrival
    (['{"arrival_s": 1.0, "arrival_ntp": 5}'], 1, "arrival_s"),
    (['{"arrival_s": 1.0, "lsr": 5}'], 1, "dlsr"),
    (['{"arrival_s": 1.0, "ssrc": 1}', '{"arrival_s": 2.0}'], 2, "ssrc"),
    (['{"arrival_s": 1.0, "ext_highest_seq": 9}', '{"arrival_s": 2.0, "ext_highest_seq": 8}'], 2,
     "ext_highest_seq"),
])
def test_bad_lines_name_line_and_field(tmp_path, lines, line, field):
    p = write_log(tmp_path, lines)
    with pytest.raises(InputError) as e:
        read_file(p, "rtcp")
    assert e.value.line == line
    assert e.value.field == field
    assert e.value.path == str(p)


def test_single_report_and_absurd_span_are_refused(tmp_path):
    p = write_log(tmp_path, ['# one report', '{"arrival_s": 1.0}'])
    with pytest.raises(InputError, match="holds a single sample") as e:
        read_file(p, "rtcp")
    assert (e.value.path, e.value.line) == (str(p), 2)
    # one SSRC with a single report among others: named by its part
    p = write_log(tmp_path, [{"arrival_s": 1.0, "ssrc": 1}, {"arrival_s": 2.0, "ssrc": 1},
                             {"arrival_s": 2.5, "ssrc": 2}])
    with pytest.raises(InputError, match=r"holds a single sample \(ssrc-00000002\)") as e:
        read_file(p, "rtcp")
    assert e.value.line == 3
    # reports a second apart, then one 127 years later: a grid of 4e9 one-second steps
    p = write_log(tmp_path, [{"arrival_s": 0}, {"arrival_s": 1}, {"arrival_s": 2}, {"arrival_s": 4e9}])
    with pytest.raises(InputError, match="jumps by 4e\\+09 s after line 3") as e:
        read_file(p, "rtcp")
    assert e.value.line == 4


def test_empty_and_comment_only_files(tmp_path):
    for text in ("", "\n\n", "# nothing here\n"):
        p = tmp_path / "empty.jsonl"
        p.write_text(text)
        with pytest.raises(InputError, match="holds no RTCP reports"):
            read_file(p, "rtcp")


def test_non_utf8_names_the_line(tmp_path):
    p = tmp_path / "bad.jsonl"
    p.write_bytes(b'{"arrival_s": 1.0}\n{"cname": "\xff"}\n')
    with pytest.raises(InputError) as e:
        read_file(p, "rtcp")
    assert e.value.line == 2


def test_reader_protocol():
    assert rtcp.OPTIONS == {"clock_rate_hz": None}
    assert set(rtcp.PATTERNS) == {"*.jsonl", "*.ndjson", "*.rtcp.json"}


FUZZ = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_bytes_only_tracegen_errors(tmp_path, blob):
    p = tmp_path / "fuzz.jsonl"
    p.write_bytes(blob)
    try:
        read_file(p, "rtcp", clock_rate_hz=8000)
    except TracegenError:
        pass


_values = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(2**70), max_value=2**70),
    st.integers(min_value=0, max_value=2**32), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=5), st.lists(st.integers(), max_size=2),
    st.dictionaries(st.text(max_size=2), st.none(), max_size=1),
)


@FUZZ
@given(st.lists(st.dictionaries(st.sampled_from(rtcp.KEYS + ("cname", "ip", "other")), _values, max_size=8),
                min_size=1, max_size=6))
def test_fuzz_records_only_tracegen_errors(tmp_path, records):
    p = tmp_path / "fuzz.jsonl"
    p.write_text("\n".join(json.dumps(r) for r in records))
    try:
        traces = read_file(p, "rtcp")
    except TracegenError:
        return
    assert sum(len(t) for t in traces) == len(records)  # every report became one sample


# reports whose every value is in range (the bounds are the field widths of RFC 3550 section 6.4.1)
_REPORT = st.fixed_dictionaries(
    {"ssrc": st.sampled_from([1, 2])},
    optional={k: st.integers(lo, hi) for k, (lo, hi, _) in rtcp._INT_KEYS.items()
              if k not in ("arrival_ntp", "ssrc")})


@FUZZ
@given(st.lists(st.floats(0, 2**31), min_size=1, max_size=8, unique=True), st.data())
def test_fuzz_valid_ranges_give_traces_or_tracegen_errors(tmp_path, times, data):
    records = [dict(data.draw(_REPORT), arrival_s=t) for t in sorted(times)]
    p = tmp_path / "fuzz.jsonl"
    p.write_text("\n".join(json.dumps(r) for r in records))
    try:
        traces = read_file(p, "rtcp", clock_rate_hz=90000)
    except TracegenError:
        return
    assert sum(len(t) for t in traces) == len(records)
    for t in traces:
        loss = t["loss"][~np.isnan(t["loss"])]
        assert ((loss >= 0) & (loss <= 1)).all()
