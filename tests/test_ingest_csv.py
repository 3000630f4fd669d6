"""The delimited-text reader: column mapping, units, splitting, personal data, and bad input."""

from __future__ import annotations

import gzip

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import snapshot
from tracegen import InputError, TracegenError
from tracegen.catalog import Catalog
from tracegen.ingest import FORMATS, Labels, common, describe_file, read_file
from tracegen.privacy import pseudonym

KBPS_LOG = (
    "time_ms,throughput_kbps,rtt_ms,loss_pct,serving_cell,robot_id,lat,lon\n"
    "0,1000,20.5,0,C1,R-17,51.123456,7.654321\n"
    "1000,2000,,10,C1,R-17,51.123499,7.654399\n"
    "2000,1500,30,,C2,R-17,51.124000,7.655000\n"
)
OPTS = dict(time_column="time_ms", time_unit="ms", bandwidth_column="throughput_kbps", bandwidth_unit="kbps",
            rtt_column="rtt_ms", loss_column="loss_pct", loss_unit="percent", cell_column="serving_cell",
            group_column="robot_id", lat_column="lat", lon_column="lon")


def test_maps_columns_and_units(write):
    [tr] = read_file(write("log.csv", KBPS_LOG), "csv", Labels(tags={"access": "lte"}), **OPTS)
    np.testing.assert_allclose(tr["t_s"], [0.0, 1.0, 2.0])
    np.testing.assert_allclose(tr["bandwidth_bps"], [1e6, 2e6, 1.5e6])  # kbit/s x 1000 (decimal prefix)
    np.testing.assert_allclose(tr["rtt_ms"], [20.5, np.nan, 30.0])  # an empty cell is unknown, not 0
    np.testing.assert_allclose(tr["loss"], [0.0, 0.1, np.nan])  # percent -> fraction
    assert list(tr["cell"]) == ["C1", "C1", "C2"]
    assert tr.tags == {"access": "lte"}
    assert tr.provenance["reader"] == "csv" and len(tr.provenance["file_sha256"]) == 64
    assert tr.provenance["options"]["bandwidth_unit"] == "kbps"


def test_personal_fields_are_coarsened_or_pseudonymised(write):
    path = write("log.csv", KBPS_LOG)
    [tr] = read_file(path, "csv", Labels(), **OPTS)
    assert tr.group == pseudonym("R-17") and "R-17" not in repr(tr.meta())
    np.testing.assert_allclose(tr["lat_deg"], [51.12, 51.12, 51.12])
    np.testing.assert_allclose(tr["lon_deg"], [7.65, 7.65, 7.66])
    [kept] = read_file(path, "csv", Labels(keep_personal=True), **OPTS)
    assert kept.group == "R-17"
    assert kept["lat_deg"][0] == pytest.approx(51.123456)
    # columns that are not mapped are never read, personal or not
    [plain] = read_file(path, "csv", Labels(), time_column="time_ms", time_unit="ms",
                        bandwidth_column="throughput_kbps", bandwidth_unit="kbps")
    assert "lat_deg" not in plain.columns and plain.group == "log"
    assert "robot_id" in plain.provenance["columns_not_read"]


def test_ids_in_split_columns_camel_case_names_and_address_values_are_pseudonymised(write):
    text = ("time_ms,kbps,robotId,clientIp,site\n"
            "1000,500,QR-122,192.0.2.7,north\n2000,600,QR-122,192.0.2.7,north\n"
            "3000,600,QR-999,192.0.2.8,north\n4000,600,QR-999,192.0.2.8,north\n")
    path = write("p.csv", text)
    opts = dict(time_column="time_ms", time_unit="ms", bandwidth_column="kbps", bandwidth_unit="kbps")
    traces = read_file(path, "csv", Labels(), split_column="robotId", tag_columns=("clientIp", "site"), **opts)
    assert [tr.provenance["part"] for tr in traces] == [f"robotId={pseudonym('QR-122')}",
                                                        f"robotId={pseudonym('QR-999')}"]
    assert traces[0].tags == {"clientIp": pseudonym("192.0.2.7"), "site": "north"}
    assert all("QR-" not in repr(tr.meta()) and "192.0.2" not in repr(tr.meta()) for tr in traces)
    kept = read_file(path, "csv", Labels(keep_personal=True), split_column="robotId", **opts)
    assert kept[0].provenance["part"] == "robotId=QR-122"


