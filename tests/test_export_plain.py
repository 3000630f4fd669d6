"""One trace per file: Parquet, CSV and JSON lines, checked by reading them back with independent readers
(pyarrow's Parquet reader, pandas.read_csv, the standard library's json)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from tracegen.errors import TracegenError
from tracegen.export.plain import write_csv, write_jsonl, write_parquet
from tracegen.trace import Trace

WRITERS = {"csv": write_csv, "parquet": write_parquet, "jsonl": write_jsonl}

# Values chosen to trip naive formatting: 0.1 and 1/3 have no short exact decimal, 1e-7 and 1e20 need
# exponents, 123456789.123456 needs 15 significant digits; labels hold a comma, a quote, a line break
# and a non-ASCII letter.
BANDWIDTH = [0.1, 1 / 3, np.nan, 0.0, 1e20, 123456789.123456]
CELLS = ["a,b", 'say "hi"', None, "line\nbreak", "é", "plain"]


def awkward_trace() -> Trace:
    return Trace.from_columns(
        [0.0, 0.01, 0.02, 0.035, 0.04, 1e-7 + 0.05], bandwidth_bps=BANDWIDTH,
        rtt_ms=[20.0, np.nan, 21.5, 22.25, 1e-7, 30.0], loss=[0.0, 0.5, np.nan, 1.0, 0.25, 0.125],
        cell=CELLS, state=[0, 1, 2, -3, 2**40, 7], cross_bps=[1.0, 2.0, np.nan, 3.0, 4.0, 5.0],
        origin="measured", source="drive-7.csv", tags={"direction": "downlink", "operator": "x"},
        group="drive-7", provenance={"file_sha256": "ab" * 32, "nested": {"list": [1, 2]}}, weight=2.5)


def assert_same_floats(actual, expected) -> None:
    """Equal values and NaN in the same places (no tolerance: the files must keep every bit)."""
    np.testing.assert_array_equal(np.asarray(actual, dtype=np.float64), np.asarray(expected, dtype=np.float64))


# --- Parquet ------------------------------------------------------------------------------------------


def test_parquet_reads_back_as_the_same_trace(tmp_path: Path) -> None:
    tr = awkward_trace()
    path = write_parquet(tr, tmp_path / "t.parquet")
    back = Trace.from_arrow(pq.read_table(path))        # reference reader: pyarrow.parquet
    assert back.id == tr.id
    assert (back.tags, back.group, back.source, back.weight) == (tr.tags, tr.group, tr.source, tr.weight)
    assert back.provenance == tr.provenance
    assert back.columns == tr.columns


def test_parquet_numbers_through_pandas(tmp_path: Path) -> None:
    tr = awkward_trace()
    df = pd.read_parquet(write_parquet(tr, tmp_path / "t.parquet"))   # reference reader: pandas
    assert list(df.columns) == list(tr.columns)
    assert_same_floats(df["bandwidth_bps"], BANDWIDTH)
    assert df["state"].tolist() == [0, 1, 2, -3, 2**40, 7]


# --- CSV ----------------------------------------------------------------------------------------------


def test_csv_header_is_the_column_names(tmp_path: Path) -> None:
    text = write_csv(awkward_trace(), tmp_path / "t.csv").read_text(encoding="utf-8")
    assert text.split("\n", 1)[0] == "t_s,bandwidth_bps,rtt_ms,loss,jitter_ms,cell,state,cross_bps"


def test_csv_round_trip_through_pandas(tmp_path: Path) -> None:
    tr = awkward_trace()
    df = pd.read_csv(write_csv(tr, tmp_path / "t.csv"), keep_default_na=False, na_values=[""])
    assert list(df.columns) == list(tr.columns)
    for name in ("t_s", "bandwidth_bps", "rtt_ms", "loss", "jitter_ms", "cross_bps"):
        assert_same_floats(df[name], tr[name])
    assert df["state"].tolist() == [0, 1, 2, -3, 2**40, 7]
    cells = [None if isinstance(v, float) else v for v in df["cell"].tolist()]
    assert cells == CELLS


def test_csv_unknown_is_an_empty_cell(tmp_path: Path) -> None:
    # hand-written expectation: sample 3 (t = 0.02 s) has unknown bandwidth, loss and cross traffic
    tr = awkward_trace()
    lines = write_csv(tr, tmp_path / "t.csv").read_text(encoding="utf-8").split("\n")
    row = lines[3].split(",")
    assert row[:5] == ["0.02", "", "21.5", "", ""]
    assert row[-1] == ""
    assert "nan" not in "\n".join(lines).lower()


# --- JSON lines ---------------------------------------------------------------------------------------


def _strict_loads(line: str):
    """json.loads that refuses the NaN / Infinity tokens it accepts by default (they are not JSON, RFC 8259)."""
    def refuse(token: str):
        raise AssertionError(f"non-JSON token {token}")
    return json.loads(line, parse_constant=refuse)


def test_jsonl_every_line_is_strict_json(tmp_path: Path) -> None:
    tr = awkward_trace()
    lines = write_jsonl(tr, tmp_path / "t.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(lines) == len(tr) + 1
    objs = [_strict_loads(line) for line in lines]
    assert all(isinstance(o, dict) for o in objs)


def test_jsonl_metadata_line(tmp_path: Path) -> None:
    tr = awkward_trace()
    head = _strict_loads(write_jsonl(tr, tmp_path / "t.jsonl").read_text(encoding="utf-8").splitlines()[0])
    assert head["id"] == tr.id and head["origin"] == "measured" and head["source"] == "drive-7.csv"
    assert head["group"] == "drive-7" and head["tags"] == {"direction": "downlink", "operator": "x"}
    assert head["weight"] == 2.5 and head["schema_version"] == 1
    assert head["provenance"] == {"file_sha256": "ab" * 32, "nested": {"list": [1, 2]}}
    # hand-worked: spacings 0.01, 0.01, 0.015, 0.005, 0.01+1e-7 -> median 0.01; duration = last - first + step
    assert head["step_s"] == pytest.approx(0.01, abs=1e-12)
    assert head["duration_s"] == pytest.approx(0.05 + 1e-7 + 0.01, abs=1e-12)
    units = {c["name"]: c["unit"] for c in head["columns"]}
    assert [c["name"] for c in head["columns"]] == list(tr.columns)
    assert units["t_s"] == "s" and units["bandwidth_bps"] == "bit/s" and units["rtt_ms"] == "ms"
    assert units["cell"] is None


def test_jsonl_samples_keep_every_value(tmp_path: Path) -> None:
    tr = awkward_trace()
    rows = [_strict_loads(line) for line in
            write_jsonl(tr, tmp_path / "t.jsonl").read_text(encoding="utf-8").splitlines()[1:]]
    assert [list(r) for r in rows] == [list(tr.columns)] * len(tr)
    for name in ("t_s", "bandwidth_bps", "rtt_ms", "loss", "cross_bps"):
        values = [np.nan if r[name] is None else r[name] for r in rows]
        assert_same_floats(values, tr[name])
    assert rows[2]["bandwidth_bps"] is None                       # NaN written as null
    assert [r["cell"] for r in rows] == CELLS
    assert [r["state"] for r in rows] == [0, 1, 2, -3, 2**40, 7]


def test_jsonl_metadata_nan_becomes_null(tmp_path: Path) -> None:
    tr = Trace.from_columns([0.0], bandwidth_bps=[1e6], provenance={"gain": float("nan")})
    head = _strict_loads(write_jsonl(tr, tmp_path / "t.jsonl").read_text(encoding="utf-8").splitlines()[0])
    assert head["provenance"] == {"gain": None}
    assert head["step_s"] is None                                  # one sample: no nominal step


def test_jsonl_refuses_infinity(tmp_path: Path) -> None:
    tr = Trace.from_columns([0.0, 1.0], bandwidth_bps=[1e6, 1e6], cross_bps=[0.0, np.inf])
    with pytest.raises(TracegenError) as err:
        write_jsonl(tr, tmp_path / "t.jsonl")
    assert err.value.field == "cross_bps" and "t = 1 s" in str(err.value)
    assert not list(tmp_path.iterdir())


# --- files --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", sorted(WRITERS))
def test_same_trace_same_bytes(tmp_path: Path, fmt: str) -> None:
    a = WRITERS[fmt](awkward_trace(), tmp_path / f"a.{fmt}")
    b = WRITERS[fmt](awkward_trace(), tmp_path / f"b.{fmt}")
    assert a.read_bytes() == b.read_bytes()


@pytest.mark.parametrize("fmt", sorted(WRITERS))
def test_existing_file_needs_force(tmp_path: Path, fmt: str) -> None:
    path = tmp_path / f"t.{fmt}"
    path.write_text("keep me")
    with pytest.raises(TracegenError) as err:
        WRITERS[fmt](awkward_trace(), path)
    assert err.value.path == str(path) and err.value.hint == "pass --force to replace it"
    assert path.read_text() == "keep me"
    WRITERS[fmt](awkward_trace(), path, force=True)
    assert path.read_bytes() != b"keep me"
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]   # no temporary file left over


@pytest.mark.parametrize("fmt", sorted(WRITERS))
def test_unwritable_place_is_a_tracegen_error(tmp_path: Path, fmt: str) -> None:
    (tmp_path / "file").write_text("")
    with pytest.raises(TracegenError, match="cannot be written"):
        WRITERS[fmt](awkward_trace(), tmp_path / "file" / f"t.{fmt}")    # parent is a file
    with pytest.raises(TracegenError, match="is a folder"):
        WRITERS[fmt](awkward_trace(), tmp_path, force=True)
