"""The catalog: content ids, atomic changes, recovery after a crash, verify and repair, selection."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import SIMPLE_CSV, snapshot
from tracegen import CatalogError, InputError, SelectionError, Trace
from tracegen.catalog import INDEX_FILE, STAGING_DIR, TRACES_DIR, Catalog
from tracegen.ingest import Labels


def trace(seed: int, n: int = 50, **meta) -> Trace:
    rng = np.random.default_rng(seed)
    return Trace.from_columns(np.arange(n) * 1.0, bandwidth_bps=rng.gamma(2, 1e6, n),
                              rtt_ms=rng.uniform(20, 60, n), **meta)


@pytest.fixture
def cat(tmp_path: Path) -> Catalog:
    return Catalog.open(tmp_path / "cat", create=True)


def test_open_refuses_a_folder_that_is_not_a_catalog(tmp_path):
    with pytest.raises(CatalogError, match="not a tracegen catalog"):
        Catalog.open(tmp_path)


def test_add_is_idempotent_by_content(cat):
    a = cat.add([trace(1, tags={"access": "lte"}), trace(2)])
    assert len(a.added) == 2 and not a.present
    b = cat.add([trace(1, tags={"access": "wifi"})])  # same samples, other tags: the same trace
    assert b.present == [a.added[0]] and not b.added
    assert len(cat) == 2


def test_ingest_twice_adds_nothing_the_second_time(cat, tmp_path):
    folder = tmp_path / "logs"
    folder.mkdir()
    for i in range(5):
        (folder / f"s{i}.csv").write_text(f"t_s,bandwidth_bps\n0,{i + 1}\n1,{i + 2}\n")
    first = cat.ingest([folder], "csv", Labels(tags={"access": "lte"}))
    before = snapshot(cat.root)
    second = cat.ingest([folder], "csv", Labels(tags={"access": "lte"}))
    assert (first.files, len(first.added)) == (5, 5)
    assert second.added == [] and sorted(second.present) == sorted(first.added)
    assert snapshot(cat.root) == before


def test_index_rows_carry_figures_provenance_and_files(cat, write):
    cat.ingest([write("a.csv", SIMPLE_CSV)], "csv", Labels(tags={"access": "wifi"}, group="session-1"))
    [row] = cat.rows()
    assert row["group"] == "session-1" and row["tags"] == {"access": "wifi"}
    assert row["duration_s"] == 4.0 and row["step_s"] == 1.0 and row["weight"] == 1.0
    assert row["mean_bw_bps"] == pytest.approx(1.5e6) and row["outage_share"] == 0.25
    assert row["provenance"]["reader"] == "csv"
    assert (cat.root / row["file"]).exists()
    tr = cat.get(row["id"][:6])
    assert tr.id == row["id"] and tr.group == "session-1"


def test_same_input_gives_the_same_bytes(tmp_path, write):
    path = write("a.csv", SIMPLE_CSV)
    snaps = []
    for name in ("one", "two"):
        c = Catalog.open(tmp_path / name, create=True)
        c.ingest([path], "csv")
        snaps.append(snapshot(c.root))
    assert snaps[0] == snaps[1]


def test_bad_file_in_a_batch_changes_nothing(cat, write):
    cat.ingest([write("ok.csv", SIMPLE_CSV)], "csv")
    before = snapshot(cat.root)
    good = write("good.csv", "t_s,bandwidth_bps\n0,7\n1,8\n")
    bad = write("bad.csv", "t_s,bandwidth_bps\n0,1\n1,-1\n")
    with pytest.raises(InputError, match="bad.csv:3"):
        cat.ingest([good, bad], "csv")
    assert snapshot(cat.root) == before
    assert not (cat.root / STAGING_DIR).exists()
    report = cat.ingest([good, bad], "csv", skip_bad=True)
    assert len(report.added) == 1 and len(report.failed) == 1 and "bad.csv:3" in report.failed[0]


def test_remove_and_selection(cat):
    cat.add([trace(1, tags={"access": "lte", "place": "harbour"}), trace(2, tags={"access": "wifi"}),
             trace(3, tags={"access": "lte"}, group="g3")])
    assert len(cat.ids(["access=lte"])) == 2
    assert len(cat.ids(["access=lte,wifi"])) == 3
    assert len(cat.ids(["access!=lte"])) == 1
    assert len(cat.ids(["group=g3"])) == 1
    assert len(cat.ids(["place~harb*"])) == 1
    assert len(cat.ids(["duration_s>=50", "mean_bw_bps>1k"])) == 3
    assert len(cat.ids(["duration_s>1min"])) == 0
    with pytest.raises(SelectionError, match="no index field or tag named 'colour'"):
        cat.ids(["colour=red"])
    with pytest.raises(SelectionError, match="cannot read selection"):
        cat.ids(["access"])
    with pytest.raises(SelectionError, match="not numeric"):
        cat.ids(["access<3"])
    removed = cat.remove(cat.ids(["access=lte"]))
    assert len(removed) == 2 and len(cat) == 1
    assert sorted(p.name for p in (cat.root / TRACES_DIR).iterdir()) == [f"{cat.ids()[0]}.parquet"]
    with pytest.raises(CatalogError, match="holds no trace"):
        cat.remove(["ffff"])


def test_verify_finds_damage_and_repair_removes_it(cat):
    ids = cat.add([trace(i) for i in range(4)]).added
    assert cat.verify().ok
    files = cat.root / TRACES_DIR
    (files / f"{ids[0]}.parquet").unlink()  # missing
    damaged = files / f"{ids[1]}.parquet"
    data = bytearray(damaged.read_bytes())
    data[len(data) // 2] ^= 0xFF  # one flipped byte
    damaged.write_bytes(bytes(data))
    (files / "stray.parquet").write_bytes(b"not ours")  # orphan
    report = cat.verify()
    assert not report.ok and len(report.problems) == 3
    assert any("missing" in p for p in report.problems)
    assert any("sha256" in p for p in report.problems)
    assert any("orphan" in p for p in report.problems)
    fixed = cat.verify(repair=True)
    assert len(fixed.repaired) == 3
    assert cat.verify().ok and len(cat) == 2


def test_repair_lists_whole_trace_files_again_instead_of_deleting_them(cat):
    # Every trace file carries its own metadata, so a lost or damaged index is rebuilt, never emptied.
    cat.add([trace(1, tags={"access": "lte"}, group="g1"), trace(2, source="b.csv")])
    before = cat.rows()
    files = sorted(p.name for p in (cat.root / TRACES_DIR).iterdir())
    (cat.root / INDEX_FILE).unlink()
    with pytest.raises(CatalogError, match="index is missing while traces/ holds 2 trace files"):
        cat.rows()
    assert not cat.verify().ok
    fixed = cat.verify(repair=True)
    assert fixed.ok and fixed.checked == 2
    assert cat.rows() == before
    (cat.root / INDEX_FILE).write_bytes(b"")  # an unreadable index
    with pytest.raises(CatalogError, match="verify --repair"):
        cat.rows()
    (cat.root / TRACES_DIR / "stray.parquet").write_bytes(b"not ours")
    fixed = cat.verify(repair=True)
    assert fixed.ok and any("index.damaged.parquet" in r for r in fixed.repaired)
    assert any("removed orphan traces/stray.parquet" in r for r in fixed.repaired)
    assert cat.rows() == before
    assert sorted(p.name for p in (cat.root / TRACES_DIR).iterdir()) == files


def test_interrupted_commit_is_rolled_forward_or_back(cat, monkeypatch):
    cat.add([trace(1)])
    # Crash after the index was replaced but before the staged file moved: the next change finishes it.
    real_replace = os.replace
    calls = {"n": 0}

    def crash_on_move(src, dst):
        if str(src).endswith(".parquet") and STAGING_DIR in str(src):
            raise KeyboardInterrupt("simulated crash")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", crash_on_move)
    with pytest.raises(KeyboardInterrupt):
        cat.add([trace(2)])
    monkeypatch.setattr(os, "replace", real_replace)
    assert (cat.root / STAGING_DIR).exists()
    report = cat.verify()
    assert report.ok and any("finished storing" in r for r in report.recovered)
    assert len(cat) == 2

    # Crash before the commit: the staged file is discarded and the index is as before.
    def crash_on_index(src, dst):
        calls["n"] += 1
        if str(dst).endswith(INDEX_FILE):
            raise KeyboardInterrupt("simulated crash")
        return real_replace(src, dst)

    before = set(cat.ids())
    monkeypatch.setattr(os, "replace", crash_on_index)
    with pytest.raises(KeyboardInterrupt):
        cat.add([trace(3)])
    monkeypatch.setattr(os, "replace", real_replace)
    report = cat.verify()
    assert report.ok and any("discarded" in r for r in report.recovered)
    assert set(cat.ids()) == before


def _batch(folder: Path, n: int) -> None:
    folder.mkdir()
    rng = np.random.default_rng(0)
    t = np.arange(600)
    for i in range(n):
        bw = rng.gamma(2.0, 1e6, t.size).round()
        (folder / f"run{i:03d}.csv").write_text("t_s,bandwidth_bps\n" + "\n".join(f"{a},{b}" for a, b in zip(t, bw)))


@pytest.mark.slow
def _cmdline(proc: Path) -> str:
    try:
        return (proc / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace").strip()
    except OSError:
        return ""


def test_sigkill_mid_batch_leaves_a_consistent_catalog(tmp_path):
    # Real kill, real process: ingest 200 files, SIGKILL it at several moments, verify each time.
    folder = tmp_path / "runs"
    _batch(folder, 200)
    root = tmp_path / "cat"
    cmd = [sys.executable, "-m", "tracegen.cli", "ingest", "--catalog", str(root), "--format", "csv", str(folder)]
    verify = [sys.executable, "-m", "tracegen.cli", "catalog", "verify", "--catalog", str(root)]
    killed_mid_batch = 0
    for wait_files in (5, 60, 150):
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 60
        staging = root / STAGING_DIR
        while time.monotonic() < deadline and proc.poll() is None:
            if staging.exists() and len(list(staging.glob("*.parquet"))) >= wait_files:
                break
            time.sleep(0.005)
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            killed_mid_batch += 1
        proc.wait(timeout=30)
        result = subprocess.run(verify, capture_output=True, text=True, timeout=60)
        assert result.returncode == 0, result.stdout + result.stderr
    assert killed_mid_batch >= 1
    # the killed runs' worker processes (ingest reads files in parallel) died with them: none holds the lock
    time.sleep(0.5)
    left = [p for p in Path("/proc").glob("[0-9]*") if _cmdline(p).endswith(str(folder)) and "ingest" in _cmdline(p)]
    assert left == [], f"{len(left)} worker processes outlived their killed parent"
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert len(Catalog.open(root)) == 200
    assert subprocess.run(verify, capture_output=True, timeout=60).returncode == 0
