"""``caredecide sensitivity``: the decision tornado first, thresholds in context, and
``--region-map``, on the hand-checkable model of tests/cli/test_sensitivity.py."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from tests.cli.test_sensitivity import HAND_MODEL

runner = CliRunner()


@pytest.fixture
def model_file(tmp_path):
    path = tmp_path / "hand.toml"
    path.write_text(HAND_MODEL)
    return path


def test_decision_tornado_is_printed_first_and_written(model_file, tmp_path):
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        ["sensitivity", str(model_file), "--grid", "5", "--region-map", "p", "--out", str(out),
         "--quiet"],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert result.stdout.index("Decision tornado") < result.stdout.index("One-way sensitivity")
    table = pd.read_csv(out / "decision_tornado.csv").set_index("parameter")
    # Net benefit at 1000 per QALY: keeping 'treat' at p = 0.01 loses
    # 1000 x (loss - p (1 - hr)) = 1000 x (0.05 - 0.006) = 44 (hand algebra).
    assert table.at["p", "loss_low"] == pytest.approx(44.0, abs=1e-8)
    assert table.at["p", "loss_qalys_at_bounds"] == pytest.approx(0.022, abs=1e-11)
    context = pd.read_csv(out / "thresholds_context.csv").set_index("parameter")
    assert context.at["p", "threshold"] == pytest.approx(0.05 / 0.6, abs=1e-8)
    assert context.at["p", "direction"] == "below"
    regions = pd.read_csv(out / "region_map.csv")
    assert set(regions["state"]) == {"sick"}
    for name in ("decision_tornado.svg", "region_map.svg"):
        assert (out / name).read_text().lstrip().startswith("<svg")


def test_unknown_region_map_parameter_is_a_clear_error(model_file):
    result = runner.invoke(app, ["sensitivity", str(model_file), "--region-map", "nope"])
    assert result.exit_code == 2
    assert "parameters.nope" in result.stderr
