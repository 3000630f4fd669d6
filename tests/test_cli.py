"""The command line: exit codes, one-line errors, JSON output, dry runs, nothing changed on bad input."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from conftest import SIMPLE_CSV, snapshot
from tracegen.cli import _READER_FLAGS, cli
from tracegen.ingest import FORMATS, option_flag, reader


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args], obj={})


@pytest.fixture
def built(tmp_path, write):
    root = tmp_path / "cat"
    result = run("ingest", "--catalog", root, "--format", "csv", "--tag", "access=lte", write("a.csv", SIMPLE_CSV))
    assert result.exit_code == 0, result.output
    return root


def test_ingest_list_show_stats_verify_remove(built, write):
    listed = run("catalog", "list", "--catalog", built, "--json")
    assert listed.exit_code == 0
    rows = json.loads(listed.output)
    assert len(rows) == 1
    for key in ("id", "origin", "group", "duration_s", "step_s", "tags"):
        assert key in rows[0]
    assert rows[0]["tags"] == {"access": "lte"} and rows[0]["median_rtt_ms"] == 22.0
    tid = rows[0]["id"]
    shown = run("catalog", "show", tid[:5], "--catalog", built, "--json")
    assert json.loads(shown.output)["samples"]["bandwidth_bps"][:2] == [1e6, 2e6]
    text = run("catalog", "show", tid, "--catalog", built)
    assert "provenance" in text.output and "bandwidth_bps" in text.output
    stats = json.loads(run("catalog", "stats", "--catalog", built, "--by", "access", "--json").output)
    assert stats[0]["key"] == "lte" and stats[0]["traces"] == 1
    assert run("catalog", "verify", "--catalog", built).exit_code == 0
    again = run("ingest", "--catalog", built, "--format", "csv", "--json", write("copy.csv", SIMPLE_CSV))
    assert json.loads(again.output)["present"] == [tid]
    gone = run("catalog", "remove", "--catalog", built, "--where", "access=lte")
    assert gone.exit_code == 0 and "removed 1" in gone.output


def test_catalog_option_before_the_command(built):
    assert run("--catalog", built, "catalog", "list").exit_code == 0


def test_environment_variable_chooses_the_catalog(built, monkeypatch):
    monkeypatch.setenv("TRACEGEN_CATALOG", str(built))
    assert "1 traces" in run("catalog", "list").output


@pytest.mark.parametrize("content, needle", [
    ("", "is empty"),
    ("t_s,bandwidth_bps\n", "no data rows"),
    ("t_s,bandwidth_bps\n0,1\n1,x\n", "bad.csv:3"),
    ("t_s,bandwidth_bps\n0,1\n0,1\n", "bad.csv:3"),
    ("t_s,bandwidth_bps\n0,-1\n", "negative"),
    ("t_s,bandwidth_bps\n0,1\n1;2\n", "has 1 fields"),
    (b"t_s,bandwidth_bps\n0,\xc3\x28\n", "not valid UTF-8"),
])
def test_bad_input_is_one_line_exit_2_and_changes_nothing(built, write, content, needle):
    before = snapshot(built)
    result = run("ingest", "--catalog", built, "--format", "csv", write("bad.csv", content))
    assert result.exit_code == 2
    assert needle in result.output and "Traceback" not in result.output
    assert result.output.count("\n") == 1 and result.output.startswith("error: ")
    assert snapshot(built) == before


def test_unknown_unit_and_foreign_option(built, write):
    path = write("x.csv", SIMPLE_CSV)
    r = run("ingest", "--catalog", built, "--format", "csv", "--bandwidth-unit", "furlongs", path)
    assert r.exit_code == 2 and "unknown bandwidth unit" in r.output
    r = run("ingest", "--catalog", built, "--format", "csv", "--clock-rate-hz", "90000", path)
    assert r.exit_code == 2 and "does not apply" in r.output


def test_usage_errors_exit_2(built):
    assert run("ingest", "--catalog", built, "nothing.csv").exit_code == 2  # --format missing
    assert run("catalog", "remove", "--catalog", built).exit_code == 2
    assert run("catalog", "list", "--catalog", built, "--where", "nonsense").exit_code == 2


def test_missing_catalog_is_a_clear_error(tmp_path):
    r = run("catalog", "list", "--catalog", tmp_path / "none")
    assert r.exit_code == 2 and "not a tracegen catalog" in r.output


def test_describe_stores_nothing(tmp_path, write):
    root = tmp_path / "never"
    r = run("ingest", "--catalog", root, "--format", "csv", "--describe", write("a.csv", SIMPLE_CSV))
    assert r.exit_code == 0 and "4 data rows" in r.output
    assert not root.exists()


def test_verify_exit_1_on_problems(built):
    (built / "traces" / "orphan.parquet").write_bytes(b"x")
    r = run("catalog", "verify", "--catalog", built)
    assert r.exit_code == 1 and "orphan" in r.output
    assert run("catalog", "verify", "--catalog", built, "--repair").exit_code == 0


def test_no_progress_bar_in_a_pipe(tmp_path, write):
    r = run("ingest", "--catalog", tmp_path / "c", "--format", "csv", write("a.csv", SIMPLE_CSV))
    assert "ingesting" not in r.output  # CliRunner is not a terminal


def test_every_reader_option_has_exactly_one_flag():
    flags = {key: flag for flag, key, _, _ in _READER_FLAGS}
    assert len(flags) == len(_READER_FLAGS)
    for fmt in FORMATS:
        for key in reader(fmt).OPTIONS:
            assert key in flags, f"{fmt} option {key} has no flag"
            if key != "interval_s":
                assert flags[key] == option_flag(key)


@pytest.mark.parametrize("fmt, name, content, needle", [
    ("rtcp", "a.jsonl", '{"arrival_s": 1.0}\n[1, 2]\n', "a.jsonl:2"),
    ("rtcp", "b.jsonl", '{"arrival_s": 1.0, "fraction_lost": 300}\n', "fraction_lost"),
    # RFC 3550 6.4.1 figures: A = 0xb7108000, LSR = 0xb7052000; a DLSR of 12 s puts departure after arrival
    ("rtcp", "c.jsonl", '{"arrival_ntp": 12992241781528592384, "lsr": 3070566400, "dlsr": 786432}\n', "dlsr"),
    ("rtcp", "d.jsonl", "{not json\n", "d.jsonl:1"),
    ("ping", "e.ping", "PING h (192.0.2.1) 56(84) bytes of data.\nthis is not ping output\n", "e.ping:2"),
    ("packets", "f.pkts", "0,100\n2,100\n1,100\n", "f.pkts:3"),
    ("packets", "g.pkts", "0,100\n1,-5\n", "g.pkts:2"),
])
def test_bad_input_of_every_format_changes_nothing(built, write, fmt, name, content, needle):
    before = snapshot(built)
    result = run("ingest", "--catalog", built, "--format", fmt, write(name, content))
    assert result.exit_code == 2, result.output
    assert needle in result.output and "Traceback" not in result.output
    assert snapshot(built) == before


def test_demo_builds_a_catalog_that_verifies(tmp_path):
    root = tmp_path / "demo"
    r = run("demo", "--catalog", root, "--sessions", "6", "--duration", "60s")
    assert r.exit_code == 0, r.output
    assert "tracegen catalog list" in r.output
    rows = json.loads(run("catalog", "list", "--catalog", root, "--json").output)
    assert len(rows) >= 6
    assert {"access", "mobility"} <= set(rows[0]["tags"])
    assert run("catalog", "verify", "--catalog", root).exit_code == 0
