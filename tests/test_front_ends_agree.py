"""The command line, the report and the app show the same figures for the same model.

Every front end calls the analysis layer (:mod:`caredecide.analysis`) and only displays
its result objects, so the numbers must be identical, not merely close. The model has a
willingness to pay of 0 with the net-benefit objective: the one rule of the library
(:func:`caredecide.analysis.willingness_to_pay_search`) searches the willingness-to-pay
threshold over [0, 100,000] in every front end (before it, the command line printed an
empty table, the report skipped the search and the app searched [0, 1]).
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
import streamlit as st
import tomli_w
from streamlit.testing.v1 import AppTest
from typer.testing import CliRunner

from caredecide.analysis import (
    analyse_base_case,
    analyse_strategies,
    analyse_uncertainty,
    analyse_verification,
    willingness_to_pay_search,
)
from caredecide.cli import app as cli
from caredecide.limits import WTP_SEARCH_MAX_WHEN_ZERO
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.report.analyses import run_analyses
from caredecide.sensitivity import summarise_thresholds
from tests.conftest import small_model_dict
from tests.ui.conftest import APP

runner = CliRunner()
TOTALS = ("life_years", "qalys", "costs", "net_monetary_benefit", "value")


@pytest.fixture(scope="module")
def model_path(tmp_path_factory):
    data = small_model_dict()
    data["settings"]["willingness_to_pay"] = 0.0
    data["scenarios"] = {
        "costs_at_six": {"label": "Costs at 6%", "settings": {"discount_costs": 0.06}},
        "cheap_drug": {"label": "Drug at 100", "parameters": {"c_drug": {"value": 100.0}}},
    }
    path = tmp_path_factory.mktemp("agree") / "zero_wtp.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def report(model_path):
    return run_analyses(model_path)


@pytest.fixture
def app_test(model_path, tmp_path, monkeypatch):
    monkeypatch.setenv("CAREDECIDE_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("CAREDECIDE_MODEL", str(model_path))
    st.cache_data.clear()
    at = AppTest.from_file(APP, default_timeout=300)
    at.run()
    assert not at.exception, at.exception
    yield at
    st.cache_data.clear()


def _shown(at: AppTest, column: str) -> pd.DataFrame:
    """The one table of the view that has ``column`` (AppTest tables carry no key)."""
    frames = [d.value for d in at.dataframe if column in d.value.columns]
    assert len(frames) == 1, f"{len(frames)} tables with a {column!r} column in the view"
    return frames[0]


def test_the_rule_searches_from_zero_when_willingness_to_pay_is_zero():
    assert willingness_to_pay_search(Objective("net_benefit", 0.0)) == (
        0.0,
        WTP_SEARCH_MAX_WHEN_ZERO,
    )
    assert willingness_to_pay_search(Objective("net_benefit", 30000.0)) == (0.0, 60000.0)
    assert willingness_to_pay_search(Objective("qalys", 30000.0)) is None


def test_base_case_totals_identical(model_path, report):
    from ui import working_model

    result = runner.invoke(cli, ["solve", str(model_path), "--format", "json", "--quiet"])
    assert result.exit_code == 0, result.output
    from_cli = json.loads(result.stdout)["totals"]
    from_report = report.results["totals"].iloc[0].to_dict()
    model = load_model(model_path)
    solved = working_model.solve_model(
        model_path.read_text(encoding="utf-8"),
        str(model_path),
        str(model_path.parent),
        model.settings.objective,
        model.settings.willingness_to_pay,
    )
    from_app = solved.totals.iloc[0].to_dict()
    library = analyse_base_case(model).totals
    for name in TOTALS:
        assert from_cli[name] == from_report[name] == from_app[name] == library[name], name


def test_willingness_to_pay_thresholds_identical_at_zero(model_path, report, tmp_path, app_test):
    out = tmp_path / "out"
    result = runner.invoke(cli, ["sensitivity", str(model_path), "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    from_cli = summarise_thresholds(pd.read_csv(out / "threshold_willingness_to_pay.csv"))
    from_report = report.results["threshold_willingness_to_pay"]
    app_test.switch_page("views/sensitivity.py").run()
    assert not app_test.exception, app_test.exception
    shown = _shown(app_test, "setting")  # the settings' thresholds
    from_app = shown[shown["setting"] == "willingness_to_pay"].reset_index(drop=True)
    # A switch is found in [0, 100,000] (the treatment is worth its cost at some WTP).
    assert len(from_report) >= 1
    assert from_report["threshold_min"].between(0.0, WTP_SEARCH_MAX_WHEN_ZERO).all()
    for frame in (from_cli, from_app):
        assert list(frame["state"]) == list(from_report["state"])
        for column in ("threshold_min", "threshold_max"):
            assert frame[column].tolist() == from_report[column].tolist(), column


def test_scenario_tables_identical(model_path, report, app_test):
    result = runner.invoke(cli, ["scenarios", str(model_path), "--format", "json", "--quiet"])
    assert result.exit_code == 0, result.output
    from_cli = pd.DataFrame(json.loads(result.stdout)["scenarios"])
    from_report = report.results["scenarios"]
    app_test.switch_page("views/scenarios.py").run()
    assert not app_test.exception, app_test.exception
    from_app = _shown(app_test, "icer_vs_base_policy")
    assert list(from_cli["scenario"]) == ["base case", "costs_at_six", "cheap_drug"]
    for frame in (from_cli, from_app):
        assert list(frame["scenario"]) == list(from_report["scenario"])
        assert list(frame["policy"]) == list(from_report["policy"])
        for column in ("qalys", "costs", "net_monetary_benefit", "icer_vs_base_policy"):
            assert frame[column].astype(float).tolist() == pytest.approx(
                from_report[column].astype(float).tolist(), rel=0, abs=0, nan_ok=True
            ), column


# ----------------------------------------------------------------------------- strategies
STRATEGY_NUMBERS = ("cost", "qalys", "incremental_cost", "incremental_qalys", "icer")


def _same_numbers(frame: pd.DataFrame, expected: pd.DataFrame, columns) -> None:
    for column in columns:
        assert frame[column].astype(float).tolist() == pytest.approx(
            expected[column].astype(float).tolist(), rel=0, abs=0, nan_ok=True
        ), column


def test_strategy_tables_identical(model_path, report, tmp_path, app_test):
    # Incremental analysis by strong and extended dominance (Cantor 1994) and net monetary
    # benefit at the model's willingness to pay: one table from caredecide.analysis.
    out = tmp_path / "compare"
    result = runner.invoke(cli, ["compare", str(model_path), "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    from_cli = pd.read_csv(out / "strategies.csv")
    from_report = report.results["strategies"]
    app_test.switch_page("views/strategies.py").run()
    assert not app_test.exception, app_test.exception
    comparison = analyse_strategies(load_model(model_path))
    library = comparison.table
    # The app names the effect columns by the effect shown (e.g. QALYs): named back here.
    shown = _shown(app_test, "best_at_wtp")
    from_app = shown.rename(
        columns={c.replace("qalys", comparison.effect_label): c for c in STRATEGY_NUMBERS}
    )
    assert len(from_report) >= 3  # the optimal policy and at least two built-in strategies
    for frame in (from_cli, from_report, from_app):
        assert list(frame["strategy"]) == list(library["strategy"])
        assert list(frame["status"]) == list(library["status"])
        _same_numbers(frame, library, (*STRATEGY_NUMBERS, "net_monetary_benefit"))
    # At a willingness to pay of 0 the net monetary benefit is minus the cost (common practice).
    assert from_report["net_monetary_benefit"].tolist() == (-from_report["cost"]).tolist()


# ----------------------------------------------------------------------------- verification
def test_verification_tables_identical(model_path, report, tmp_path, app_test):
    csv = tmp_path / "verify.csv"
    result = runner.invoke(cli, ["verify", str(model_path), "--csv", str(csv)])
    assert result.exit_code in (0, 1), result.output
    from_cli = pd.read_csv(csv, keep_default_na=False)
    from_report = report.results["verification"]
    app_test.switch_page("views/report.py").run()
    app_test.button(key="report_prepare").click().run()
    assert not app_test.exception, app_test.exception
    from_app = _shown(app_test, "figures")
    library = analyse_verification(load_model(model_path)).to_frame()
    assert len(library) >= 5
    for frame in (from_cli, from_report, from_app):
        for column in ("title", "status", "figures"):
            assert frame[column].astype(str).tolist() == library[column].astype(str).tolist()


# ----------------------------------------------------------------------------- uncertainty
DRAWS, SEED = 40, 11


@pytest.fixture(scope="module")
def uncertain_path(tmp_path_factory):
    from tests.test_psa import uncertain_model_dict

    path = tmp_path_factory.mktemp("agree_psa") / "uncertain.toml"
    path.write_text(tomli_w.dumps(uncertain_model_dict()), encoding="utf-8")
    return path


def test_uncertainty_identical(uncertain_path, tmp_path, monkeypatch):
    out = tmp_path / "psa"
    result = runner.invoke(
        cli,
        [
            "uncertainty",
            str(uncertain_path),
            "--draws",
            str(DRAWS),
            "--seed",
            str(SEED),
            "--out",
            str(out),
            "--quiet",
        ],
    )
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    report = run_analyses(uncertain_path, draws=DRAWS, seed=SEED)
    library = analyse_uncertainty(load_model(uncertain_path), DRAWS, SEED)
    evpi = library.evpi()
    assert evpi["evpi"] >= 0.0  # EVPI is never negative (Claxton 1999)
    # Command line and report: the same EVPI, acceptability and acceptability curves.
    for name in ("evpi", "mc_se", "evpi_among_candidates"):
        assert summary[name] == report.results["psa_evpi"][name].iloc[0] == evpi[name], name
    by_band = pd.read_csv(out / "acceptability_by_age_band.csv")
    _same_numbers(by_band, report.results["psa_acceptability"], ("share", "mc_se"))
    _same_numbers(by_band, library.acceptability_by_age_band(), ("share", "mc_se"))
    curves = pd.read_csv(out / "acceptability_curves.csv")
    expected_curves = library.acceptability_curves()
    numeric = [c for c in expected_curves.columns if expected_curves[c].dtype.kind == "f"]
    assert numeric
    _same_numbers(curves, report.results["psa_acceptability_curves"], numeric)
    _same_numbers(curves, expected_curves, numeric)
    # The app on the same model, draws and seed.
    monkeypatch.setenv("CAREDECIDE_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("CAREDECIDE_MODEL", str(uncertain_path))
    st.cache_data.clear()
    try:
        at = AppTest.from_file(APP, default_timeout=300)
        at.run()
        at.switch_page("views/uncertainty.py").run()
        at.number_input(key="uncertainty_draws").set_value(DRAWS).run()
        at.number_input(key="uncertainty_seed").set_value(SEED).run()
        assert not at.exception, at.exception
        # The acceptability of one action is shown first, the same one everywhere: the
        # first action after the model's first (common practice: the treatment).
        assert library.shown_action == library.action_ids[1]
        assert at.selectbox(key="uncertainty_action").value == library.shown_action
        assert report.facts["psa_shown_action"] == library.shown_action
        shown = {m.label: m.value for m in at.metric}
        label = next(k for k in shown if k.startswith("EVPI"))
        assert shown[label] == f"{evpi['evpi']:,.2f}"
        by_cycle = pd.read_csv(out / "acceptability_by_cycle.csv")
        _same_numbers(_shown(at, "share"), by_cycle, ("share", "mc_se"))
    finally:
        st.cache_data.clear()
