"""Chart builders: the spec carries the data, encodings, palette and text labels asked for."""

from __future__ import annotations

import pandas as pd
import pytest

from caredecide import charts


def _policy_frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "state": ["mild", "mild", "severe", "severe"],
            "age": [60, 61, 60, 61],
            "action": ["Wait", "Treat now", "Treat now", "Treat now"],
            "label": ["W", "T", "T", "T"],
        }
    )


def _rows(spec: dict) -> list[dict]:
    (rows,) = [v for v in spec["datasets"].values() if len(v) and "state" in v[0]] or [[]]
    return rows


def test_policy_chart_colours_each_action_from_our_palette_and_writes_labels():
    spec = charts.make_policy_chart(_policy_frame(), action_order=["Treat now", "Wait"]).to_dict()
    cells, text = spec["layer"]
    assert cells["mark"]["type"] == "rect"
    scale = cells["encoding"]["color"]["scale"]
    assert scale["domain"] == ["Treat now", "Wait"]
    assert scale["range"] == list(charts.ACTION_PALETTE[:2])
    # Not colour alone: every cell also carries its text label.
    assert text["mark"]["type"] == "text"
    assert text["encoding"]["text"]["field"] == "label"
    assert [r["label"] for r in _rows(spec)] == ["W", "T", "T", "T"]


def test_policy_chart_keeps_the_state_order_given():
    spec = charts.make_policy_chart(_policy_frame(), state_order=["severe", "mild"]).to_dict()
    assert spec["layer"][0]["encoding"]["y"]["sort"] == ["severe", "mild"]


def test_palette_colours_are_distinct_and_in_lightness_steps():
    # Blue and amber are far apart in lightness (relative luminance, WCAG 2.x formula),
    # which keeps them apart under red-green colour-vision deficiency.
    def luminance(hex_colour: str) -> float:
        rgb = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
        lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
        return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]

    assert len(set(charts.ACTION_PALETTE)) == len(charts.ACTION_PALETTE)
    blue, amber = (luminance(c) for c in charts.ACTION_PALETTE[:2])
    contrast = (max(blue, amber) + 0.05) / (min(blue, amber) + 0.05)
    assert contrast > 3.0  # WCAG 2.x contrast ratio for graphics


def test_action_gap_chart_marks_close_calls_in_text():
    frame = pd.DataFrame(
        {
            "state": ["mild", "mild"],
            "age": [60, 61],
            "action_gap": [0.0004, 2.5],
            "close": [True, False],
        }
    )
    spec = charts.make_action_gap_chart(frame, unit="QALYs").to_dict()
    cells, text = spec["layer"]
    assert cells["encoding"]["color"]["field"] == "action_gap"
    assert cells["encoding"]["color"]["title"] == "Action gap QALYs"
    assert text["encoding"]["text"]["field"] == "mark"
    assert [r["mark"] for r in _rows(spec)] == ["\u25cf", ""]
    # Our own ramp (no library colour scheme), dark = small gap; the dot is outlined so it
    # shows on a dark and a light cell alike.
    scale = cells["encoding"]["color"]["scale"]
    assert "scheme" not in scale and scale["range"] == list(charts.GAP_RAMP)
    assert text["mark"]["stroke"] == "#1A1A1A" and text["mark"]["color"] == "#FFFFFF"


def test_gap_ramp_is_one_hue_from_dark_to_light():
    # Greys only (r = g = b): colour-vision deficiency cannot confuse it; common practice.
    dark, light = (tuple(int(c[i : i + 2], 16) for i in (1, 3, 5)) for c in charts.GAP_RAMP)
    assert len(set(dark)) == 1 and len(set(light)) == 1 and dark[0] < light[0]


def test_policy_chart_legend_shows_long_action_labels_whole():
    frame = _policy_frame().assign(
        action=lambda f: f["action"] + " (or stay on treatment once started)"
    )
    spec = charts.make_policy_chart(frame).to_dict()
    limit = spec["layer"][0]["encoding"]["color"]["legend"]["labelLimit"]
    assert limit >= 7 * max(len(a) for a in frame["action"])  # ~7 px per character at 11 px


def test_value_chart_draws_lines_over_age_and_bars_for_a_single_age():
    over_age = pd.DataFrame(
        {"state": ["a", "a", "b", "b"], "age": [60, 61, 60, 61], "value": [10.0, 9.0, 5.0, 4.5]}
    )
    spec = charts.make_value_chart(over_age, unit="QALYs").to_dict()
    assert spec["mark"]["type"] == "line"
    assert spec["encoding"]["y"]["title"] == "Value QALYs"
    stationary = pd.DataFrame({"state": ["a", "b"], "age": [0, 0], "value": [10.0, 5.0]})
    assert charts.make_value_chart(stationary).to_dict()["mark"]["type"] == "bar"


