import json
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracegen.errors import InputError, TracegenError
from tracegen.ingest import describe_file, ping, read_file
from tracegen.ingest.common import Labels
from tracegen.jitter import interarrival_jitter

DATA = Path(__file__).parent / "data"
BASIC = DATA / "ping_basic.txt"  # hand-written iputils `ping -D -O -i 0.2 -c 6` transcript, RFC 5737 addresses


def one(path, labels=None, **options):
    traces = read_file(path, "ping", labels, **options)
    assert len(traces) == 1
    return traces[0]


def write_text(tmp_path, text, name="t.ping"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_basic_transcript_probes_loss_and_rtt():
    t = one(BASIC)
    # probes 1..6 (statistics: 6 transmitted); 3 has "no answer yet", 5 a "From ... Unreachable"
    assert t["loss"].tolist() == [0.0, 0.0, 1.0, 0.0, 1.0, 0.0]
    # the (DUP!) reply of probe 2 (12.5 ms) is ignored: the first reply's 12.0 ms stays
    np.testing.assert_array_equal(t["rtt_ms"], [10.0, 12.0, np.nan, 11.0, np.nan, 13.0])
    assert t.provenance["duplicates_ignored"] == 1
    assert np.isnan(t["bandwidth_bps"]).all()


def test_interval_estimated_from_timestamps():
    t = one(BASIC)
    # -D stamps of consecutive replies (seq 1, 2, 4, 6): .010, .212, .611, 1.013 s
    # -> steps 0.202/1, 0.399/2 = 0.1995, 0.402/2 = 0.201 -> median 0.201 s
    assert t.provenance["interval_from"] == "timestamps"
    assert t.provenance["interval_s"] == pytest.approx(0.201, abs=1e-9)
    np.testing.assert_allclose(t["t_s"], np.arange(6) * 0.201, atol=1e-9)


def test_interval_option_overrides():
    t = one(BASIC, interval_s="200ms")
    assert t.provenance["interval_from"] == "option"
    np.testing.assert_allclose(t["t_s"], [0.0, 0.2, 0.4, 0.6, 0.8, 1.0], atol=1e-12)
    with pytest.raises(InputError) as e:
        read_file(BASIC, "ping", interval_s="-1")
    assert e.value.field == "interval_s"


def test_loss_share_matches_the_statistics_line():
    text = BASIC.read_text()
    percent = float(re.search(r"([\d.]+)% packet loss", text).group(1))  # what ping itself printed
    # ping prints the loss with %g (6 significant digits), so compare to that precision
    assert one(BASIC)["loss"].mean() * 100 == pytest.approx(percent, abs=1e-4)
    assert one(BASIC).provenance["summary"] == {"transmitted": 6, "received": 4, "loss_percent": percent}


def test_jitter_is_rfc3550_on_rtt_of_answered_probes():
    t = one(BASIC)
    # RTT 10, 12, -, 11, -, 13 -> |D| = 2, 1, 2 over answered probes (RFC 3550 A.8, by hand):
    # J = 0, 2/16 = 0.125, 0.125 + (1 - 0.125)/16 = 0.1796875, 0.1796875 + (2 - 0.1796875)/16 = 0.29345703125
    np.testing.assert_allclose(t["jitter_ms"], [0.0, 0.125, np.nan, 0.1796875, np.nan, 0.29345703125],
                               rtol=0, atol=1e-15)
    np.testing.assert_array_equal(t["jitter_ms"], interarrival_jitter(t["rtt_ms"]))


def test_sequence_wraps_at_65536():
    t = one(DATA / "ping_wrap.txt")
    # 65533, 65534, (65535 missing), 0, 1: the 16-bit icmp_seq wraps; five consecutive probe slots
    assert t["loss"].tolist() == [0.0, 0.0, 1.0, 0.0, 0.0]
    np.testing.assert_array_equal(t["rtt_ms"], [0.045, 0.051, np.nan, 0.048, 0.050])
    # no -D timestamps and no option: ping's default interval of 1 s (iputils man page)
    assert t["t_s"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]
    assert t.provenance["interval_from"] == "default"


def test_destination_is_not_stored_by_default():
    t = one(BASIC)
    blob = json.dumps(t.meta())
    assert "192.0.2" not in blob and "example.net" not in blob
    # 1700000000 is 2023-11-14T22:13:20Z; without keep_personal only the day is kept
    assert t.provenance["start"] == "2023-11-14"
    kept = one(BASIC, Labels(keep_personal=True))
    assert kept.provenance["destination"] == "PING example.net (192.0.2.10) 56(84) bytes of data."
    assert kept.provenance["start"].startswith("2023-11-14T22:13:20.01")


def test_lenient_known_message_lines(tmp_path):
    p = write_text(tmp_path, "PING 192.0.2.1 (192.0.2.1) 56(84) bytes of data.\n"
                        "64 bytes from 192.0.2.1: icmp_seq=1 ttl=57 time=123 ms\n"
                        "From 192.0.2.254 icmp_seq=2 Time to live exceeded\n"
                        "ping: sendmsg: Network is unreachable\n"
                        "Request timeout for icmp_seq 3\n"
                        "64 bytes from 192.0.2.1: icmp_seq=4 ttl=57 (truncated)\n"
                        "64 bytes from 192.0.2.1: icmp_seq=5 ttl=57 time=9.87 ms (BAD CHECKSUM)\n")
    t = one(p)
    # 1 answered; 2 and 3 lost; 4 answered without a time; 5 corrupted, which ping does not count
    assert t["loss"].tolist() == [0.0, 1.0, 1.0, 0.0, 1.0]
    np.testing.assert_array_equal(t["rtt_ms"], [123.0, np.nan, np.nan, np.nan, np.nan])


def test_late_reply_after_no_answer_counts_as_answered(tmp_path):
    # with -O, "no answer yet" is printed when the next probe goes out; a reply may still come
    p = write_text(tmp_path, "64 bytes from 192.0.2.1: icmp_seq=1 ttl=57 time=900 ms\n"
                        "no answer yet for icmp_seq=2\n"
                        "64 bytes from 192.0.2.1: icmp_seq=2 ttl=57 time=1500 ms\n")
    assert one(p)["loss"].tolist() == [0.0, 0.0]


def test_statistics_start_the_slots_at_probe_one(tmp_path):
    # ping numbers its probes from 1 (iputils sends icmp_seq = transmitted + 1): probe 1 got no reply
    # and, without -O, left no line; the statistics say 3 were sent
    p = write_text(tmp_path, "64 bytes from 192.0.2.1: icmp_seq=2 ttl=57 time=5.00 ms\n"
                        "64 bytes from 192.0.2.1: icmp_seq=3 ttl=57 time=6.00 ms\n\n"
                        "--- 192.0.2.1 ping statistics ---\n"
                        "3 packets transmitted, 2 received, 33.3333% packet loss, time 2003ms\n")
    t = one(p)
    assert t["loss"].tolist() == [1.0, 0.0, 0.0]
    assert t["t_s"].tolist() == [0.0, 1.0, 2.0]


def test_statistics_only_run_is_all_lost(tmp_path):
    p = write_text(tmp_path, "PING 192.0.2.1 (192.0.2.1) 56(84) bytes of data.\n\n"
                        "--- 192.0.2.1 ping statistics ---\n"
                        "3 packets transmitted, 0 received, 100% packet loss, time 2041ms\n")
    t = one(p)
    assert t["loss"].tolist() == [1.0, 1.0, 1.0]
    assert np.isnan(t["rtt_ms"]).all()


def test_two_runs_in_one_file(tmp_path):
    run = BASIC.read_text()
    p = write_text(tmp_path, run + "\n" + run)
    traces = read_file(p, "ping")
    assert [t.provenance["part"] for t in traces] == ["run-1", "run-2"]
    assert traces[0].id == traces[1].id  # same samples, same content id
    assert traces[1].source == "t.ping#run-2"


def test_describe():
    text = describe_file(BASIC, "ping")
    assert "12 lines, 1 run(s)" in text
    assert "6 probes (icmp_seq from 1), 4 answered, 2 lost, 1 duplicates ignored" in text
    assert "destination host and address: dropped" in text
    assert "192.0.2" not in text and "example.net" not in text


@pytest.mark.parametrize("text, line", [
    ("", None),                                                               # empty file
    ("\n\n", None),
    ("PING 192.0.2.1 (192.0.2.1) 56(84) bytes of data.\n", None),             # header, no probes
    ("64 bytes from 192.0.2.1: icmp_seq=1 ttl=57 time=1.0 ms\nhello world\n", 2),   # garbage
    ("64 bytes from 192.0.2.1: icmp_seq=70000 ttl=57 time=1.0 ms\n", 1),      # not 16-bit
    ("64 bytes from 192.0.2.1: icmp_seq=1 ttl=57 time=1.0 ms\n--- x ping statistics ---\n"
     "64 bytes from 192.0.2.1: icmp_seq=2 ttl=57 time=1.0 ms\n", 3),          # reply after statistics
    ("64 bytes from 192.0.2.1: icmp_seq=5 ttl=57 time=1.0 ms\n"
     "2 packets transmitted, 1 received, 50% packet loss, time 1001ms\n", 1),  # seq beyond transmitted
    ("0 packets transmitted, 0 received\n", 1),
])
def test_bad_transcripts(tmp_path, text, line):
    p = write_text(tmp_path, text)
    with pytest.raises(InputError) as e:
        read_file(p, "ping")
    assert e.value.line == line
    assert e.value.path == str(p)


def test_single_probe_is_refused(tmp_path):
    # one probe is one sample: no step, so no trace (the catalog listing could not show one)
    p = write_text(tmp_path, "PING h (192.0.2.1) 56(84) bytes of data.\n"
                             "64 bytes from 192.0.2.1: icmp_seq=1 ttl=64 time=11.2 ms\n")
    with pytest.raises(InputError, match="holds a single sample") as e:
        read_file(p, "ping")
    assert (e.value.path, e.value.line) == (str(p), 2)
    # the second run of a file is named
    p = write_text(tmp_path, "64 bytes from 192.0.2.1: icmp_seq=1 ttl=64 time=1.0 ms\n"
                             "64 bytes from 192.0.2.1: icmp_seq=2 ttl=64 time=1.0 ms\n"
                             "PING h (192.0.2.1) 56(84) bytes of data.\n"
                             "1 packets transmitted, 0 received, 100% packet loss\n")
    with pytest.raises(InputError, match=r"holds a single sample \(run-2\)") as e:
        read_file(p, "ping")
    assert e.value.line == 4


def test_non_utf8_names_the_line(tmp_path):
    p = tmp_path / "bad.ping"
    p.write_bytes(b"PING x (192.0.2.1) 56(84) bytes of data.\n64 bytes from \xe9: icmp_seq=1 time=1 ms\n")
    with pytest.raises(InputError) as e:
        read_file(p, "ping")
    assert e.value.line == 2


def test_reader_protocol():
    assert ping.OPTIONS == {"interval_s": None}
    assert set(ping.PATTERNS) == {"*.ping", "*.ping.txt"}


FUZZ = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_bytes_only_tracegen_errors(tmp_path, blob):
    p = tmp_path / "fuzz.ping"
    p.write_bytes(blob)
    try:
        read_file(p, "ping")
    except TracegenError:
        pass


_seq = st.integers(min_value=0, max_value=70000)
_line = st.one_of(
    st.builds("64 bytes from 192.0.2.1: icmp_seq={} ttl=57 time={} ms".format, _seq,
              st.sampled_from(["0.000", "1.5", "12", "99999999999999999999", "1e5"])),
    st.builds("[{}] 64 bytes from 192.0.2.1: icmp_seq={} ttl=57 time=1.0 ms (DUP!)".format,
              st.floats(0, 1e12), _seq),
    st.builds("[{}] no answer yet for icmp_seq={}".format, st.sampled_from(["1.5", "99999999999999999999.1"]),
              _seq),
    st.builds("From 192.0.2.254 icmp_seq={} Destination Host Unreachable".format, _seq),
    st.builds("{} packets transmitted, {} received, 0% packet loss".format,
              st.integers(0, 10**30), st.integers(0, 10)),
    st.just("--- 192.0.2.1 ping statistics ---"),
    st.just("PING 192.0.2.1 (192.0.2.1) 56(84) bytes of data."),
    st.text(max_size=20),
)


@FUZZ
@given(st.lists(_line, max_size=12))
def test_fuzz_transcripts_only_tracegen_errors(tmp_path, lines):
    p = tmp_path / "fuzz.ping"
    p.write_text("\n".join(lines))
    try:
        traces = read_file(p, "ping")
    except TracegenError:
        return
    for t in traces:
        assert set(np.unique(t["loss"])) <= {0.0, 1.0}
        assert np.isnan(t["rtt_ms"][t["loss"] == 1]).all()  # a lost probe never has an RTT
