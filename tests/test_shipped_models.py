"""The model files shipped in models/: each loads, validates, has its card, and rebuilds byte for byte."""

from __future__ import annotations

from pathlib import Path

import pytest

from tracegen import load_model
from tracegen.catalog import Catalog
from tracegen.demo import build_demo
from tracegen.fit import fit

MODELS = Path(__file__).resolve().parent.parent / "models"
SHIPPED = sorted(MODELS.glob("*.json"))


def test_there_are_shipped_models():
    assert len(SHIPPED) >= 2


@pytest.mark.parametrize("path", SHIPPED, ids=[p.stem for p in SHIPPED])
def test_each_model_loads_and_has_a_card(path):
    model = load_model(path)
    assert [s.level_bps for s in model.states] == sorted(s.level_bps for s in model.states)
    card = path.with_suffix(".md").read_text()
    for heading in ("Fitted on", "Selection", "For:", "Rebuild"):
        assert heading in card
    assert path.name in card


@pytest.mark.slow
def test_the_wifi_model_rebuilds_byte_for_byte(tmp_path):
    build_demo(tmp_path, progress=False, fit_model=False)
    traces = list(Catalog.open(tmp_path).traces(["access=wifi"]))
    model = fit(traces, selection=["access=wifi"], progress=False)
    assert model.to_json() == (MODELS / "quillon-campus-wifi.json").read_text()
