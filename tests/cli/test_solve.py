"""``caredecide solve``: table, CSV and JSON output, files written, errors."""

from __future__ import annotations

import hashlib
import io
import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import demo_model_path

runner = CliRunner()
DEMO = str(demo_model_path())


@pytest.fixture(scope="module")
def library_run():
    model = load_model(DEMO)
    compiled = compile_model(model)
    objective = Objective.from_settings(model.settings)
    result = solve(compiled, objective)
    return result, evaluate_policy(compiled, result.policy, objective)


def test_writes_policy_trace_and_summary(tmp_path, library_run):
    result, outcome = library_run
    run = runner.invoke(app, ["solve", DEMO, "--out", str(tmp_path), "--quiet"])
    assert run.exit_code == 0, run.output
    assert "RESEARCH USE ONLY" in run.stderr  # the caution, even with --quiet
    policy = pd.read_csv(tmp_path / "policy.csv", keep_default_na=False)
    assert list(policy.columns) == [
        "cycle",
        "age",
        "state",
        "action",
        "value",
        "next_best_action",
        "action_gap",
    ]
    expected = result.to_frame()
    assert policy.action.tolist() == expected.action.tolist()
    np.testing.assert_allclose(policy.value, expected.value, rtol=1e-12)
    trace = pd.read_csv(tmp_path / "trace.csv")
    assert list(trace.columns) == ["cycle", "age", "state", "proportion"]
    np.testing.assert_allclose(trace.groupby("cycle").proportion.sum(), 1.0, rtol=1e-9)
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["model_sha256"] == hashlib.sha256(open(DEMO, "rb").read()).hexdigest()
    assert summary["solver"]["method"] == "backward_induction"
    assert summary["solver"]["sweeps"] == result.iterations
    assert summary["totals"]["net_monetary_benefit"] == pytest.approx(
        outcome.net_monetary_benefit[0], rel=1e-12
    )
    assert summary["objective"]["willingness_to_pay"] == 30000.0
    assert summary["package_version"]
    assert "RESEARCH USE ONLY" in summary["caution"]


def test_table_output_shows_policy_bands_and_totals():
    run = runner.invoke(app, ["solve", DEMO])
    assert run.exit_code == 0, run.output
    assert "Optimal policy" in run.stdout and "stage_2" in run.stdout
    assert "net monetary benefit" in run.stdout
    assert "Structure:" in run.stdout
    assert "RESEARCH USE ONLY" in run.stderr


def test_wtp_zero_means_never_pay_for_treatment():
    # At a willingness to pay of 0 net benefit is minus costs: treatment only adds costs
    # in the synthetic demo, so waiting is optimal everywhere.
    run = runner.invoke(app, ["solve", DEMO, "--wtp", "0", "--format", "json"])
    assert run.exit_code == 0, run.output
    summary = json.loads(run.stdout)
    assert summary["structure"] == "wait in every state"
    assert summary["objective"]["willingness_to_pay"] == 0.0


def test_csv_output_matches_the_library(library_run):
    result, _ = library_run
    run = runner.invoke(app, ["solve", DEMO, "--format", "csv", "--quiet"])
    assert run.exit_code == 0, run.output
    frame = pd.read_csv(io.StringIO(run.stdout), keep_default_na=False)
    assert frame.action.tolist() == result.to_frame().action.tolist()


def test_missing_file_error():
    run = runner.invoke(app, ["solve", "no_such_model.toml"])
    assert run.exit_code == 2
    assert "no_such_model.toml: file not found; expected a model file" in run.stderr


def test_method_that_does_not_fit_the_horizon_error():
    run = runner.invoke(app, ["solve", DEMO, "--method", "value_iteration"])
    assert run.exit_code == 2
    assert "demo_progressive.toml: method 'value_iteration' is for an infinite horizon" in (
        run.stderr
    )


def test_broken_model_file_error(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("format = 1\n[settings\n", encoding="utf-8")
    run = runner.invoke(app, ["solve", str(bad)])
    assert run.exit_code == 2
    assert "bad.toml" in run.stderr


def test_negative_wtp_rejected():
    run = runner.invoke(app, ["solve", DEMO, "--wtp", "-1"])
    assert run.exit_code != 0


def test_infinite_wtp_error_names_the_option():
    run = runner.invoke(app, ["solve", DEMO, "--wtp", "inf"])
    assert run.exit_code == 2
    assert "--wtp: willingness_to_pay = inf is not allowed; expected a finite number >= 0" in (
        run.stderr
    )


def test_unwritable_out_folder_error(tmp_path):
    blocked = tmp_path / "a_file"
    blocked.write_text("not a folder", encoding="utf-8")
    run = runner.invoke(app, ["solve", DEMO, "--out", str(blocked / "results")])
    assert run.exit_code == 2
    assert f"--out {blocked / 'results'}: cannot write the results" in run.stderr


def test_wtp_with_a_qaly_objective_is_noted(tmp_path):
    # A QALY objective ignores costs: --wtp changes the reported net benefit, not the policy.
    text = demo_model_path().read_text(encoding="utf-8")
    assert 'objective = "net_benefit"' in text
    qaly_model = tmp_path / "qaly.toml"
    qaly_model.write_text(
        text.replace('objective = "net_benefit"', 'objective = "qalys"'), encoding="utf-8"
    )
    low = runner.invoke(app, ["solve", str(qaly_model), "--wtp", "0", "--format", "json"])
    high = runner.invoke(app, ["solve", str(qaly_model), "--wtp", "90000", "--format", "json"])
    assert low.exit_code == high.exit_code == 0, low.output
    assert "maximises QALYs; --wtp 90000 sets only the reported net monetary benefit" in (
        high.stderr
    )
    low_summary, high_summary = json.loads(low.stdout), json.loads(high.stdout)
    assert low_summary["structure"] == high_summary["structure"]
    totals = high_summary["totals"]
    assert totals["net_monetary_benefit"] == pytest.approx(
        90000 * totals["qalys"] - totals["costs"], rel=1e-12
    )
