"""The executor seam: local processes and a real Dask LocalCluster (two worker processes, started here)
give byte-identical synthesis (content ids and files) and identical coverage JSON to a run in this
process; chunking covers every index once; refusals are clear."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest

import tracegen
from builders import three_levels
from tracegen.errors import TracegenError
from tracegen.parallel import chunks, runner
from tracegen.synth.output import synth_files

distributed = pytest.importorskip("distributed", reason="the Dask extra is not installed (pip install '.[dask]')")


def digests(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c.scheduler_address


@pytest.fixture(scope="module")
def sets():
    m = three_levels()
    return m, tracegen.synth(m, 16, 400.0, 1.0, seed=1), tracegen.synth(m, 16, 400.0, 1.0, seed=2)


def test_synthesis_on_a_cluster_is_the_local_run(cluster, sets, tmp_path):
    m = sets[0]
    local = [t.id for t in tracegen.synth(m, 9, 300.0, 0.5, seed=5)]
    assert [t.id for t in tracegen.synth(m, 9, 300.0, 0.5, seed=5, cluster=cluster)] == local
    synth_files(m, 9, 300.0, 0.5, 5, tmp_path / "here", workers=1)
    synth_files(m, 9, 300.0, 0.5, 5, tmp_path / "there", cluster=cluster)
    assert digests(tmp_path / "here") == digests(tmp_path / "there")     # every file, manifest and run.json


def test_coverage_on_a_cluster_is_the_local_run(cluster, sets):
    _, real, syn = sets
    here = tracegen.coverage(real, syn, scales_s=(10.0, 60.0), n_permutations=20)
    there = tracegen.coverage(real, syn, scales_s=(10.0, 60.0), n_permutations=20, cluster=cluster)
    assert there.to_json() == here.to_json()


def test_local_processes_are_the_local_run(sets, tmp_path):
    m, real, syn = sets
    assert [t.id for t in tracegen.synth(m, 7, 200.0, 1.0, seed=3, workers=2)] == \
        [t.id for t in tracegen.synth(m, 7, 200.0, 1.0, seed=3)]
    synth_files(m, 7, 200.0, 1.0, 3, tmp_path / "one", workers=1)
    synth_files(m, 7, 200.0, 1.0, 3, tmp_path / "two", workers=2)
    assert digests(tmp_path / "one") == digests(tmp_path / "two")
    a = tracegen.coverage(real, syn, scales_s=(60.0,), n_permutations=0)
    b = tracegen.coverage(real, syn, scales_s=(60.0,), n_permutations=0, workers=2)
    assert a.to_json() == b.to_json()


@pytest.mark.parametrize("count, workers", [(1, 1), (7, 2), (100, 2), (1000, 8), (5, 16)])
def test_chunks_cover_every_index_once(count, workers):
    parts = chunks(count, workers)
    covered = np.concatenate([np.arange(a, a + n) for a, n in parts])
    assert covered.tolist() == list(range(count))
    assert max(n for _, n in parts) <= 256


def test_runner_refusals(tmp_path):
    with pytest.raises(TracegenError, match="not both"):
        runner(2, "tcp://127.0.0.1:8786")     # the library's default of one worker may stand beside a cluster
    with pytest.raises(TracegenError, match="whole number"):
        runner(0)
    with pytest.raises(TracegenError, match="neither a scheduler address nor a scheduler file"):
        runner(None, str(tmp_path / "nothing.json"))
    with runner(1) as r:
        assert list(r.map(abs, [-1, 2, -3])) == [1, 2, 3] and r.kind == "serial"


def test_ingest_and_fit_with_workers_are_the_local_run(sets, tmp_path):
    from tracegen.catalog import Catalog
    from tracegen.fit import fit

    _, real, _ = sets
    folder = tmp_path / "csv"
    folder.mkdir()
    for i, tr in enumerate(real[:6]):
        rows = "\n".join(f"{t:.3f},{b:.1f}" for t, b in zip(tr["t_s"], tr["bandwidth_bps"]))
        (folder / f"run{i}.csv").write_text("time_s,throughput_bps\n" + rows + "\n")
    options = dict(time_column="time_s", bandwidth_column="throughput_bps", bandwidth_unit="bps")
    one = Catalog.open(tmp_path / "one", create=True)
    two = Catalog.open(tmp_path / "two", create=True)
    assert one.ingest([folder], "csv", **options).added == two.ingest([folder], "csv", workers=2, **options).added
    assert list(one.index()["id"]) == list(two.index()["id"])
    traces = list(one.traces())
    a = fit(traces, states=[2, 3], restarts=1, seed=4, max_iter=20)
    b = fit(traces, states=[2, 3], restarts=1, seed=4, max_iter=20, workers=2)
    assert a.to_json() == b.to_json()
