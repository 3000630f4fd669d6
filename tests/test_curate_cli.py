"""The split command as the issue's interface gives it, and its refusals (exit 2, one line, nothing written)."""

from __future__ import annotations

import pandas as pd
import pytest
from click.testing import CliRunner

from test_curate_audit import flat
from tracegen.catalog import Catalog
from tracegen.cli import cli


@pytest.fixture()
def catalog(tmp_path):
    root = tmp_path / "cat"
    traces = [flat(level, i).with_meta(group=f"session-{level}-{i // 2}") for level in ("low", "mid", "high", "top")
              for i in range(4)]
    Catalog.open(root, create=True).add(traces)
    return root


def run(*args):
    return CliRunner().invoke(cli, list(map(str, args)))


def test_split_writes_id_and_split_keeping_groups_whole(catalog, tmp_path):
    out = tmp_path / "splits.csv"
    res = run("split", "--catalog", catalog, "--by", "group", "--parts", "0.5,0.25,0.25", "--seed", 3, "--out", out)
    assert res.exit_code == 0, res.output
    m = pd.read_csv(out)
    assert list(m.columns[:2]) == ["id", "split"] and len(m) == 16
    assert set(m["split"]) == {"train", "validation", "test"}
    assert (m.groupby("group")["split"].nunique() == 1).all()          # no group on two sides
    first = out.read_bytes()
    assert run("split", "--catalog", catalog, "--parts", "0.5,0.25,0.25", "--seed", 3, "--out", out).exit_code == 2
    res = run("split", "--catalog", catalog, "--parts", "0.5,0.25,0.25", "--seed", 3, "--out", out, "--force")
    assert res.exit_code == 0 and out.read_bytes() == first          # same seed, same bytes


@pytest.mark.parametrize("args, words", [
    (["--parts", "0.7,0.2,0.2"], "sum to 1.1"),
    (["--parts", "0.7,x"], "not a list of numbers"),
    (["--by", "access", "--parts", "0.5,0.5"], "form only 1 group"),
    (["--by", "device"], "no trace has a tag 'device'"),
])
def test_split_refusals(catalog, tmp_path, args, words):
    out = tmp_path / "s.csv"
    res = run("split", "--catalog", catalog, *args, "--out", out)
    assert res.exit_code == 2, res.output
    assert words in res.output and "Traceback" not in res.output
    assert not out.exists()


def test_split_refuses_traces_without_a_group(tmp_path):
    root = tmp_path / "cat"
    Catalog.open(root, create=True).add([flat("low", 0), flat("mid", 1).with_meta(group=""), flat("high", 2)])
    res = run("split", "--catalog", root, "--parts", "0.5,0.5", "--out", tmp_path / "s.csv")
    assert res.exit_code == 2 and "1 of 3 traces have no group" in res.output, res.output
    res = run("split", "--catalog", root, "--by", "id", "--parts", "0.5,0.5", "--out", tmp_path / "s.txt")
    assert res.exit_code == 2 and ".csv or .parquet" in res.output.replace("'", ""), res.output