def test_a_group_that_changes_inside_one_trace_is_refused(write):
    path = write("g.csv", "time_ms,kbps,robot_id\n1000,500,R-1\n2000,600,R-1\n3000,600,R-2\n")
    with pytest.raises(InputError, match="changes from 'R-1' to 'R-2' within one trace") as info:
        read_file(path, "csv", Labels(), time_column="time_ms", time_unit="ms", bandwidth_column="kbps",
                  bandwidth_unit="kbps", group_column="robot_id")
    assert info.value.line == 4 and "--split-column robot_id" in info.value.hint


def test_a_failed_first_ingest_leaves_no_catalog(write, tmp_path):
    from click.testing import CliRunner

    from tracegen.cli import cli

    bad = write("one.csv", "t_s,bandwidth_bps\n0,1\n")
    root = tmp_path / "new-catalog"
    res = CliRunner().invoke(cli, ["ingest", "--catalog", str(root), "--format", "csv", str(bad)])
    assert res.exit_code != 0 and not root.exists()
    root.mkdir()
    (root / "notes.txt").write_text("mine")
    res = CliRunner().invoke(cli, ["ingest", "--catalog", str(root), "--format", "csv", "--skip-bad", str(bad)])
    assert res.exit_code == 1  # every file was bad: nothing to show for the run
    assert sorted(p.name for p in root.iterdir()) == ["notes.txt"]


def test_bytes_per_interval_hand_computed(write):
    # bytes since the previous row: 125 000 B over 0.5 s = 1 000 000 B/s = 2 Mbit/s; 250 000 B over 1 s = 2 Mbit/s;
    # 50 000 B over 0.25 s = 1.6 Mbit/s. The first row's interval is --interval (0.5 s).
    path = write("b.csv", "t,bytes\n0.5,125000\n1.5,250000\n1.75,50000\n")
    [tr] = read_file(path, "csv", time_column="t", bandwidth_column="bytes", bandwidth_unit="bytes", interval_s=0.5)
    np.testing.assert_allclose(tr["bandwidth_bps"], [2e6, 2e6, 1.6e6])
    np.testing.assert_allclose(tr["t_s"], [0.0, 0.5, 1.5])  # each rate stamped at its interval's start


def test_iso_times_tab_delimiter_and_mbps(write):
    text = ("when\tMbps\n2026-03-01T08:00:00Z\t1.5\n2026-03-01T08:00:00.500Z\t2.5\n"
            "2026-03-01T09:00:01+01:00\t3.5\n")
    [tr] = read_file(write("w.tsv", text), "csv", time_column="when", time_unit="iso8601",
                     bandwidth_column="Mbps", bandwidth_unit="Mbps")
    np.testing.assert_allclose(tr["t_s"], [0.0, 0.5, 1.0])  # +01:00 at 09:00:01 is 08:00:01 UTC
    np.testing.assert_allclose(tr["bandwidth_bps"], [1.5e6, 2.5e6, 3.5e6])
    assert tr.provenance["calendar_start"] == "2026-03-01"  # day only, unless keep_personal


def test_positions_without_header_and_semicolons(write):
    [tr] = read_file(write("p.csv", "0;10\n1;20\n2;30\n"), "csv", time_column="0", bandwidth_column="1",
                     bandwidth_unit="kbps")
    np.testing.assert_allclose(tr["bandwidth_bps"], [1e4, 2e4, 3e4])


