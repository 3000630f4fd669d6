"""The Trace value: validation, identity, Arrow round trip and resampling."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracegen import InputError, Trace


def make(n=10, step=1.0, **kw):
    t = np.arange(n) * step
    return Trace.from_columns(t, bandwidth_bps=np.linspace(1e6, 2e6, n), rtt_ms=np.full(n, 30.0), **kw)


@pytest.mark.parametrize("column, values, needle", [
    ("bandwidth_bps", [1.0, -1.0, 2.0], "negative"),
    ("rtt_ms", [10.0, 0.0, 10.0], "not positive"),
    ("loss", [0.0, 1.5, 0.0], "outside 0..1"),
    ("jitter_ms", [0.0, -2.0, 0.0], "negative"),
])
def test_validation_names_the_sample(column, values, needle):
    with pytest.raises(InputError) as info:
        Trace.from_columns([0.0, 1.0, 2.0], lines=[5, 6, 7], **{column: values})
    assert needle in str(info.value) and "line 6" in str(info.value) and column in str(info.value)


@pytest.mark.parametrize("times, needle", [([0, 1, 1], "repeats"), ([0, 2, 1], "goes back"),
                                           ([0, np.nan, 2], "not finite")])
def test_time_must_strictly_increase(times, needle):
    with pytest.raises(InputError, match=needle):
        Trace.from_columns(times, bandwidth_bps=[1, 2, 3])


def test_no_samples_is_an_error():
    with pytest.raises(InputError, match="no samples"):
        Trace.from_columns([], bandwidth_bps=[])


def test_unknown_is_nan_and_zero_is_an_outage():
    tr = Trace.from_columns([0, 1, 2, 3], bandwidth_bps=[1e6, 0.0, np.nan, 1e6])
    s = tr.summary()
    assert s["bw_known_share"] == 0.75
    assert s["outage_share"] == pytest.approx(1 / 3)  # the 0 counts, the NaN does not
    assert np.isnan(s["median_rtt_ms"])


def test_id_depends_on_samples_and_origin_only():
    a = make(tags={"access": "lte"}, source="x.csv")
    b = make(tags={"access": "wifi"}, source="y.csv", group="g")
    assert a.id == b.id
    assert make(origin="synthetic").id != a.id
    c = Trace.from_columns(np.arange(10.0), bandwidth_bps=np.linspace(1e6, 2e6, 10) + 1.0, rtt_ms=np.full(10, 30.0))
    assert c.id != a.id
    # -0.0 and 0.0, and different NaN payloads, are the same data
    z1 = Trace.from_columns([0.0, 1.0], bandwidth_bps=[0.0, np.nan])
    z2 = Trace.from_columns([0.0, 1.0], bandwidth_bps=[-0.0, np.float64("-nan")])
    assert z1.id == z2.id


def test_arrow_round_trip_keeps_everything():
    tr = Trace.from_columns([0.0, 0.5, 1.0], bandwidth_bps=[1e6, np.nan, 0.0], rtt_ms=[20, 21, np.nan],
                            loss=[0, 0.1, 1], jitter_ms=[1, 2, 3], cell=["A", None, "B"], state=[0, 1, 2],
                            tags={"access": "lte"}, group="g1", source="s", provenance={"reader": "x"},
                            weight=0.5, origin="synthetic")
    back = Trace.from_arrow(tr.to_arrow())
    assert back.id == tr.id
    assert back.meta() == tr.meta()
    assert list(back["cell"]) == ["A", None, "B"]
    np.testing.assert_array_equal(back["state"], [0, 1, 2])


def test_from_arrow_rejects_foreign_tables():
    import pyarrow as pa

    with pytest.raises(InputError, match="no tracegen metadata"):
        Trace.from_arrow(pa.table({"t_s": [0.0]}))


def test_resample_time_weighted_mean_hand_computed():
    # rates hold until the next sample: 1 Mbit/s on [0,1), 3 Mbit/s on [1,2) -> a 2 s bin averages 2 Mbit/s
    tr = Trace.from_columns([0.0, 1.0, 2.0, 3.0], bandwidth_bps=[1e6, 3e6, 5e6, 7e6])
    r = tr.resample(2.0)
    np.testing.assert_allclose(r["t_s"], [0.0, 2.0])
    np.testing.assert_allclose(r["bandwidth_bps"], [2e6, 6e6])
    # uneven spacing: 1 on [0, 0.5), 2 on [0.5, 2) -> (0.5*1 + 1.5*2)/2 = 1.75
    tr = Trace.from_columns([0.0, 0.5, 2.0], bandwidth_bps=[1.0, 2.0, 4.0])
    assert tr.resample(2.0)["bandwidth_bps"][0] == pytest.approx(1.75)


def test_resample_downsampling_matches_pandas():
    # Reference: pandas' own resample(...).mean() on a regular series, where time-weighting and
    # plain means agree (pandas documentation, DataFrame.resample).
    rng = np.random.default_rng(3)
    n = 600
    bw = rng.gamma(2.0, 1e6, n)
    rtt = rng.uniform(20, 80, n)
    tr = Trace.from_columns(np.arange(n) * 1.0, bandwidth_bps=bw, rtt_ms=rtt)
    r = tr.resample(10.0)
    idx = pd.to_timedelta(np.arange(n), unit="s")
    ref = pd.DataFrame({"bw": bw, "rtt": rtt}, index=idx).resample("10s").mean()
    np.testing.assert_allclose(r["bandwidth_bps"], ref["bw"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(r["rtt_ms"], ref["rtt"].to_numpy(), rtol=1e-12)


def test_resample_gap_is_unknown_not_held():
    tr = Trace.from_columns([0.0, 1.0, 2.0, 10.0, 11.0], bandwidth_bps=[1.0, 1.0, 1.0, 5.0, 5.0],
                            rtt_ms=[10, 10, 10, 50, 50])
    r = tr.resample(1.0)
    bw = r["bandwidth_bps"]
    assert len(r) == 12
    np.testing.assert_allclose(bw[:3], 1.0)
    assert np.isnan(bw[3:10]).all()  # the 8 s silence is a gap: the sample at 2 s holds for one step only
    np.testing.assert_allclose(bw[10:], 5.0)
    assert np.isnan(r["rtt_ms"][3:10]).all()


def test_resample_upsampling_holds_rates_and_points():
    tr = Trace.from_columns([0.0, 1.0], bandwidth_bps=[1e6, 2e6], rtt_ms=[10.0, 20.0], cell=["a", "b"])
    r = tr.resample(0.25)
    np.testing.assert_allclose(r["bandwidth_bps"], [1e6] * 4 + [2e6] * 4)
    np.testing.assert_allclose(r["rtt_ms"], [10.0] * 4 + [20.0] * 4)
    assert list(r["cell"]) == ["a"] * 4 + ["b"] * 4


def test_resample_point_last_versus_mean():
    tr = Trace.from_columns([0.0, 0.4, 0.8], bandwidth_bps=[1, 1, 1], rtt_ms=[10.0, 20.0, 60.0])
    assert tr.resample(1.0)["rtt_ms"][0] == pytest.approx(30.0)
    assert tr.resample(1.0, point="last")["rtt_ms"][0] == pytest.approx(60.0)


def test_resample_rejects_bad_step():
    with pytest.raises(InputError, match="positive"):
        make().resample(0.0)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.05, 3.0), min_size=2, max_size=39),
       st.lists(st.floats(0.0, 1e7), min_size=40, max_size=40),
       st.sampled_from([0.1, 0.5, 1.0, 2.5]))
def test_resample_agrees_with_brute_force_integration(gaps, values, step):
    # Independent reference: evaluate the sample-and-hold function on a fine grid and average per bin.
    t = np.concatenate(([0.0], np.cumsum(gaps)))
    v = np.asarray(values[: len(t)])
    tr = Trace.from_columns(t, bandwidth_bps=v)
    r = tr.resample(step, max_gap_s=1e9)  # no gaps: every sample holds until the next
    end = t[-1] + tr.step_s
    fine = np.arange(0.0, end, 1e-3) + 5e-4
    held = v[np.searchsorted(t, fine, side="right") - 1]
    bins = (fine // step).astype(int)
    sums = np.bincount(bins, weights=held)
    counts = np.bincount(bins)
    for k, value in enumerate(r["bandwidth_bps"]):
        if counts[k] >= 0.5 * step / 1e-3 + 2 and np.isfinite(value):
            # the fine grid misplaces each sample boundary by up to 1 ms: allow that share of the bin
            assert value == pytest.approx(sums[k] / counts[k], rel=1e-6, abs=(v.max() + 1e-9) * 2.5e-3 / step)


# --------------------------------------------------------------------------------------------------
# The fast content id and string columns against their original, per-sample definitions


def _old_as_str(values):
    """The original definition of a string column (tracegen/trace.py before the fast path)."""
    out = np.empty(len(values), dtype=object)
    for i, v in enumerate(values):
        out[i] = None if v is None or (isinstance(v, float) and np.isnan(v)) else str(v)
    return out


def _old_id(tr) -> str:
    """The original definition of Trace.id: sha256 over each column's canonical bytes, a string column as
    the JSON text of its values."""
    import hashlib
    import json

    from tracegen.trace import COLUMNS, SCHEMA_VERSION

    h = hashlib.sha256(f"tracegen-trace-v{SCHEMA_VERSION}\0{tr.origin}\0".encode())
    for name in sorted(tr.data):
        arr = tr.data[name]
        kind = COLUMNS[name][0]
        h.update(name.encode() + b"\0")
        if kind == "float":
            h.update(np.where(np.isnan(arr), np.nan, arr + 0.0).astype("<f8").tobytes())
        elif kind == "int":
            h.update(np.asarray(arr, dtype="<i8").tobytes())
        else:
            h.update(json.dumps([None if v is None else str(v) for v in arr]).encode())
    return h.hexdigest()[:16]


def _labelled(cell, event=None, n=None):
    n = len(cell) if n is None else n
    t = np.arange(n) * 0.1
    bw = np.where(np.arange(n) % 7 == 0, np.nan, 1e6 + np.arange(n))
    bw[1::11] = -0.0
    return Trace.from_columns(t, bandwidth_bps=bw, rtt_ms=np.full(n, 20.0), cell=cell, event=event,
                              state=np.arange(n) % 3, origin="synthetic")


LABELS = ["A", None, "B", 'qu"ote', "back\\slash", "é-ünïcødé", "emoji \U0001f4e1", "", "tab\there", "\u2028"]


@pytest.mark.parametrize("cell, event", [
    (["A", None, "B"], None),
    ([None, None, None, None], [None, None, "handover", None]),
    (LABELS, LABELS[::-1]),
    # long runs (joined by repetition) and short runs over several 65536-sample chunks (gathered)
    ([f"cell-{i // 5000}" if i % 9000 else None for i in range(150_000)],
     [None if i % 4000 else "handover" for i in range(150_000)]),
    ([LABELS[i % len(LABELS)] for i in range(140_000)], [LABELS[(i * 7) % len(LABELS)] for i in range(140_000)]),
    # not str or None: NaN becomes None, numbers and bytes their str() (the per-sample definition)
    ([1, float("nan"), b"xy", np.str_("s"), None, 2.5], [float("nan")] * 6),
    (["lone \ud800 surrogate", None], None),
])
def test_fast_id_and_labels_match_the_original_definition(cell, event):
    tr = _labelled(cell, event)
    assert tr.id == _old_id(tr)
    assert list(tr["cell"]) == list(_old_as_str(cell))
    if event is not None:
        assert list(tr["event"]) == list(_old_as_str(event))
    # the same values given as an object array, and read back through Arrow, give the same id
    again = _labelled(np.array(cell, dtype=object), None if event is None else np.array(event, dtype=object))
    assert again.id == tr.id
    if all(c is None or "\ud800" not in str(c) for c in cell):
        assert Trace.from_arrow(tr.to_arrow()).id == tr.id


@settings(max_examples=80, deadline=None)
@given(st.lists(st.one_of(st.none(), st.text(max_size=6), st.sampled_from(["x", "y"])), min_size=1, max_size=120))
def test_fast_id_matches_the_original_on_any_labels(labels):
    tr = _labelled(labels, labels[::-1])
    assert tr.id == _old_id(tr)
    assert list(tr["cell"]) == list(_old_as_str(labels))


def test_string_columns_do_not_alias_the_callers_array():
    cells = np.array(["a", None, "b"], dtype=object)
    tr = _labelled(cells)
    cells[0] = "changed"
    assert tr["cell"][0] == "a" and cells.flags.writeable


def test_cell_changes_and_event_resampling_use_the_labels():
    tr = _labelled(["a", "a", None, "b", "b", None, "a", "c"],
                   [None, "handover", None, None, "outage", None, None, None])
    assert tr.summary()["cell_changes"] == 3.0          # a -> b -> a -> c, unknown labels skipped
    r = tr.resample(0.4)
    assert list(r["event"]) == ["handover", "outage"]


def test_resampled_loss_stays_a_fraction():
    # time-weighted means of 1.0 over uneven intervals can round to 1 + 1 ulp; a fraction must stay <= 1
    t = np.cumsum(np.full(50, 0.1) + np.linspace(0, 1e-3, 50))
    tr = Trace.from_columns(t, bandwidth_bps=np.full(50, 1e6), loss=np.ones(50))
    out = tr.resample(0.37)
    assert np.nanmax(out["loss"]) <= 1.0 and np.nanmin(out["loss"]) == pytest.approx(1.0)
