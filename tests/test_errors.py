"""User mistakes that must end in a TracegenError naming the field or path, never an internal error."""

from __future__ import annotations

from pathlib import Path

import pytest

import tracegen
from tracegen import TracegenError
from tracegen.compare.features import prepare
from tracegen.curate.split import split
from tracegen.demo import build_demo
from tracegen.errors import MAX_SEED, check_seed
from tracegen.files import write_text_atomic
from tracegen.trace import Trace


@pytest.mark.parametrize("seed", [-1, MAX_SEED + 1, 1.5, True, "7"])
def test_seeds_outside_the_generators_range_are_refused_by_name(seed):
    # numpy's legacy RandomState (which hmmlearn seeds) takes 0 .. 2**32 - 1 (numpy docs).
    for call in (lambda: tracegen.fit([], seed=seed), lambda: tracegen.coverage([], [], seed=seed),
                 lambda: split([], seed=seed), lambda: check_seed(seed)):
        with pytest.raises(TracegenError) as info:
            call()
        assert info.value.field == "seed"


def test_demo_checks_its_options_before_writing_anything(tmp_path):
    for kw, name in (({"sessions": 0}, "sessions"), ({"duration_s": 5.0}, "duration"), ({"seed": -1}, "seed")):
        with pytest.raises(TracegenError) as info:
            build_demo(tmp_path / "d", **kw)
        assert info.value.field == name
    assert not (tmp_path / "d").exists()


def test_a_step_finer_than_every_trace_is_refused_not_allocated():
    tr = Trace.from_columns([0.0, 1.0, 2.0, 3.0], bandwidth_bps=[1e6, 2e6, 1e6, 2e6])
    with pytest.raises(TracegenError, match="finer than every trace's own step") as info:
        prepare([tr], 1e-9)
    assert info.value.field == "step_s"
    assert len(prepare([tr], 2.0).traces[0]) == 2


def test_writing_below_a_file_names_the_path(tmp_path):
    (tmp_path / "afile").write_text("x")
    with pytest.raises(TracegenError, match="cannot be written") as info:
        write_text_atomic(tmp_path / "afile" / "m.json", "{}")
    assert info.value.path.endswith("m.json")


def test_outputs_are_checked_before_any_work(tmp_path):
    from tracegen.files import refuse_existing

    out = tmp_path / "gap.json"
    with pytest.raises(TracegenError, match="two outputs"):
        refuse_existing(out, tmp_path / "." / "gap.json", force=True)
    refuse_existing(out, None, tmp_path / "gap.html", force=False)
    out.write_text("{}")
    with pytest.raises(TracegenError, match="exists already"):
        refuse_existing(out, force=False)
    refuse_existing(out, force=True)


def test_split_parts_with_an_empty_item_are_a_typo(tmp_path):
    from click.testing import CliRunner

    from tracegen.cli import cli

    res = CliRunner().invoke(cli, ["split", "--catalog", str(tmp_path), "--parts", "0.7,,0.3", "--out",
                                   str(tmp_path / "s.csv")])
    assert res.exit_code != 0 and "is not a list of numbers" in res.output


def test_a_trace_too_long_to_draw_in_memory_is_refused_up_front(tmp_path):
    from click.testing import CliRunner

    from tracegen.cli import cli
    from tracegen.synth.sampler import MAX_TRACE_SAMPLES, check_trace_size

    check_trace_size(MAX_TRACE_SAMPLES * 0.01, 0.01)
    with pytest.raises(TracegenError, match="samples per trace") as info:
        check_trace_size(1e12, 1.0)
    assert info.value.field == "duration_s"
    model = Path(__file__).resolve().parents[1] / "models" / "quillon-lte.json"
    res = CliRunner().invoke(cli, ["synth", str(model), "--count", "1", "--duration", "1e12", "--out",
                                   str(tmp_path / "out")])
    assert res.exit_code != 0 and "samples per trace" in res.output and not (tmp_path / "out").exists()


@pytest.mark.parametrize("call, name", [
    (lambda: tracegen.fit([], max_iter=0), "max_iter"),
    (lambda: tracegen.fit([], restarts=0), "restarts"),
    (lambda: tracegen.coverage([Trace.from_columns([0.0, 1.0], bandwidth_bps=[1.0, 2.0])],
                               [Trace.from_columns([0.0, 1.0], bandwidth_bps=[1.0, 2.0])], k=0), "k"),
])
def test_a_bad_count_is_blamed_on_its_own_option(call, name):
    with pytest.raises(TracegenError, match="must be at least") as info:
        call()
    assert info.value.field == name


@pytest.mark.parametrize("options, name", [
    (["--set", "cross_traffic.flow_rate_per_s=1e9"], "cross_traffic.flow_rate_per_s"),
    (["--set", "cross_traffic.onoff_sources=100000000"], "cross_traffic.onoff_sources"),
    (["--set", "handover.rate_per_min=1e9"], "handover.rate_per_min"),
    (["--tilt-handovers", "1e300", "--handovers-per-min", "1"], "tilt.handover_rate_factor"),
])
def test_event_rates_beyond_memory_are_refused_before_drawing(tmp_path, options, name):
    from click.testing import CliRunner

    from tracegen.cli import cli

    model = Path(__file__).resolve().parents[1] / "models" / "quillon-lte.json"
    res = CliRunner().invoke(cli, ["synth", str(model), "--count", "1", "--duration", "60", "--out",
                                   str(tmp_path / "out"), *options])
    assert res.exit_code != 0 and f"field '{name}'" in res.output and "expected in one" in res.output
    assert not (tmp_path / "out").exists()
