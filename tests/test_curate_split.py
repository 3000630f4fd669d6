"""Leak-free stratified splits: the search against a brute force, the error against a plain loop, and
splits of small built traces end to end."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from tracegen.curate.cells import CellScheme
from tracegen.curate.split import SplitResult, assign_groups, split, stratification_error
from tracegen.errors import TracegenError
from tracegen.trace import Trace

# --------------------------------------------------------------------------------------------------
# independent references


def brute_force_best(counts: np.ndarray, parts: np.ndarray) -> float:
    """The lowest E over every assignment with no part empty: the exhaustive reference, enumerated with
    itertools.product and scored with numpy (written apart from split.py's own enumeration)."""
    k = len(parts)
    every = np.array(list(itertools.product(range(k), repeat=counts.shape[0])), dtype=np.int8)
    every = every[(every[:, :, None] == np.arange(k)).any(axis=1).all(axis=1)]
    sums = np.stack([(every == j).astype(float) @ counts for j in range(k)], axis=1)  # (assignments, k, cells)
    dev = np.abs(sums - parts[None, :, None] * counts.sum(axis=0)[None, None, :]).sum(axis=(1, 2))
    return float(dev.min() / (2 * counts.sum()))


def error_by_loops(counts, assignment, parts) -> float:
    """E = 1/(2N) sum_k sum_c |n_kc - p_k N_c| written as plain Python loops, straight from the definition."""
    n_groups, n_cells = len(counts), len(counts[0])
    total = sum(sum(row) for row in counts)
    out = 0.0
    for k, share in enumerate(parts):
        for c in range(n_cells):
            n_kc = sum(counts[g][c] for g in range(n_groups) if assignment[g] == k)
            n_c = sum(counts[g][c] for g in range(n_groups))
            out += abs(n_kc - share * n_c)
    return out / (2 * total)


# --------------------------------------------------------------------------------------------------
# the search


@st.composite
def structures(draw):
    k = draw(st.sampled_from([2, 3]))
    n_groups = draw(st.integers(max(2, k), 10))
    n_cells = draw(st.integers(1, 5))
    counts = draw(arrays(np.int64, (n_groups, n_cells), elements=st.integers(0, 40))).astype(float)
    counts[counts.sum(axis=1) == 0, 0] = 1.0  # every group holds at least one window
    weights = np.array(draw(st.lists(st.integers(1, 20), min_size=k, max_size=k)), dtype=float)
    seed = draw(st.integers(0, 2 ** 16))
    return counts, weights / weights.sum(), seed


@settings(max_examples=60, deadline=None)
@given(structures())
def test_assignment_is_near_the_exhaustive_best(case):
    counts, parts, seed = case
    best = brute_force_best(counts, parts)
    slack = counts.sum(axis=1).max() / counts.sum()  # one largest group's share: the bound split.py states
    for limit in (4096, 1):  # the default (exact when parts ** groups <= 4096) and the heuristic forced
        got = assign_groups(counts, parts, seed, exact_limit=limit)
        # (a) one part per group: an integer part number for every group, nothing else
        assert got.shape == (counts.shape[0],) and np.issubdtype(got.dtype, np.integer)
        assert got.min() >= 0 and got.max() < len(parts)
        # (b) no part empty
        assert set(got.tolist()) == set(range(len(parts)))
        # (c) within one largest group of the brute-force best (exhaustive reference above)
        e = stratification_error(counts, got, parts)
        assert e <= best + slack + 1e-9
        if len(parts) ** counts.shape[0] <= limit:
            assert e == pytest.approx(best, abs=1e-12)  # the exact path must find the best itself
        # same inputs and seed, same answer
        assert np.array_equal(got, assign_groups(counts, parts, seed, exact_limit=limit))


def test_heuristic_usually_reaches_the_best():
    # The bound above is loose (a bare greedy meets it too); this checks the local search earns its keep.
    # On these 60 fixed cases the heuristic finds the brute-force best in 59, the same restarts without
    # local search in 39 (both measured when this test was written), so a floor of 50 fails if the local
    # search stops working.
    rng = np.random.default_rng(7)
    hits = 0
    for case in range(60):
        n_groups, n_cells, k = int(rng.integers(5, 11)), int(rng.integers(1, 6)), int(rng.integers(2, 4))
        counts = rng.integers(0, 41, (n_groups, n_cells)).astype(float)
        counts[counts.sum(axis=1) == 0, 0] = 1.0
        parts = rng.dirichlet(np.full(k, 2.0))
        got = assign_groups(counts, parts, case, exact_limit=1)
        hits += stratification_error(counts, got, parts) <= brute_force_best(counts, parts) + 1e-9
    assert hits >= 50


def test_worked_example_by_hand():
    # Groups A=(6,0) B=(0,6) C=(3,1) D=(1,3) over two cells, parts 50/50. N_c = (10, 10), N = 20, so each
    # part's target is (5, 5). By hand:
    #   {A,B}|{C,D}: (6,6),(4,4) -> |1|+|1|+|1|+|1| = 4  -> E = 4/40  = 0.1   (the best)
    #   {A,D}|{B,C}: (7,3),(3,7) -> 2+2+2+2 = 8          -> E = 8/40  = 0.2
    #   {A,C}|{B,D}: (9,1),(1,9) -> 4+4+4+4 = 16         -> E = 16/40 = 0.4
    #   any 1|3 split, e.g. {A}|{B,C,D}: (6,0),(4,10) -> 1+5+1+5 = 12 -> E = 0.3
    counts = np.array([[6, 0], [0, 6], [3, 1], [1, 3]], dtype=float)
    parts = (0.5, 0.5)
    assert stratification_error(counts, [0, 0, 1, 1], parts) == pytest.approx(0.1)
    assert stratification_error(counts, [0, 1, 1, 0], parts) == pytest.approx(0.2)
    assert stratification_error(counts, [0, 1, 0, 1], parts) == pytest.approx(0.4)
    assert stratification_error(counts, [0, 1, 1, 1], parts) == pytest.approx(0.3)
    # exhaustive: the first best in enumeration order (group A is the most significant digit)
    assert assign_groups(counts, parts).tolist() == [0, 0, 1, 1]
    heuristic = assign_groups(counts, parts, seed=3, exact_limit=1)
    assert heuristic[0] == heuristic[1] != heuristic[2] == heuristic[3]


def test_error_matches_a_plain_loop():
    rng = np.random.default_rng(11)
    for _ in range(20):
        n_groups, n_cells, k = int(rng.integers(2, 9)), int(rng.integers(1, 6)), int(rng.integers(2, 5))
        counts = rng.integers(0, 30, (n_groups, n_cells)).astype(float) + rng.random((n_groups, n_cells))
        parts = rng.dirichlet(np.ones(k))
        assignment = rng.integers(0, k, n_groups)
        assert stratification_error(counts, assignment, parts) == pytest.approx(
            error_by_loops(counts.tolist(), assignment.tolist(), parts.tolist()), rel=1e-12)


def test_error_is_zero_for_scaled_copies_and_counts_moved_windows():
    # four identical groups split 2|2 at 50/50: each part is an exact half of the whole
    same = np.tile([[3.0, 5.0, 2.0]], (4, 1))
    assert stratification_error(same, [0, 1, 0, 1], (0.5, 0.5)) == 0.0
    # one cell of 10 windows, 9 in part 0 and 1 in part 1 at 50/50: 4 windows must move, E = 4/10
    assert stratification_error([[9.0], [1.0]], [0, 1], (0.5, 0.5)) == pytest.approx(0.4)


def test_assign_groups_rejects_bad_input():
    with pytest.raises(TracegenError, match="only 2 groups"):
        assign_groups(np.ones((2, 3)), (0.5, 0.25, 0.25))
    with pytest.raises(TracegenError, match=">= 0"):
        assign_groups(np.array([[1.0, -1.0], [2.0, 2.0]]), (0.5, 0.5))


def test_many_groups_take_the_heuristic_and_stay_close():
    rng = np.random.default_rng(5)
    counts = rng.integers(0, 40, (60, 8)).astype(float) + 1.0
    parts = (0.7, 0.15, 0.15)
    got = assign_groups(counts, parts, seed=2)
    # no brute force at 3**60; with 60 small groups a good split is within a fraction of a percent. The
    # largest group's share is the yardstick of the tested bound.
    assert stratification_error(counts, got, parts) <= counts.sum(axis=1).max() / counts.sum()
    assert np.array_equal(got, assign_groups(counts, parts, seed=2))


# --------------------------------------------------------------------------------------------------
# traces end to end

LEVELS_BPS = (0.5e6, 3e6, 10e6, 30e6)  # one per level bin of the default cells (edges 1M, 5M, 20M)


def make_trace(rng: np.random.Generator, minutes: int, levels: tuple[float, ...], **meta) -> Trace:
    """Piecewise-constant bandwidth, one level per minute drawn from ``levels``, at 1 s. The RTT (20-40 ms,
    one RTT bin) is drawn too so that no two traces hold identical samples by chance."""
    n = 60 * minutes
    bw = np.repeat(rng.choice(levels, minutes), 60)
    return Trace.from_columns(np.arange(n, dtype=float), bandwidth_bps=bw, rtt_ms=rng.uniform(20.0, 40.0, n),
                              loss=np.zeros(n), **meta)


def corpus(seed: int = 0, n_groups: int = 6, per_group: int = 3) -> list[Trace]:
    rng = np.random.default_rng(seed)
    out: list[Trace] = []
    for g in range(n_groups):
        levels = (LEVELS_BPS[g % 4], LEVELS_BPS[(g + 1) % 4])
        for _ in range(per_group):
            out.append(make_trace(rng, int(rng.integers(3, 6)), levels, group=f"g{g}", source=f"src{g % 2}",
                                  tags={"site": f"s{g % 3}"}))
    assert len({t.id for t in out}) == len(out)  # distinct samples: no group is joined to another
    return out


@pytest.fixture(scope="module")
def traces() -> list[Trace]:
    return corpus()


def test_split_keeps_groups_whole(traces):
    result = split(traces, seed=4)
    m = result.manifest
    assert list(m.columns) == ["id", "split", "group"]
    assert m["id"].tolist() == sorted(m["id"]) == sorted(t.id for t in traces)  # every trace once, by id
    assert m.groupby("group")["split"].nunique().max() == 1  # no group on two sides
    assert set(m["split"]) == {"train", "validation", "test"}  # every part used
    assert result.parts == ("train", "validation", "test")
    assert sum(b["traces"] for b in result.balance) == len(traces)
    assert sum(b["share_got"] for b in result.balance) == pytest.approx(1.0, abs=1e-5)
    assert 0.0 <= result.error <= 1.0
    assert "stratification error" in result.summary_text()
    data = result.to_data()
    assert data["parts"] == ["train", "validation", "test"] and len(data["manifest"]) == len(traces)


def test_split_does_not_depend_on_input_order(traces):
    shuffled = [traces[i] for i in np.random.default_rng(1).permutation(len(traces))]
    a, b = split(traces, seed=9), split(shuffled, seed=9)
    assert a.manifest.equals(b.manifest) and a.error == b.error


def test_split_by_other_fields(traces):
    for by, column in (("source", "source"), ("tag.site", None), ("site", None), ("id", None)):
        m = split(traces, by=by, parts=(0.5, 0.5)).manifest
        assert m.groupby("group")["split"].nunique().max() == 1
        assert set(m["split"]) == {"train", "test"}
    assert set(split(traces, by="source", parts=(0.5, 0.5)).manifest["group"]) == {"src0", "src1"}


def test_identical_samples_in_two_groups_are_joined(traces):
    copy = traces[0].with_meta(group="g5")  # same samples, so the same id, in another group
    result = split(traces + [copy], seed=0)
    m = result.manifest
    assert m.loc[m["group"].isin(["g0", "g5"]), "split"].nunique() == 1
    assert any(n.startswith("joined groups g0 and g5") and traces[0].id in n for n in result.notes)


def test_short_trace_still_gets_a_side(traces):
    short = Trace.from_columns(np.arange(20.0), bandwidth_bps=np.full(20, 2e6), group="g1")
    result = split(traces + [short], seed=0)
    assert short.id in set(result.manifest["id"])
    assert "(shorter than a window)" in result.cells
    # 20 s over 60 s windows: a third of a window added to the total
    assert sum(b["windows"] for b in result.balance) == pytest.approx(
        sum(b["windows"] for b in split(traces, seed=0).balance) + 20 / 60, abs=1e-5)


def test_a_group_bigger_than_its_part_is_noted():
    rng = np.random.default_rng(2)
    big = [make_trace(rng, 5, LEVELS_BPS[:2], group="big") for _ in range(8)]  # 40 windows
    small = [make_trace(rng, 5, LEVELS_BPS[:2], group=f"small{i}") for i in range(3)]  # 15 windows
    result = split(big + small, seed=0)
    # 40 / 55 = 72.7 %, above train's 70 %, so train must get at least that
    assert any(n.startswith("group big holds 73% of the windows; kept whole, so 'train' gets") for n in result.notes)


def test_write_is_byte_stable_and_refuses_to_overwrite(traces, tmp_path):
    first, second = tmp_path / "a.csv", tmp_path / "b.csv"
    split(traces, seed=3).write(first)
    split(traces, seed=3).write(second)
    assert first.read_bytes() == second.read_bytes()
    assert first.read_text().splitlines()[0] == "id,split,group"
    with pytest.raises(TracegenError, match="--force"):
        split(traces, seed=3).write(first)
    split(traces, seed=3).write(first, force=True)
    assert first.read_bytes() == second.read_bytes()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left behind


def test_parquet_round_trip(traces, tmp_path):
    result = split(traces, seed=3)
    path = result.write(tmp_path / "split.parquet")
    back = pd.read_parquet(path)
    pd.testing.assert_frame_equal(back, result.manifest)
    again = split(traces, seed=3).write(tmp_path / "again.parquet")
    assert path.read_bytes() == again.read_bytes()


# --------------------------------------------------------------------------------------------------
# bad input


def test_shares_must_sum_to_one(traces):
    with pytest.raises(TracegenError, match="sum to 0.9"):
        split(traces, parts=(0.5, 0.4))


@pytest.mark.parametrize("parts", [(1.2, -0.2), (0.5, 0.0, 0.5), (0.5, float("nan"))])
def test_shares_must_be_positive(traces, parts):
    with pytest.raises(TracegenError, match="above 0"):
        split(traces, parts=parts)


def test_more_parts_than_groups(traces):
    two = [t for t in traces if t.group in ("g0", "g1")]
    with pytest.raises(TracegenError, match="only 2 groups"):
        split(two, parts=(0.4, 0.2, 0.2, 0.2))


def test_missing_group_lists_traces(traces):
    bare = [t.with_meta(group="") for t in traces[:7]]
    with pytest.raises(TracegenError) as err:
        split(traces[7:] + bare)
    text = str(err.value)
    assert "7 of 18 traces have no group" in text and bare[0].id in text and ", ..." in text
    assert "tracegen ingest --group" in text


def test_unknown_tag_lists_the_tags(traces):
    with pytest.raises(TracegenError, match="no trace has a tag 'route'.*site"):
        split(traces, by="route")


def test_names_must_match_the_parts(traces):
    with pytest.raises(TracegenError, match="2 names given for 3 parts"):
        split(traces, names=("fit", "check"))
    with pytest.raises(TracegenError, match="distinct"):
        split(traces, parts=(0.5, 0.5), names=("a", "a"))
    assert split(traces, parts=(0.25,) * 4).parts == ("part1", "part2", "part3", "part4")


def test_unknown_suffix(traces, tmp_path):
    with pytest.raises(TracegenError, match=r"\.csv or \.parquet"):
        split(traces).write(tmp_path / "split.json")


def test_result_is_frozen(traces):
    result = split(traces)
    assert isinstance(result, SplitResult)
    with pytest.raises(AttributeError):
        result.error = 0.0  # type: ignore[misc]
    assert split(traces, scheme=CellScheme.build(["level"])).cells[0].startswith("level=")