def test_comments_blank_lines_bom_and_crlf(write):
    raw = "\ufeff# exported by a logger\r\nt_s,bandwidth_bps\r\n\r\n0,5\r\n1,6\r\n".encode()
    [tr] = read_file(write("c.csv", raw), "csv")
    np.testing.assert_allclose(tr["bandwidth_bps"], [5, 6])


def test_split_column_gives_one_trace_per_run(write):
    text = "t_s,bandwidth_bps,segment,mode\n0,1,0,bus\n1,2,0,bus\n0,3,1,bus\n1,4,1,bus\n2,5,1,bus\n"
    trs = read_file(write("s.csv", text), "csv", split_column="segment", tag_columns=("mode",))
    assert [len(t) for t in trs] == [2, 3]
    assert [t.source for t in trs] == ["s.csv#segment=0", "s.csv#segment=1"]
    assert all(t.tags == {"mode": "bus"} for t in trs)
    assert trs[0].group == trs[1].group == "s"  # one file, one session: splits keep runs of a file together


def test_describe_reads_but_reports(write):
    out = describe_file(write("log.csv", KBPS_LOG), "csv", **OPTS)
    assert "3 data rows" in out and "'throughput_kbps' -> bandwidth (kbps)" in out
    assert "locations rounded" in out


# --- bad input: each names the file and line -------------------------------------------------------
BAD = [
    ("empty", "", "is empty", None),
    ("header only", "t_s,bandwidth_bps\n", "no data rows", None),
    ("non-numeric", "t_s,bandwidth_bps\n0,1\n1,fast\n", "'fast' is not a number", 3),
    ("backwards", "t_s,bandwidth_bps\n0,1\n2,1\n1,1\n", "goes back in time", 4),
    ("repeating", "t_s,bandwidth_bps\n0,1\n1,1\n1,1\n", "repeats", 4),
    ("negative bandwidth", "t_s,bandwidth_bps\n0,1\n1,-5\n", "negative", 3),
    ("mixed delimiters", "t_s,bandwidth_bps\n0,1\n1\t2\n", "has 1 fields", 3),
    ("NUL bytes", "t_s,bandwidth_bps\n0,1\n1,\x002\n", "is not a number", 3),
]


@pytest.mark.parametrize("name, text, needle, line", BAD, ids=[b[0] for b in BAD])
def test_bad_input_names_file_and_line(write, name, text, needle, line):
    path = write("bad.csv", text)
    with pytest.raises(InputError) as info:
        read_file(path, "csv")
    msg = str(info.value)
    assert needle in msg and str(path) in msg
    if line is not None:
        assert info.value.line == line


def test_loss_above_one(write):
    with pytest.raises(InputError, match="outside 0..1") as info:
        read_file(write("l.csv", "t_s,bandwidth_bps,loss\n0,1,0.5\n1,1,1.2\n"), "csv", loss_column="loss")
    assert info.value.line == 3


def test_loss_out_of_range_is_reported_as_given_in_its_unit(write):
    path = write("pct.csv", "t_s,bandwidth_bps,loss_pct\n0,1,10\n1,1,150\n")
    with pytest.raises(InputError) as info:
        read_file(path, "csv", loss_column="loss_pct", loss_unit="percent")
    msg = str(info.value)
    assert (info.value.line, info.value.field) == (3, "loss_pct") and str(path) in msg
    assert "loss 150 is outside 0..100" in msg  # the file's value, not 1.5
    assert "if the file has percent" not in msg  # percent was given already


