"""`tracegen synth` output safety: every target checked before the first trace, a failed run takes back
what it wrote (and leaves the catalog as it was), and --force replaces an earlier run's files."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import click
import pytest
from click.testing import CliRunner
from conftest import snapshot

from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.errors import TracegenError
from tracegen.model import PathModel
from tracegen.synth import iter_synth
from tracegen.synth import output as out_mod
from tracegen.synth.output import synth_files, write_files

ROOT = Path(__file__).resolve().parent.parent
LTE = ROOT / "models" / "quillon-lte.json"
SHORT = ("--duration", 30, "--step", 1)
FAILING = ("--duration", 60, "--step", 1, "--seed", 4)  # with the `overflowing` model


def run(*args: object) -> click.testing.Result:
    return CliRunner().invoke(cli, [str(a) for a in args])


def names(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


@pytest.fixture
def a_file(tmp_path: Path) -> Path:
    p = tmp_path / "afile"
    p.write_text("hi\n")
    return p


@pytest.fixture
def overflowing(tmp_path: Path) -> Path:
    """A model whose top state's level overflows: with seed 4, trace 0 is made and trace 1 fails."""
    data = json.loads(LTE.read_text())
    data["states"][-1]["mean"] = [800.0]
    path = tmp_path / "top.json"
    path.write_text(json.dumps(data))
    stream = iter_synth(PathModel.from_dict(data), 2, 60.0, 1.0, 4)
    next(stream)
    with pytest.raises(TracegenError, match="beyond any float in state") as info:  # the sampler's own check
        next(stream)
    assert info.value.field == "bandwidth_bps"
    return path


# --- checked before the first trace ----------------------------------------------------------------------
def test_a_manifest_that_cannot_be_written_stops_the_run_before_any_trace(tmp_path, a_file):
    out = tmp_path / "o"
    res = run("synth", LTE, "--count", 3, *SHORT, "--out", out, "--manifest", a_file / "m.csv")
    assert res.exit_code == 2, res.output
    assert "afile/m.csv" in res.output and "is a file, not a folder" in res.output and "--manifest" in res.output
    assert "internal error" not in res.output and not out.exists()
    # so the same run with a good manifest is not refused as "would replace"
    res = run("synth", LTE, "--count", 3, *SHORT, "--out", out, "--manifest", tmp_path / "m.csv")
    assert res.exit_code == 0, res.output
    assert names(out) == ["quillon-lte-000000.parquet", "quillon-lte-000001.parquet", "quillon-lte-000002.parquet",
                          "run.json"]


def test_an_out_folder_that_cannot_be_made_or_a_run_file_that_is_a_folder_is_refused(tmp_path, a_file):
    res = run("synth", LTE, "--count", 1, *SHORT, "--out", a_file / "deeper")
    assert res.exit_code == 2 and "afile/deeper: cannot be created: " in res.output and "--out" in res.output
    out = tmp_path / "o"
    (out / "run.json").mkdir(parents=True)
    res = run("synth", LTE, "--count", 1, *SHORT, "--out", out, "--force")
    assert res.exit_code == 2 and "run.json: is a folder" in res.output
    assert names(out) == ["run.json"]


def test_a_manifest_that_cannot_be_written_leaves_the_catalog_as_it_was(tmp_path, a_file):
    cat = tmp_path / "cat"
    assert run("synth", LTE, "--count", 1, *SHORT, "--seed", 9, "--catalog", cat).exit_code == 0
    before = snapshot(cat)
    res = run("synth", LTE, "--count", 2, *SHORT, "--catalog", cat, "--manifest", a_file / "m.csv")
    assert res.exit_code == 2 and "afile/m.csv" in res.output and "internal error" not in res.output
    assert snapshot(cat) == before and len(Catalog.open(cat)) == 1


def test_a_run_into_a_catalog_that_fails_part_way_adds_nothing_and_writes_no_manifest(tmp_path, overflowing):
    cat = tmp_path / "cat"
    assert run("synth", LTE, "--count", 1, *SHORT, "--seed", 9, "--catalog", cat).exit_code == 0
    index = (cat / "index.parquet").read_bytes()
    res = run("synth", overflowing, "--count", 2, *FAILING, "--catalog", cat, "--manifest",
              tmp_path / "m.csv")
    assert res.exit_code == 2 and "bandwidth_bps" in res.output
    assert (cat / "index.parquet").read_bytes() == index and len(Catalog.open(cat)) == 1
    assert not (tmp_path / "m.csv").exists()


def test_the_catalog_manifest_is_written_before_the_commit(tmp_path):
    cat = tmp_path / "cat"
    res = run("synth", LTE, "--count", 2, *SHORT, "--catalog", cat, "--manifest", tmp_path / "w.csv")
    assert res.exit_code == 0, res.output
    ids = {r["id"] for r in csv.DictReader((tmp_path / "w.csv").open())}
    assert ids == set(Catalog.open(cat).ids()) and len(ids) == 2