def test_trace_chart_stacks_states_in_the_given_order():
    frame = pd.DataFrame(
        {
            "age": [60, 60, 61, 61],
            "state": ["well", "dead", "well", "dead"],
            "proportion": [1.0, 0.0, 0.9, 0.1],
        }
    )
    spec = charts.make_trace_chart(frame, state_order=["well", "dead"]).to_dict()
    assert spec["mark"]["type"] == "area"
    assert spec["encoding"]["y"]["stack"] == "zero"
    assert spec["encoding"]["color"]["scale"]["domain"] == ["well", "dead"]
    assert [r["stack_order"] for r in _rows(spec)] == [0, 1, 0, 1]


def test_convergence_chart_uses_a_log_scale_drops_zeros_and_marks_policy_stability():
    frame = pd.DataFrame(
        {
            "sweep": [1, 2, 3, 1, 2, 3],
            "quantity": ["residual"] * 3 + ["error bound"] * 3,
            "amount": [1.0, 0.1, 0.0, 19.0, 1.9, 0.0],
            "policy_stable_from": [2] * 6,
        }
    )
    spec = charts.make_convergence_chart(frame).to_dict()
    lines, rule, _label = spec["layer"]
    assert lines["encoding"]["y"]["scale"]["type"] == "log"
    line_rows = next(v for v in spec["datasets"].values() if v and "amount" in v[0])
    assert [r["amount"] for r in line_rows] == [1.0, 0.1, 19.0, 1.9]
    rule_rows = next(v for v in spec["datasets"].values() if v and "note" in v[0])
    assert rule_rows == [{"sweep": 2, "note": "policy stops changing"}]
    assert rule["mark"]["type"] == "rule"


def test_convergence_chart_drops_points_on_long_runs_so_dashes_stay_visible():
    def frame(n: int) -> pd.DataFrame:
        return pd.DataFrame(
            {
                "sweep": [*range(1, n + 1)] * 2,
                "quantity": ["residual"] * n + ["error bound"] * n,
                "amount": [1.0] * (2 * n),
            }
        )

    few = charts.make_convergence_chart(frame(charts.MAX_SWEEPS_WITH_POINTS)).to_dict()
    many = charts.make_convergence_chart(frame(charts.MAX_SWEEPS_WITH_POINTS + 1)).to_dict()
    assert few["mark"]["point"] is True and many["mark"]["point"] is False
    assert many["encoding"]["strokeDash"]["field"] == "quantity"  # told apart without colour


def test_convergence_chart_without_stability_column_is_a_single_layer():
    frame = pd.DataFrame({"sweep": [1, 2], "quantity": ["residual"] * 2, "amount": [1.0, 0.5]})
    assert "layer" not in charts.make_convergence_chart(frame).to_dict()


@pytest.mark.parametrize(
    ("builder", "frame"),
    [
        (charts.make_policy_chart, pd.DataFrame({"state": ["a"], "age": [1], "action": ["x"]})),
        (charts.make_action_gap_chart, pd.DataFrame({"state": ["a"], "age": [1]})),
        (charts.make_value_chart, pd.DataFrame({"state": ["a"], "value": [1.0]})),
        (charts.make_trace_chart, pd.DataFrame({"age": [1], "state": ["a"]})),
        (charts.make_convergence_chart, pd.DataFrame({"sweep": [1], "amount": [1.0]})),
    ],
)
def test_missing_columns_are_named(builder, frame):
    with pytest.raises(ValueError, match=r"lacks column\(s\)"):
        builder(frame)


def test_trace_until_absorbed_cuts_where_the_cohort_has_left():
    # Worked by hand: alive shares 1, 0.1, 0.0005, 0.00001 -> shown up to cycle 2.
    import pandas as pd

    alive = [1.0, 0.1, 0.0005, 0.00001]
    frame = pd.DataFrame(
        {
            "cycle": [c for c in range(4) for _ in range(2)],
            "state": ["well", "dead"] * 4,
            "proportion": [x for a in alive for x in (a, 1 - a)],
        }
    )
    shown = charts.trace_until_absorbed(frame, ["well"])
    assert shown["cycle"].max() == 2
    assert charts.trace_until_absorbed(frame, ["well"], left=1e-6).equals(frame)
