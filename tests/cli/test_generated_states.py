"""CLI on a model with attributes and a tunnel: `check` lists the generated states, `solve --out`
writes where each comes from."""

from __future__ import annotations

import pandas as pd
from typer.testing import CliRunner

from caredecide.cli import app
from tests.test_expand import _tunnel_model

runner = CliRunner()


def test_trace_and_policy_csv_say_where_each_generated_state_comes_from(tmp_path):
    path = tmp_path / "tunnel.toml"
    path.write_text(_tunnel_model(start="sick__untreated", enter="0.5", die="0"), "utf-8")
    run = runner.invoke(app, ["solve", str(path), "--out", str(tmp_path / "out"), "--quiet"])
    assert run.exit_code == 0, run.output
    trace = pd.read_csv(tmp_path / "out" / "trace.csv", keep_default_na=False, dtype=str)
    assert list(trace.columns) == [
        "cycle",
        "age",
        "state",
        "proportion",
        "declared_state",
        "on_treatment",
        "years_on_drug",
    ]
    first = trace[trace["cycle"] == "0"]
    assert first["years_on_drug"].tolist() == ["", "0", "1", "2+", ""]
    assert first["declared_state"].tolist() == ["sick"] * 4 + ["dead"]
    # Hand-derived (see tests/test_expand.py): at cycle 3 half the cohort is at step 2+.
    at_3 = trace[trace["cycle"] == "3"].set_index("state")["proportion"].astype(float)
    assert at_3["sick__treated__years_on_drug_2plus"] == 0.5
    policy = pd.read_csv(tmp_path / "out" / "policy.csv", keep_default_na=False)
    assert {"declared_state", "on_treatment", "years_on_drug"} <= set(policy.columns)


def test_check_lists_the_generated_states_with_their_actions(tmp_path):
    path = tmp_path / "tunnel.toml"
    path.write_text(_tunnel_model(start="sick__untreated", enter="0.5", die="0"), "utf-8")
    run = runner.invoke(app, ["check", str(path)], env={"COLUMNS": "200"})
    assert run.exit_code == 0, run.output
    assert "Generated states (5, from attributes and tunnels)" in run.stdout
    assert "Sick, treated, years on drug 2+" in run.stdout
    assert "sick__treated__years_on_drug_0" in run.stdout
