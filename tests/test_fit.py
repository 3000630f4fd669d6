"""Fitting the path model: parameter recovery from an independent sampler, the model file, bad input."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

import tracegen
from tracegen import Trace, TracegenError
from tracegen.cli import cli
from tracegen.model import ModelError, PathModel, load

# Known parameters of the test-only sampler below (invented for this test, not from any dataset).
TRUE_LEVELS_BPS = np.array([1e6, 4e6, 12e6])
TRUE_DWELL = [(4.0, 5.0), (4.0, 10.0), (4.0, 7.5)]        # gamma (shape, scale s): means 20, 40, 30 s
TRUE_JUMPS = np.array([[0, 0.8, 0.2], [0.5, 0, 0.5], [0.3, 0.7, 0]])
AR_PHI, STATIONARY_SD = 0.5, 0.12


def sample_trace(rng: np.random.Generator, duration_s: int) -> Trace:
    """Independent test-only sampler: semi-Markov levels with gamma dwell times and AR(1) log residuals.
    Written with plain loops over segments and samples on purpose (it must not share code with tracegen)."""
    states, state = [], int(rng.integers(3))
    while len(states) < duration_s:
        shape, scale = TRUE_DWELL[state]
        states += [state] * max(1, int(np.ceil(rng.gamma(shape, scale))))  # a duration lasts ceil(x) steps
        state = int(rng.choice(3, p=TRUE_JUMPS[state]))
    states = np.array(states[:duration_s])
    innovation_sd = STATIONARY_SD * np.sqrt(1 - AR_PHI**2)
    resid = np.empty(duration_s)
    resid[0] = rng.normal(0, STATIONARY_SD)
    for t in range(1, duration_s):
        if states[t] != states[t - 1]:
            resid[t] = rng.normal(0, STATIONARY_SD)  # a new dwell starts its own residual process
        else:
            resid[t] = AR_PHI * resid[t - 1] + rng.normal(0, innovation_sd)
    bw = TRUE_LEVELS_BPS[states] * np.exp(resid)
    return Trace.from_columns(np.arange(duration_s, dtype=float), bandwidth_bps=bw,
                              rtt_ms=40.0 * np.exp(0.1 * rng.standard_normal(duration_s)))


@pytest.fixture(scope="module")
def recovered():
    rng = np.random.default_rng(2024)
    traces = [sample_trace(rng, 1500) for _ in range(16)]
    return traces, tracegen.fit(traces, states=range(2, 5), restarts=2, seed=1)


def test_recovers_the_number_of_states_levels_and_dwell_times(recovered):
    _, model = recovered
    assert model.report["level_states"] == 3
    assert [s.kind for s in model.states] == ["level"] * 3  # no outage in the data, no outage state
    levels = np.array([s.level_bps for s in model.states])
    np.testing.assert_allclose(levels, TRUE_LEVELS_BPS, rtol=0.05)
    true_means = [shape * scale for shape, scale in TRUE_DWELL]
    np.testing.assert_allclose([s.mean_dwell_s for s in model.states], true_means, rtol=0.15)
    assert all(s.dwell.family != "geometric" for s in model.states)  # gamma(4) is far from geometric


def test_recovers_ar_dynamics_and_jumps(recovered):
    _, model = recovered
    for s in model.states:
        assert s.ar is not None and s.ar.order >= 1
        assert s.ar.coefs[0] == pytest.approx(AR_PHI, abs=0.12)
        assert np.sqrt(s.ar.stationary_variance) == pytest.approx(STATIONARY_SD, rel=0.2)
    jumps = np.array(model.jumps)
    assert np.all(np.diag(jumps) == 0) and np.allclose(jumps.sum(1), 1)
    np.testing.assert_allclose(jumps, TRUE_JUMPS, atol=0.1)


def test_full_model_bic_table_is_reported(recovered):
    _, model = recovered
    table = model.report["selection_table"]
    assert [row["states"] for row in table] == [2, 3, 4]
    best = min(table, key=lambda r: r["full_bic"])
    assert best["states"] == 3
    assert all(len(row["restart_logliks"]) == 2 for row in table)


def test_model_file_round_trip_and_same_bytes(recovered, tmp_path):
    traces, model = recovered
    path = model.save(tmp_path / "m.json")
    back = load(path)
    assert back.to_json() == model.to_json()
    data = json.loads(path.read_text())
    assert data["format"] == "tracegen-path-model" and data["schema_version"] == 3
    assert [s["level_bps"] for s in data["states"]] == sorted(s["level_bps"] for s in data["states"])
    assert all("mean_dwell_s" in s for s in data["states"])
    again = tracegen.fit(traces, states=range(2, 5), restarts=2, seed=1)
    assert again.to_json() == model.to_json()  # same data and seed: the same bytes


def test_outages_are_a_state_of_their_own():
    rng = np.random.default_rng(5)
    traces = []
    for _ in range(6):
        tr = sample_trace(rng, 800)
        bw = np.array(tr["bandwidth_bps"])
        for start in rng.integers(0, 790, 4):
            bw[start:start + int(rng.integers(2, 6))] = 0.0
        traces.append(Trace.from_columns(tr["t_s"], bandwidth_bps=bw))
    model = tracegen.fit(traces, states=3, restarts=1)
    assert model.states[0].kind == "outage" and model.states[0].level_bps == 0.0
    assert 2.0 <= model.states[0].mean_dwell_s <= 6.0
    assert all(np.isfinite(v) for s in model.states[1:] for v in s.mean)  # no log(0) anywhere


def test_a_constant_rtt_fits_to_a_finite_model(tmp_path):
    # A fixed-latency path (an emulator, a wired hop) has no RTT variance left given the bandwidth.
    rng = np.random.default_rng(8)
    traces = [Trace.from_columns(tr["t_s"], bandwidth_bps=tr["bandwidth_bps"], rtt_ms=np.full(len(tr), 30.0))
              for tr in (sample_trace(rng, 600) for _ in range(3))]
    model = tracegen.fit(traces, states=2, restarts=1, with_rtt=True)
    model.save(tmp_path / "m.json")
    again = load(tmp_path / "m.json")
    assert all(np.isfinite(v) for st in again.states for v in st.mean)
    assert np.isfinite(again.report["full_loglik"])


@pytest.mark.parametrize("corrupt, needle", [
    (lambda d: d.update(format="something-else"), "format"),
    (lambda d: d.update(schema_version=99), "schema version"),
    (lambda d: d["jumps"][0].__setitem__(1, 5.0), "jumps"),
    (lambda d: d["states"][0].update(cov=[[-1.0]]), "covariance"),
    (lambda d: d["states"].reverse(), "ordered"),
    (lambda d: d["states"][1].update(level_bps=float("nan")), "finite"),
    # hand edits of the wrong type: refused by name, never an internal error
    (lambda d: d["states"].__setitem__(1, 5), r"states\[1\].*must be an object"),
    (lambda d: d["states"][1].update(mean=5), r"mean must be a list"),
    (lambda d: d["states"][1].update(rtt_log_ms=5), r"\[mean, sd\]"),
    (lambda d: d.update(features=5), "not a valid model file"),
    (lambda d: d.update(schema_version=float(d["schema_version"])), "schema version"),
    (lambda d: d.update(outage_floor_bps=-5), "outage_floor_bps|>= 0"),
    (lambda d: d["states"][1].update(loss_mean=5.0), "share in 0..1"),
])
def test_bad_model_files_are_refused(recovered, tmp_path, corrupt, needle):
    _, model = recovered
    data = json.loads(model.to_json())
    corrupt(data)
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(data))
    with pytest.raises(ModelError, match=needle):
        load(path)


def test_a_deeply_nested_file_is_refused(tmp_path):
    path = tmp_path / "deep.json"
    path.write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(ModelError, match="nested too deeply"):
        load(path)


def test_unreadable_model_file(tmp_path):
    path = tmp_path / "m.json"
    path.write_text("{not json")
    with pytest.raises(ModelError, match="not valid JSON") as info:
        load(path)
    assert info.value.line == 1


def test_bad_selections():
    with pytest.raises(TracegenError, match="no traces"):
        tracegen.fit([], states=3)
    short = Trace.from_columns(np.arange(20.0), bandwidth_bps=np.linspace(1e6, 2e6, 20))
    with pytest.raises(TracegenError, match="need at least"):
        tracegen.fit([short], states=6)
    flat = Trace.from_columns(np.arange(500.0), bandwidth_bps=np.full(500, 3e6))
    with pytest.raises(TracegenError, match="constant"):
        tracegen.fit([flat], states=2)
    no_rtt = Trace.from_columns(np.arange(500.0), bandwidth_bps=np.geomspace(1e6, 9e6, 500))
    with pytest.raises(TracegenError, match="no selected trace has any RTT"):
        tracegen.fit([no_rtt], states=2, with_rtt=True)


def test_joint_rtt_model(recovered):
    traces, _ = recovered
    model = tracegen.fit(traces[:6], states=3, restarts=1, with_rtt=True)
    assert model.features == ("log_bandwidth_bps", "log_rtt_ms")
    for s in model.states:
        assert len(s.mean) == 2 and np.exp(s.mean[1]) == pytest.approx(40.0, rel=0.05)
    assert PathModel.from_dict(json.loads(model.to_json())).with_rtt


def test_cli_fit_and_show(tmp_path, recovered):
    traces, _ = recovered
    from tracegen.catalog import Catalog

    root = tmp_path / "cat"
    Catalog.open(root, create=True).add(traces[:6])
    out = tmp_path / "m.json"
    runner = CliRunner()
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "2..3", "--restarts", "1", "--out", str(out)], obj={})
    assert r.exit_code == 0, r.output
    assert out.exists() and "wrote" in r.output
    shown = runner.invoke(cli, ["model", "show", str(out)], obj={})
    assert shown.exit_code == 0 and "mean dwell s" in shown.output
    again = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "3", "--out", str(out)], obj={})
    assert again.exit_code == 2 and "exists already" in again.output
    nothing = tmp_path / "none.json"
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--where", "mean_bw_bps<1", "--out", str(nothing)], obj={})
    assert r.exit_code == 2 and "no traces" in r.output and not nothing.exists()
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "x..y", "--out", str(nothing)], obj={})
    assert r.exit_code == 2
    (tmp_path / "broken.json").write_text("[]")
    r = runner.invoke(cli, ["model", "show", str(tmp_path / "broken.json")], obj={})
    assert r.exit_code == 2 and "JSON object" in r.output


def test_cli_slow_block_option(tmp_path, recovered):
    traces, _ = recovered
    from tracegen.catalog import Catalog

    root = tmp_path / "cat"
    Catalog.open(root, create=True).add(traces[:6])
    runner = CliRunner()
    out = tmp_path / "m.json"
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "3", "--restarts", "1", "--slow-block", "none",
                            "--out", str(out)], obj={})
    assert r.exit_code == 0, r.output
    assert "slow part: none" in r.output and json.loads(out.read_text())["report"]["slow_block_s"] is None
    out2 = tmp_path / "m2.json"
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "3", "--restarts", "1", "--no-outage-slope",
                            "--out", str(out2)], obj={})
    assert r.exit_code == 0, r.output
    assert json.loads(out2.read_text())["report"]["outage_slope"] is False
    bad = tmp_path / "bad.json"
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "3", "--slow-block", "soon", "--out", str(bad)],
                      obj={})
    assert r.exit_code == 2 and "--slow-block" in r.output and not bad.exists()
    r = runner.invoke(cli, ["fit", "--catalog", str(root), "--states", "3", "--slow-block", "1s", "--out", str(bad)],
                      obj={})
    assert r.exit_code == 2 and "slow_block_s" in r.output and not bad.exists()
