"""Widening: added windows land in their cells (features recomputed), weighted estimates recover the
untilted model, cells the model cannot make are reported, and goals reach the expected counts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from click.testing import CliRunner

from builders import dwell, level_state, model, three_levels
from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.curate.audit import audit
from tracegen.curate.cells import CellScheme, cell_table
from tracegen.curate.widen import CellGoal, goals_from_audit, widen
from tracegen.errors import TracegenError
from tracegen.synth import synth

SCHEME = CellScheme.build("level,variability")
RARE = "level=5M-20M,variability=0.2-0.5"   # about 3.5 % of untilted 60 s windows of three_levels()


@pytest.fixture(scope="module")
def untilted():
    """Plain draws of one-window traces: the untilted truth the weighted estimates must recover."""
    traces = synth(three_levels(), 4000, 60.0, 1.0, seed=11)
    table = cell_table(traces, SCHEME, 1.0)
    hit = SCHEME.matches(table.codes, SCHEME.parse_key(RARE))
    cv = table.windows.values[:, table.windows.features.index("cv_bw")]
    return hit, cv


@pytest.fixture(scope="module")
def widened():
    return widen(three_levels(), [CellGoal(RARE, 250)], scheme=SCHEME, step_s=1.0, seed=3, budget=3000)


def test_added_windows_land_in_the_target_cell(widened):
    assert len(widened.traces) == 250 and widened.goals[0].status == "reached"
    table = cell_table(widened.traces, SCHEME, 1.0)   # features recomputed from the added traces alone
    assert len(table) == 250
    assert set(np.array(table.keys)[table.cell]) == {RARE}
    assert all(t.tags["widen"] == RARE and t.origin == "synthetic" for t in widened.traces)


def test_tilt_made_the_cell_more_likely(widened):
    g = widened.goals[0]
    weights = np.array([t.weight for t in widened.traces])
    assert weights.std() > 0.05                              # the draws were tilted, not plain
    assert g.added / g.windows_drawn > 2 * 0.035             # and landed far more often than untilted


def test_weighted_estimates_recover_the_untilted_model(widened, untilted):
    # importance sampling: E_p[f 1_c] = E_q[f 1_c p/q] (e.g. Owen, "Monte Carlo theory, methods and examples",
    # ch. 9); p_hat = sum(w) / N is unbiased, so it must agree with plain draws within sampling error
    hit, cv = untilted
    p_plain = hit.mean()
    se_plain = math.sqrt(p_plain * (1 - p_plain) / hit.size)
    g = widened.goals[0]
    assert abs(g.p_hat - p_plain) <= 4 * math.hypot(g.p_se, se_plain)
    # the conditional mean of a window feature, self-normalised, against the plain draws in the cell
    mean_plain = cv[hit].mean()
    se_mean_plain = cv[hit].std(ddof=1) / math.sqrt(hit.sum())
    w = np.array([t.weight for t in widened.traces])
    table = cell_table(widened.traces, SCHEME, 1.0)
    f = table.windows.values[:, table.windows.features.index("cv_bw")]
    mean_w = widened.weighted_mean("cv_bw", RARE)
    assert mean_w == pytest.approx(np.sum(w * f) / np.sum(w))
    se_w = math.sqrt(np.sum(w**2 * (f - mean_w) ** 2)) / np.sum(w)   # delta method for the ratio estimator
    assert abs(mean_w - mean_plain) <= 4 * math.hypot(se_w, se_mean_plain)


def test_cells_the_model_cannot_make_are_reported_not_faked():
    no_rtt = model([level_state(2e6, 0.5, dwell("geometric", p=0.1), rtt=None),
                    level_state(8e6, 0.5, dwell("geometric", p=0.1), rtt=None)], [[0, 1], [1, 0]])
    r = widen(no_rtt, [CellGoal("rtt=<50ms", 5), CellGoal("level=20M+", 5), CellGoal("level=1M-5M", 3)],
              seed=1, budget=100)
    status = {g.key: (g.status, g.added) for g in r.goals}
    assert status["rtt=<50ms"] == ("unreachable", 0) and "no rtt" in r.goals[0].reason
    assert status["level=20M+"] == ("unreachable", 0) and r.goals[1].windows_drawn == 100
    assert status["level=1M-5M"] == ("reached", 3)
    assert len(r.traces) == 3


def test_same_seed_same_windows():
    a = widen(three_levels(), [CellGoal("level=5M-20M", 5)], scheme=SCHEME, seed=4, budget=200)
    b = widen(three_levels(), [CellGoal("level=5M-20M", 5)], scheme=SCHEME, seed=4, budget=200)
    assert [t.id for t in a.traces] == [t.id for t in b.traces]
    assert [t.weight for t in a.traces] == [t.weight for t in b.traces]


def test_goals_reach_the_expected_count_after_widening():
    # a corpus of flat traces with no window at 5M-20M: goals sized so that, after adding them, no cell
    # of the reference is thin or empty any more (the expected counts grow with the corpus)
    from test_curate_audit import corpus

    reference, selection = corpus(("low", "mid", "high")), corpus(("low", "mid"))
    before = audit(selection, against=reference, duplicates=False)
    goals = goals_from_audit(before)
    n, add = before.data["selection"]["windows"], sum(g.windows for g in goals)
    assert [g.key for g in goals] == ["level=5M-20M,variability=<0.2,rtt=<50ms,loss=<1%,outage=none"]
    assert goals[0].windows == math.ceil((n + add) / 3)   # a third of the corpus after widening
    assert goals[0].windows == 15                          # 30 windows + 15 = 45, a third of which is 15


def test_bad_goals():
    with pytest.raises(TracegenError, match="not a bin"):
        widen(three_levels(), [CellGoal("level=<2M", 5)])
    with pytest.raises(TracegenError, match="whole number"):
        widen(three_levels(), [CellGoal("level=<1M", 0)])
    with pytest.raises(TracegenError, match="budget"):
        widen(three_levels(), [CellGoal("level=<1M", 1)], budget=0)


def test_cli_widen_to_folder_and_to_catalog(tmp_path):
    from test_curate_audit import corpus

    root = tmp_path / "cat"
    cat = Catalog.open(root, create=True)
    cat.add(corpus(("low", "mid")) + corpus(("high",), per=2))
    model_file = tmp_path / "m.json"
    three_levels().save(model_file)
    out = tmp_path / "added"
    res = CliRunner().invoke(cli, ["widen", str(model_file), "--catalog", str(root), "level=low,mid",
                                   "--against", "level~*", "--dims", "level", "--out", str(out)])
    assert res.exit_code == 0, res.output
    files = sorted(p.name for p in out.iterdir())
    assert "manifest.csv" in files and "run.json" in files and len(files) == 2 + 10
    res = CliRunner().invoke(cli, ["widen", str(model_file), "--catalog", str(root), "level=low,mid",
                                   "--cell", "level=5M-20M=4", "--add"])
    assert res.exit_code == 0, res.output
    assert len(Catalog.open(root).rows(["origin=synthetic"])) == 4
    res = CliRunner().invoke(cli, ["widen", str(model_file), "--catalog", str(root), "--cell", "level=<1M=4"])
    assert res.exit_code == 2 and "--out DIR or --add" in res.output