def test_glitched_time_is_refused_with_its_line(write, tmp_path):
    # one row at 0 ms among epoch milliseconds: the trace would span 56 years of 1 s steps
    rows = "".join(f"{1778865729000 + i * 1000},1000\n" for i in range(1, 121))
    path = write("glitch.csv", "time_ms,kbps\n0,1000\n" + rows)
    opts = dict(time_column="time_ms", time_unit="ms", bandwidth_column="kbps", bandwidth_unit="kbps")
    with pytest.raises(InputError) as info:
        read_file(path, "csv", **opts)
    msg = str(info.value)
    assert (info.value.line, info.value.field) == (3, "time_ms") and str(path) in msg
    assert "jumps by 1.77887e+09 s after line 2" in msg and "more than 16777216 steps of its 1 s step" in msg
    assert "wrong time unit" in msg and "split the file" in msg
    # the catalog is left as it was
    cat = Catalog.open(tmp_path / "cat", create=True)
    cat.ingest([write("ok.csv", "t_s,bandwidth_bps\n0,1\n1,2\n")], "csv")
    before = snapshot(tmp_path / "cat")
    with pytest.raises(InputError, match="glitch.csv:3"):
        cat.ingest([path], "csv", **opts)
    assert snapshot(tmp_path / "cat") == before


def test_absurd_time_span_is_refused(write):
    with pytest.raises(InputError) as info:
        read_file(write("big.csv", "t_s,bandwidth_bps\n0,1\n1,1\n1e300,1\n"), "csv")
    assert info.value.line == 4 and "more than 4.29497e+09 s (136 years)" in str(info.value)


def test_span_is_bounded_in_steps_not_only_by_jumps(write, monkeypatch):
    # no single jump, but more steps than the grid later analysis builds may hold (bound lowered to 100)
    monkeypatch.setattr(common, "MAX_STEPS", 100)
    path = write("long.csv", "t_s,bandwidth_bps\n" + "".join(f"{i},1\n" for i in range(150)))
    with pytest.raises(InputError) as info:
        read_file(path, "csv")
    assert info.value.line == 103  # header on line 1, t = 101 s on line 103
    assert "time reaches 101 s after the first sample, more than 100 steps of its 1 s step" in str(info.value)
    monkeypatch.setattr(common, "MAX_STEPS", 150)
    [tr] = read_file(path, "csv")
    assert len(tr) == 150


def test_single_sample_is_refused(write):
    with pytest.raises(InputError) as info:
        read_file(write("one.csv", "t_s,bandwidth_bps\n0,100\n"), "csv")
    assert (info.value.line, info.value.field) == (2, "t_s") and "holds a single sample" in str(info.value)
    text = "t_s,bandwidth_bps,segment\n0,1,a\n1,2,a\n5,3,b\n"
    with pytest.raises(InputError, match=r"holds a single sample \(segment=b\)") as info:
        read_file(write("s.csv", text), "csv", split_column="segment")
    assert info.value.line == 4


def test_epoch_nanoseconds_keep_their_precision(write):
    path = write("ns.csv", "ts,bw\n1778865729000000000,100\n1778865729000000100,100\n1778865729000000250,100\n")
    [tr] = read_file(path, "csv", time_column="ts", time_unit="ns", bandwidth_column="bw")
    # float64 of the raw numbers (53 bits) would make all three times equal
    np.testing.assert_allclose(tr["t_s"], [0.0, 100e-9, 250e-9], rtol=1e-15, atol=0)
    assert tr.step_s == pytest.approx(125e-9, rel=1e-12)


def test_empty_bandwidth_column_is_refused(write):
    path = write("e.csv", "t,kbps,rtt\n0,,\n1, ,\n")
    with pytest.raises(InputError) as info:
        read_file(path, "csv", time_column="t", bandwidth_column="kbps", rtt_column="rtt")
    msg = str(info.value)
    assert (info.value.line, info.value.field) == (2, "kbps") and str(path) in msg
    assert "bandwidth is empty on every row, and so is rtt" in msg and "--bandwidth-column" in msg
    # RTT without bandwidth is data (a ping-like log, or tracegen's own CSV of a ping trace)
    [tr] = read_file(write("r.csv", "t_s,bandwidth_bps,rtt_ms\n0,,20\n1,,21\n"), "csv")
    assert np.isnan(tr["bandwidth_bps"]).all() and tr["rtt_ms"].tolist() == [20.0, 21.0]


