"""`tracegen synth` and `tracegen scenario`: scenario files, options <-> keys, outputs, bad input."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import click
import numpy as np
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

import tracegen
from tracegen import Trace
from tracegen.catalog import Catalog
from tracegen.cli import cli
from tracegen.synth.scenario import OPTION_KEYS, all_keys, load_scenario

ROOT = Path(__file__).resolve().parent.parent
LTE = ROOT / "models" / "quillon-lte.json"
EXAMPLES = sorted((ROOT / "models" / "scenarios").glob("*.toml"))


def run(*args: str) -> click.testing.Result:
    return CliRunner().invoke(cli, [str(a) for a in args])


def files_of(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


# --- scenario files --------------------------------------------------------------------------------
def test_there_are_example_scenarios_and_each_checks():
    assert len(EXAMPLES) >= 3
    for path in EXAMPLES:
        res = run("scenario", "check", path)
        assert res.exit_code == 0, res.output
        assert res.output.rstrip().endswith("ok")
        assert "traces" in res.output and "model" in res.output


def test_scenario_values_and_options_combine(write, tmp_path):
    path = write("s.toml", f'model = "{LTE}"\ncount = 4\nduration_s = "2min"\nstep_s = "250ms"\nseed = 9\n'
                           '[bottleneck]\nbuffer_ms = 80\n[handover]\nrate_per_min = 2\n[tags]\nsite = "north"\n')
    plan = load_scenario(path, {"count": 2, "output.dir": str(tmp_path / "o")}, ("bottleneck.policy=codel",))
    assert (plan.count, plan.duration_s, plan.step_s, plan.seed) == (2, 120.0, 0.25, 9)  # the option wins
    assert plan.bottleneck.buffer_ms == 80 and plan.bottleneck.policy == "codel"
    assert plan.handover.rate_per_min == 2.0 and plan.tags == {"site": "north"}
    assert plan.model_path == LTE and plan.output_dir == tmp_path / "o"


def test_relative_paths_in_a_scenario_are_relative_to_it(tmp_path):
    sub = tmp_path / "deep"
    sub.mkdir()
    (sub / "m.json").write_bytes(LTE.read_bytes())
    (sub / "s.toml").write_text('model = "m.json"\n[output]\ndir = "out"\n')
    plan = load_scenario(sub / "s.toml")
    assert plan.model_path == sub / "m.json" and plan.output_dir == sub / "out"
    assert plan.manifest == sub / "out" / "manifest.csv"


# A valid, non-default value for every scenario key (a new key must be added here, with its option or --set).
KEY_VALUES = {
    "name": "other", "count": 3, "duration_s": 90.0, "step_s": 0.5, "seed": 4,
    "output.dir": "/tmp/x", "output.catalog": "/tmp/c", "output.format": "csv", "output.force": True,
    "output.manifest": "/tmp/m.csv",
    "cross_traffic.flow_rate_per_s": 0.3, "cross_traffic.size_bytes_mean": 5e5, "cross_traffic.pareto_alpha": 1.2,
    "cross_traffic.responsive_share": 0.5, "cross_traffic.unresponsive_rate_bps": 3e6,
    "cross_traffic.onoff_sources": 2, "cross_traffic.on_mean_s": 2.0, "cross_traffic.off_mean_s": 3.0,
    "cross_traffic.onoff_rate_bps": 1e6, "cross_traffic.onoff_alpha": 1.6, "cross_traffic.responsive_probe": 0.5,
    "cross_traffic.responsive_rtt_ms": 80.0,
    "bottleneck.buffer_ms": 40.0, "bottleneck.policy": "red", "bottleneck.red_min_th_frac": 0.2,
    "bottleneck.red_max_th_frac": 0.6, "bottleneck.red_max_p": 0.1, "bottleneck.red_weight": 0.01,
    "bottleneck.codel_target_ms": 10.0, "bottleneck.codel_interval_ms": 50.0, "bottleneck.packet_bytes": 1200.0,
    "handover.rate_per_min": 4.0, "handover.times_s": [5.0, 9.0], "handover.interruption_ms": 80.0,
    "handover.interruption_sigma_log": 0.3, "handover.failure_probability": 0.2, "handover.failure_outage_s": 3.0,
    "handover.failure_sigma_log": 0.2, "handover.rtt_spike_ms": 40.0, "handover.rtt_spike_decay_s": 2.0,
    "handover.loss_burst_s": 0.5, "handover.loss_burst_loss": 0.4, "handover.new_level": "keep",
    "tilt.state_weights": [1.0, 2.0, 1.0, 1.0, 1.0, 1.0, 1.0], "tilt.low_state_weight": 2.0, "tilt.low_states": 2,
    "tilt.dwell_scale": 1.5, "tilt.handover_rate_factor": 2.0, "tilt.outage_rate_factor": 2.0,
    "tilt.failure_factor": 2.0, "tilt.outage_length_factor": 1.5, "tags.*": "north",
}
def _plan_value(plan, key):
    section, _, name = key.rpartition(".")
    if key.startswith("output."):
        return {"dir": plan.output_dir, "catalog": plan.output_catalog, "format": plan.output_format,
                "force": plan.force, "manifest": plan.manifest}[name]
    if section == "tags":
        return plan.tags.get("k")
    if section:
        part = getattr(plan, section)
        return None if part is None else getattr(part, name)
    return getattr(plan, name)


def _same(got, want):
    if isinstance(want, list):
        return list(got) == want
    if isinstance(want, str) and want.startswith("/"):
        return str(got) == want
    return got == want


def test_every_key_can_be_set_from_the_command_line():
    keys = all_keys()
    pairs = {"handover.speed_m_s": ("handover.cell_size_m", 500.0), "handover.cell_size_m": ("handover.speed_m_s", 10.0)}
    for key in keys:
        if key == "model":
            continue  # the MODEL_FILE argument
        if key in pairs or key == "bottleneck.buffer_bytes":
            continue  # checked below, they need a partner
        assert key in KEY_VALUES, f"add a sample value for the new key {key}"
        value = KEY_VALUES[key]
        setting = key.replace("*", "k")
        extra = ()
        if key.startswith("bottleneck.") and key != "bottleneck.buffer_ms":
            extra = ("bottleneck.buffer_ms=10",)  # a bottleneck needs its buffer
        if key.startswith("cross_traffic.") and key not in ("cross_traffic.flow_rate_per_s",
                                                            "cross_traffic.onoff_sources"):
            extra = ("cross_traffic.flow_rate_per_s=0.1",)  # cross traffic needs a source
        plan = load_scenario(None, {"model": str(LTE)}, extra + (f"{setting}={json.dumps(value)}",))
        assert _same(_plan_value(plan, setting), value), key
    plan = load_scenario(None, {"model": str(LTE)}, ("handover.speed_m_s=10", "handover.cell_size_m=500",
                                                    "bottleneck.buffer_bytes=30000"))
    assert plan.handover.rate_per_s == pytest.approx(0.02) and plan.bottleneck.buffer_bytes == 30000


def test_every_option_sets_its_scenario_key():
    from tracegen.cli import _plan_from_cli

    synth = cli.commands["synth"]
    options = {p.opts[0].lstrip("-") for p in synth.params if isinstance(p, click.Option)}
    # where a run executes (--workers, --cluster) is not part of a scenario: it gives the same bytes anywhere
    assert options - {"scenario", "set", "help", "workers", "cluster"} == set(OPTION_KEYS), \
        "each synth option must map to a scenario key"
    cli_values = {"count": 3, "duration": "90", "step": "500ms", "seed": 4, "name": "other", "out": Path("/tmp/x"),
                  "format": "csv", "catalog": Path("/tmp/c"), "force": True, "manifest": Path("/tmp/m.csv"),
                  "cross_flows_per_s": 0.3, "buffer_ms": 40.0, "policy": "red", "handovers_per_min": 4.0,
                  "handover_at": ("5", "9s"), "tilt_states": "1,2,1,1,1,1,1", "tilt_handovers": 2.0,
                  "tag": ("k=north",)}
    for option, key in OPTION_KEYS.items():
        param = next(p for p in synth.params if p.opts[0] == f"--{option}")
        assert param.name == option.replace("-", "_")  # the option's value reaches _plan_from_cli
        assert f"[{key}]" in param.help  # and its help names the key it sets
        values = {option.replace("-", "_"): cli_values[option.replace("-", "_")]}
        if key.startswith("bottleneck.") and key != "bottleneck.buffer_ms":
            values["buffer_ms"] = 10.0
        if key == "output.catalog":
            values["out"] = None
        plan = _plan_from_cli(LTE, values)
        setting = "tags.k" if key == "tags" else key
        assert _same(_plan_value(plan, setting), KEY_VALUES["tags.*" if key == "tags" else key]), option


def test_scenario_keys_command_lists_every_key():
    res = run("scenario", "keys")
    assert res.exit_code == 0
    for key in all_keys():
        assert key in res.output


# --- output ----------------------------------------------------------------------------------------
def test_synth_writes_one_file_per_trace_a_manifest_and_run_file(tmp_path):
    out = tmp_path / "o"
    res = run("synth", LTE, "--count", 3, "--duration", "90", "--step", "0.1", "--seed", 5, "--out", out)
    assert res.exit_code == 0, res.output
    names = sorted(p.name for p in out.iterdir())
    assert names == ["manifest.csv", "quillon-lte-000000.parquet", "quillon-lte-000001.parquet",
                     "quillon-lte-000002.parquet", "run.json"]
    rows = list(csv.DictReader((out / "manifest.csv").open()))
    assert [r["index"] for r in rows] == ["0", "1", "2"]
    for r in rows:
        tr = Trace.from_arrow(pq.read_table(out / r["file"]), path=r["file"])
        assert tr.id == r["id"] and tr.origin == "synthetic" and len(tr) == 900
        assert tr.provenance["seed"] == 5 and tr.provenance["model_sha256"] == json.loads(
            (out / "run.json").read_text())["model_sha256"]
        assert float(r["weight"]) == 1.0 and float(r["normalised_weight"]) == pytest.approx(1.0)
        assert {"state", "event"} <= set(tr.columns)
    run_info = json.loads((out / "run.json").read_text())
    assert run_info["traces"] == 3 and run_info["plan"]["step_s"] == 0.1 and run_info["plan"]["count"] == 3


def test_same_seed_same_bytes_and_trace_i_does_not_depend_on_the_count(tmp_path):
    a, b, c, d = (tmp_path / x for x in "abcd")
    common = ("--duration", "60", "--step", "0.05", "--handovers-per-min", "3")
    assert run("synth", LTE, "--count", 2, "--seed", 1, "--out", a, *common).exit_code == 0
    assert run("synth", LTE, "--count", 2, "--seed", 1, "--out", b, *common).exit_code == 0
    assert run("synth", LTE, "--count", 4, "--seed", 1, "--out", c, *common).exit_code == 0
    assert run("synth", LTE, "--count", 2, "--seed", 2, "--out", d, *common).exit_code == 0
    fa, fb, fc, fd = files_of(a), files_of(b), files_of(c), files_of(d)
    assert fa == fb
    trace_files = [n for n in fa if n.endswith(".parquet")]
    assert all(fa[n] == fc[n] for n in trace_files)
    assert all(fa[n] != fd[n] for n in trace_files)


def test_existing_files_are_kept_unless_forced(tmp_path):
    out = tmp_path / "o"
    assert run("synth", LTE, "--count", 2, "--duration", 30, "--out", out).exit_code == 0
    before = files_of(out)
    res = run("synth", LTE, "--count", 2, "--duration", 30, "--seed", 3, "--out", out)
    assert res.exit_code == 2 and "--force" in res.output and "quillon-lte-000000.parquet" in res.output
    assert files_of(out) == before
    assert run("synth", LTE, "--count", 2, "--duration", 30, "--seed", 3, "--out", out, "--force").exit_code == 0
    assert files_of(out) != before


def test_csv_output_reads_back_through_the_ordinary_csv_reader(tmp_path):
    out = tmp_path / "o"
    assert run("synth", LTE, "--count", 1, "--duration", 60, "--step", 0.5, "--format", "csv", "--out", out,
               "--name", "csv run").exit_code == 0
    path = out / "csv_run-000000.csv"
    original = tracegen.synth(LTE, 1, 60.0, 0.5, 0, name="csv run")[0]
    back = tracegen.ingest.read_file(path, "csv")[0]
    np.testing.assert_allclose(back["bandwidth_bps"], original["bandwidth_bps"])
    np.testing.assert_allclose(back["t_s"], original["t_s"])


def test_synth_into_a_catalog(tmp_path):
    cat = tmp_path / "cat"
    res = run("synth", LTE, "--count", 3, "--duration", 60, "--catalog", cat, "--tag", "site=north",
              "--manifest", tmp_path / "weights.csv")
    assert res.exit_code == 0, res.output
    rows = Catalog.open(cat).rows(["origin=synthetic", "site=north"])
    assert len(rows) == 3
    ids = {r["id"] for r in rows}
    assert {r["id"] for r in csv.DictReader((tmp_path / "weights.csv").open())} == ids
    tr = Catalog.open(cat).get(next(iter(ids)))
    assert tr.provenance["scenario"]["duration_s"] == 60 and tr.tags["model"] == "quillon-lte"
    # the same run again adds nothing new (content ids)
    res = run("synth", LTE, "--count", 3, "--duration", 60, "--catalog", cat, "--tag", "site=north")
    assert "added 0" in res.output and len(Catalog.open(cat).rows()) == 3


def test_tilted_runs_record_weights(tmp_path):
    out = tmp_path / "o"
    res = run("synth", LTE, "--count", 6, "--duration", 120, "--out", out, "--tilt-handovers", 3,
              "--set", "tilt.low_state_weight=3")
    assert res.exit_code == 0 and "effective sample size" in res.output
    rows = list(csv.DictReader((out / "manifest.csv").open()))
    w = np.array([float(r["weight"]) for r in rows])
    llr = np.array([float(r["log_likelihood_ratio"]) for r in rows])
    np.testing.assert_allclose(w, np.exp(llr))
    assert np.mean([float(r["normalised_weight"]) for r in rows]) == pytest.approx(1.0)
    assert len(set(np.round(llr, 9))) > 1


def test_library_api_returns_traces_or_a_stream():
    model = tracegen.load_model(LTE)
    listed = tracegen.synth(model, 2, 30.0, 1.0, seed=4)
    streamed = tracegen.synth(model, 2, 30.0, 1.0, seed=4, stream=True)
    assert not isinstance(streamed, list)
    assert [t.id for t in listed] == [t.id for t in streamed]
    assert [t.id for t in tracegen.synth(str(LTE), 2, 30.0, 1.0, seed=4)] == [t.id for t in listed]


# --- bad input: a clear one-line error, exit 2, nothing written ------------------------------------------
@pytest.mark.parametrize("content, expect", [
    ('cout = 3\n', "did you mean 'count'"),
    ('[bottleneck]\nbufer_ms = 3\n', "did you mean 'buffer_ms'"),
    ('[handovr]\nrate_per_min = 1\n', "did you mean 'handover'"),
    ('step_s = 0.005\n', "at least 0.01 s"),
    ('step_s = "5ms"\n', "at least 0.01 s"),
    ('[handover]\nrate_per_min = -2\n', "handover.rate_per_min"),
    ('[cross_traffic]\nflow_rate_per_s = -1\n', "cross_traffic.flow_rate_per_s"),
    ('[bottleneck]\nbuffer_ms = 0\n', "bottleneck.buffer_ms"),
    ('[bottleneck]\nbuffer_ms = 10\npolicy = "codle"\n', "did you mean 'codel'"),
    ('[tilt]\nfailure_factor = 100\n[handover]\nfailure_probability = 0.05\n', "above 1"),
    ('[tilt]\nstate_weights = [1, 2]\n', "tilt.state_weights"),
    ('count = 0\n', "count"),
    ('count = "many"\n', "count"),
    ('duration_s = -5\n', "duration_s"),
    ('[output]\nformat = "xls"\n', "output.format"),
    ('this is not toml\n', "not valid TOML"),
])
def test_bad_scenarios_are_refused_and_nothing_is_written(write, tmp_path, content, expect):
    path = write("bad.toml", f'model = "{LTE}"\n' + content if "not toml" not in content else content)
    out = tmp_path / "never"
    res = run("synth", "--scenario", path, "--out", out)
    assert res.exit_code == 2, res.output
    assert expect in res.output and "Traceback" not in res.output
    assert len(res.output.strip().splitlines()) == 1
    assert not out.exists()
    check = run("scenario", "check", path)
    assert check.exit_code == 2 and expect in check.output


def test_a_model_of_another_schema_version_is_refused(write, tmp_path):
    data = json.loads(LTE.read_text())
    data["schema_version"] = 4
    model = write("future.json", json.dumps(data))
    res = run("synth", model, "--out", tmp_path / "o")
    assert res.exit_code == 2 and "schema version 4" in res.output and "future.json" in res.output
    assert not (tmp_path / "o").exists()


def test_options_are_checked_too(tmp_path):
    for args, expect in ((("--step", "1ms"), "at least 0.01 s"), (("--buffer-ms", "0"), "bottleneck.buffer_ms"),
                         (("--handovers-per-min", "-1"), "handover.rate_per_min"),
                         (("--tilt-states", "1,x"), "--tilt-states"), (("--set", "nonsense"), "KEY=VALUE"),
                         (("--set", "tilt.handover_rate_factor=0"), "tilt.handover_rate_factor")):
        res = run("synth", LTE, "--out", tmp_path / "o", *args)
        assert res.exit_code == 2 and expect in res.output, (args, res.output)
    assert not (tmp_path / "o").exists()
    res = run("synth", LTE)
    assert res.exit_code == 2 and "--out" in res.output
