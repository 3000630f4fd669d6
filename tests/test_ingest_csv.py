"""The delimited-text reader: column mapping, units, splitting, personal data, and bad input."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracegen import InputError, TracegenError
from tracegen.ingest import Labels, describe_file, read_file
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
    with pytest.raises(InputError, match="--clock-rate-hz does not apply to format 'csv'"):
        read_file(write("o.csv", "t_s,bandwidth_bps\n0,1\n"), "csv", clock_rate_hz=90000)


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