@pytest.mark.parametrize("fmt", sorted(FORMATS))
def test_compressed_file_says_so(write, fmt):
    path = write("log.gz", gzip.compress(b"t_s,bandwidth_bps\n0,1\n1,2\n"))
    with pytest.raises(InputError) as info:
        read_file(path, fmt)
    msg = str(info.value)
    assert info.value.line == 1 and str(path) in msg
    assert "is gzip-compressed" in msg and "gunzip -k log.gz" in msg and "UTF-8" not in msg


def test_unknown_units_list_the_known_ones(write):
    path = write("u.csv", "t_s,bandwidth_bps\n0,1\n")
    with pytest.raises(InputError, match="unknown bandwidth unit 'mbit'.*Mbps"):
        read_file(path, "csv", bandwidth_unit="mbit")
    with pytest.raises(InputError, match="unknown time unit"):
        read_file(path, "csv", time_unit="fortnight")
    with pytest.raises(InputError, match="unknown loss unit"):
        read_file(path, "csv", loss_column="bandwidth_bps", loss_unit="permille")


def test_unknown_column_lists_the_header(write):
    with pytest.raises(InputError, match="no column 'tput'.*the file has: t_s, bandwidth_bps"):
        read_file(write("h.csv", "t_s,bandwidth_bps\n0,1\n"), "csv", bandwidth_column="tput")


def test_bad_iso_time(write):
    with pytest.raises(InputError, match="not an ISO 8601 time") as info:
        read_file(write("i.csv", "t,b\n2026-03-01T08:00:00Z,1\nyesterday,2\n"), "csv", time_column="t",
                  time_unit="iso8601", bandwidth_column="b")
    assert info.value.line == 3


def test_non_utf8_bytes(write):
    with pytest.raises(InputError, match="not valid UTF-8") as info:
        read_file(write("n.csv", b"t_s,bandwidth_bps\n0,1\n1,\xff\xfe\n"), "csv")
    assert info.value.line == 3


def test_two_gigabyte_line_is_refused_without_reading_it(tmp_path):
    # A sparse file: a header, then 2 GiB without a line break. Streaming must stop after about a
    # megabyte instead of holding the line (bounded memory).
    import resource

    path = tmp_path / "huge.csv"
    with open(path, "wb") as f:
        f.write(b"t_s,bandwidth_bps\n")
        f.seek(2 * 1024**3)
        f.write(b"\n")
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    with pytest.raises(InputError, match="longer than") as info:
        read_file(path, "csv")
    grown_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before
    assert info.value.line == 2
    assert grown_kib < 64 * 1024  # far below the 2 GiB line (ru_maxrss is in KiB on Linux)


def test_option_of_another_format_is_refused(write):
    with pytest.raises(InputError, match="--clock-rate-hz does not apply to format 'csv'") as info:
        read_file(write("o.csv", "t_s,bandwidth_bps\n0,1\n"), "csv", clock_rate_hz=90000)
    assert info.value.hint.endswith(", --interval")  # the flags as the command line spells them
    assert "--interval-s" not in str(info.value)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=400))
def test_fuzz_bytes_raise_only_tracegen_errors(write, blob):
    path = write("fuzz.csv", blob)
    try:
        read_file(path, "csv")
    except TracegenError:
        pass


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.lists(st.sampled_from(["0", "1", "-1", "2.5", "", "nan", "x", "1e400", '"3"', " 4 "]),
                         min_size=1, max_size=4), max_size=8),
       st.sampled_from([",", "\t", ";"]))
def test_fuzz_tables_raise_only_tracegen_errors(write, rows, delim):
    text = "t_s" + delim + "bandwidth_bps\n" + "\n".join(delim.join(r) for r in rows)
    path = write("fuzz2.csv", text)
    try:
        [tr] = read_file(path, "csv")
        assert np.all(np.diff(tr["t_s"]) > 0)
    except TracegenError:
        pass
