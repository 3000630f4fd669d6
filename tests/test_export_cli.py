"""`tracegen export` and `tracegen replay` through the command line: every format read back by its
reference reader (pyarrow, pandas, json), refusals (exit 2, nothing left behind), replay's dry run, its
root check and a short real replay when root."""

from __future__ import annotations

import json
import os
import subprocess

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.export import export
from tracegen.export import replay as replay_module
from tracegen.trace import Trace


def sample(n: int = 20, nan_at: int | None = None) -> Trace:
    bw = np.linspace(2e6, 6e6, n)
    if nan_at is not None:
        bw[nan_at] = np.nan
    return Trace.from_columns(np.arange(n, dtype=float), bandwidth_bps=bw, rtt_ms=np.full(n, 40.0),
                              loss=np.zeros(n), source="bench.csv", group="g1", tags={"access": "lte"})


@pytest.fixture()
def catalog(tmp_path):
    root = tmp_path / "cat"
    Catalog.open(root, create=True).add([sample(), sample(12, nan_at=3)])
    return root


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def test_every_format_reads_back(catalog, tmp_path):
    tr = sample()
    for to in ("csv", "parquet", "jsonl", "schedule", "tc"):
        out = tmp_path / to
        res = run("export", "--catalog", catalog, tr.id[:8], "--to", to, "--out", out)
        assert res.exit_code == 0, res.output
        (path,) = sorted(out.iterdir())
        if to == "parquet":
            assert Trace.from_arrow(pq.read_table(path)).id == tr.id             # pyarrow reads it back whole
        elif to == "csv":
            np.testing.assert_allclose(pd.read_csv(path)["bandwidth_bps"], tr["bandwidth_bps"])
        elif to == "jsonl":
            lines = [json.loads(x) for x in path.read_text().splitlines()]
            assert lines[0]["id"] == tr.id and len(lines) == 1 + len(tr)
        elif to == "schedule":
            table = pq.read_table(path)
            # mean rate: 20 s of a ramp 2..6 Mbit/s is 80 Mbit, 6,666 packets of 1500 bytes (one partial dropped)
            assert table.num_rows == int(np.sum(tr["bandwidth_bps"]) // 12_000)
        else:
            assert path.name.endswith(".tc.sh") and os.access(path, os.X_OK)


def test_a_trace_file_can_be_exported_without_a_catalog(tmp_path):
    src = tmp_path / "t.parquet"
    export([sample()], "parquet", tmp_path / "first")
    (first,) = (tmp_path / "first").iterdir()
    first.rename(src)
    res = run("export", src, "--to", "jsonl", "--out", tmp_path / "j")
    assert res.exit_code == 0, res.output


@pytest.mark.parametrize("args, words", [
    (["--to", "tc", "--mtu", "67"], "RFC 791"),
    (["--to", "schedule", "--packet-bytes", "65536"], "65535"),
    (["--to", "schedule", "NANID"], "unknown at 1 of 12"),
    (["--to", "tc", "NANID"], "--nan hold"),
])
def test_refusals_leave_nothing(catalog, tmp_path, args, words):
    out = tmp_path / "out"
    ids = {len(t): t.id for t in Catalog.open(catalog).traces()}
    args = [ids[12] if a == "NANID" else a for a in args]
    refs = [] if ids[12] in args else [ids[20]]
    res = run("export", "--catalog", catalog, *refs, *args, "--out", out)
    assert res.exit_code == 2, res.output
    assert words in res.output and "Traceback" not in res.output
    assert not out.exists()


def test_nan_rules_are_choices(catalog, tmp_path):
    nan_id = [t.id for t in Catalog.open(catalog).traces() if len(t) == 12][0]
    res = run("export", "--catalog", catalog, nan_id, "--to", "schedule", "--nan", "hold", "--out", tmp_path / "h")
    assert res.exit_code == 0, res.output


def test_existing_folder_needs_force(catalog, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    tid = sample().id
    res = run("export", "--catalog", catalog, tid, "--to", "csv", "--out", out)
    assert res.exit_code == 2 and "exists already" in res.output
    assert run("export", "--catalog", catalog, tid, "--to", "csv", "--out", out, "--force").exit_code == 0
    assert (out / f"{tid}.csv").exists()


def test_replay_dry_run_prints_the_commands(catalog):
    res = run("replay", "--catalog", catalog, sample().id, "--dry-run", "--name", "tgd")
    assert res.exit_code == 0, res.output
    lines = res.output.splitlines()
    assert lines[0].startswith("tc qdisc replace dev tgd-s root handle 1: tbf rate 2000000bit")
    assert sum(line.startswith("# at ") for line in lines) == 20    # a change every second, then the end


def test_replay_without_root_says_so(catalog, monkeypatch):
    monkeypatch.setattr(replay_module.os, "geteuid", lambda: 1000)
    res = run("replay", "--catalog", catalog, sample().id)
    assert res.exit_code == 2 and "needs root" in res.output


@pytest.mark.skipif(replay_module.missing_requirements() is not None,
                    reason=f"real replay skipped: {replay_module.missing_requirements()}")
def test_short_replay_runs_a_command_and_cleans_up(tmp_path):
    short = Trace.from_columns(np.arange(3, dtype=float), bandwidth_bps=[3e6, 5e6, 4e6], source="short")
    path = tmp_path / "short.parquet"
    export([short], "parquet", tmp_path / "x")
    next((tmp_path / "x").iterdir()).rename(path)
    res = run("replay", path, "--name", "tgc", "--", "ip", "netns", "exec", "tgc-send", "tc", "qdisc", "show", "dev",
              "tgc-s")
    assert res.exit_code == 0, res.output
    assert "command status 0" in res.output
    listed = subprocess.run(["ip", "netns", "list"], capture_output=True, text=True).stdout
    assert "tgc-send" not in listed and "tgc-recv" not in listed
