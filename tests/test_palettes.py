"""Colours with one meaning each (caredecide.palettes) and their use by the charts."""

from __future__ import annotations

import itertools

import pandas as pd

from caredecide import charts, palettes
from caredecide.modelfile import load_model
from caredecide.sensitivity import one_way
from synthetic_cohort import MODELS_DIR

KINDS = {
    "actions": palettes.ACTION_PALETTE,
    "states": palettes.STATE_PALETTE,
    "low/high": palettes.LOW_HIGH_PALETTE,
    "series": palettes.SERIES_PALETTE,
}


def test_no_colour_has_two_meanings():
    for (a, first), (b, second) in itertools.combinations(KINDS.items(), 2):
        shared = {c.upper() for c in first} & {c.upper() for c in second}
        assert not shared, f"{a} and {b} share {shared}"
    for name, palette in KINDS.items():
        assert len({c.upper() for c in palette}) == len(palette), name


def test_an_action_keeps_its_colour_whatever_the_chart_shows():
    labels = ["Monitor", "Start treatment", "Stop"]
    colours = palettes.action_colours(labels)
    assert colours == dict(zip(labels, palettes.ACTION_PALETTE[:3], strict=True))
    # A policy map showing only the second action still paints it in its own colour.
    frame = pd.DataFrame(
        {"state": ["s"], "age": [50], "action": ["Start treatment"], "label": ["T"]}
    )
    spec = charts.make_policy_chart(frame, action_order=labels).to_dict()
    scale = spec["layer"][0]["encoding"]["color"]["scale"]
    assert dict(zip(scale["domain"], scale["range"], strict=True)) == colours


def test_tornado_ends_use_the_low_high_palette_not_action_colours():
    table = one_way(load_model(MODELS_DIR / "demo_progressive.toml")).table
    spec = charts.make_tornado_chart(table).to_dict()
    bar = spec["layer"][0]
    assert bar["encoding"]["color"]["scale"]["range"] == list(palettes.LOW_HIGH_PALETTE)


def test_state_charts_use_the_state_palette():
    frame = pd.DataFrame({"age": [0, 0], "state": ["a", "b"], "proportion": [0.4, 0.6]})
    spec = charts.make_trace_chart(frame).to_dict()
    assert spec["encoding"]["color"]["scale"]["range"] == list(palettes.STATE_PALETTE[:2])