# --- a failed run takes back what it wrote -----------------------------------------------------------------
@pytest.mark.parametrize("workers", [1, 2])
def test_a_model_that_fails_part_way_leaves_no_trace_files(tmp_path, overflowing, workers):
    out = tmp_path / "t"
    res = run("synth", overflowing, "--count", 4, *FAILING, "--out", out, "--workers", workers)
    assert res.exit_code == 2 and "bandwidth_bps" in res.output
    assert not out.exists()  # the folder it made goes too
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep\n")
    res = run("synth", overflowing, "--count", 4, *FAILING, "--out", mine, "--workers", workers)
    assert res.exit_code == 2 and names(mine) == ["notes.txt"]


def test_a_failed_forced_run_keeps_the_earlier_runs_files(tmp_path, overflowing):
    out = tmp_path / "o"
    assert run("synth", LTE, "--count", 4, *SHORT, "--seed", 1, "--out", out).exit_code == 0
    earlier = snapshot(out)
    res = run("synth", overflowing, "--count", 2, *FAILING, "--out", out, "--force", "--name", "quillon-lte")
    assert res.exit_code == 2
    now = snapshot(out)
    assert sorted(now) == sorted(earlier)  # nothing removed, nothing added
    # trace 0 was replaced before trace 1 failed (--force); every other file is the earlier run's
    assert all(now[n] == earlier[n] for n in now if n != "quillon-lte-000000.parquet")


def test_write_files_takes_back_its_files_when_the_stream_fails(tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    (out / "other-000005.parquet").write_bytes(b"not ours\n")

    def stream():
        yield from iter_synth(LTE, 2, 30.0, 1.0, 3, name="other")
        raise TracegenError("stopped", field="test")

    with pytest.raises(TracegenError, match="stopped"):
        write_files(stream(), out, name="other")
    assert names(out) == ["other-000005.parquet"] and (out / "other-000005.parquet").read_bytes() == b"not ours\n"


def test_a_run_file_that_cannot_be_written_takes_back_the_manifest_and_traces(tmp_path, monkeypatch):
    real = out_mod.write_text_atomic

    def failing(path, text, **kw):
        if Path(path).name == "run.json":
            raise TracegenError("cannot be written (No space left on device)", path=path)
        return real(path, text, **kw)

    monkeypatch.setattr(out_mod, "write_text_atomic", failing)
    out, elsewhere = tmp_path / "o", tmp_path / "w" / "m.csv"
    with pytest.raises(TracegenError, match="run.json"):
        synth_files(LTE, 2, 30.0, 1.0, 3, out, manifest=elsewhere)
    assert not out.exists() and not elsewhere.parent.exists()


# --- --force replaces the earlier run -----------------------------------------------------------------------
def test_force_removes_the_earlier_runs_files_it_does_not_rewrite_and_nothing_else(tmp_path):
    out = tmp_path / "stale"
    assert run("synth", LTE, "--count", 5, *SHORT, "--seed", 1, "--out", out).exit_code == 0
    (out / "notes.txt").write_text("mine\n")
    (out / "quillon-lte-000009.parquet").write_bytes(b"mine too, never listed\n")
    res = run("synth", LTE, "--count", 2, *SHORT, "--seed", 2, "--force", "--out", out)
    assert res.exit_code == 0, res.output
    assert names(out) == ["manifest.csv", "notes.txt", "quillon-lte-000000.parquet", "quillon-lte-000001.parquet",
                          "quillon-lte-000009.parquet", "run.json"]
    assert [r["file"] for r in csv.DictReader((out / "manifest.csv").open())] == [
        "quillon-lte-000000.parquet", "quillon-lte-000001.parquet"]
    assert (out / "notes.txt").read_text() == "mine\n"


def test_force_with_another_name_format_and_manifest_place(tmp_path):
    out, elsewhere = tmp_path / "o", tmp_path / "w" / "m.csv"
    # the earlier run's manifest is elsewhere: its run.json's plan (name, count) names its files
    report = synth_files(LTE, 3, 30.0, 1.0, 1, out, manifest=elsewhere, name="first",
                         run={"plan": {"name": "first", "count": 3}})
    assert names(out) == ["first-000000.parquet", "first-000001.parquet", "first-000002.parquet", "run.json"]
    report = synth_files(LTE, 1, 30.0, 1.0, 1, out, fmt="csv", name="second")
    assert names(out) == ["manifest.csv", "run.json", "second-000000.csv"]
    assert sorted(p.name for p in report.removed) == ["first-000000.parquet", "first-000001.parquet",
                                                      "first-000002.parquet"]
    # now the earlier manifest is in the folder, and this run puts its own elsewhere: both listed files go
    report = synth_files(LTE, 1, 30.0, 1.0, 1, out, name="third", manifest=elsewhere)
    assert names(out) == ["run.json", "third-000000.parquet"]
    assert sorted(p.name for p in report.removed) == ["manifest.csv", "second-000000.csv"]
    assert [r["file"] for r in csv.DictReader(elsewhere.open())] == ["third-000000.parquet"]


def test_a_folder_without_a_run_file_loses_nothing(tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    (out / "x-000004.parquet").write_bytes(b"a user's file\n")
    report = synth_files(LTE, 1, 30.0, 1.0, 1, out, name="x")
    assert report.removed == [] and (out / "x-000004.parquet").read_bytes() == b"a user's file\n"
