"""``caredecide compare``: table on stdout, caution on stderr, files written, clear errors."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cautions import CAUTION_SHORT
from caredecide.cli import app
from caredecide.cli.compare import (
    FRONTIER_FILE,
    FRONTIER_FULL_FILE,
    STATE_SWITCHES_FILE,
    SWITCHES_FILE,
    TABLE_FILE,
    TRACES_FOLDER,
    _money,
    _qalys,
    trace_file_name,
)
from caredecide.compare import compare_strategies
from synthetic_cohort import demo_model_path

runner = CliRunner()
DEMO = str(demo_model_path())


@pytest.fixture(scope="module")
def library():
    return compare_strategies(DEMO, wtp=25000.0, wtp_range=(10000.0, 40000.0))


def test_prints_the_table_and_the_caution():
    run = runner.invoke(app, ["compare", DEMO, "--quiet"])
    assert run.exit_code == 0, run.output
    assert CAUTION_SHORT in run.stderr  # always, even with --quiet
    assert "never treat" in run.stdout and "Best at 30,000 EUR per QALY:" in run.stdout
    assert "note:" not in run.stderr  # --quiet: no notes


def test_notes_go_to_stderr():
    run = runner.invoke(app, ["compare", DEMO])
    assert run.exit_code == 0, run.output
    assert "found beside the model" in run.stderr
    assert "note (treat at once): 'treat' is not allowed in stage_1_tx" in run.stderr


def test_out_writes_table_frontier_traces_and_charts(tmp_path, library):
    run = runner.invoke(
        app,
        [
            "compare",
            DEMO,
            "--wtp",
            "25000",
            "--wtp-range",
            "10000",
            "40000",
            "--out",
            str(tmp_path),
            "--quiet",
        ],
    )
    assert run.exit_code == 0, run.output
    table = pd.read_csv(tmp_path / TABLE_FILE, keep_default_na=False)
    assert list(table["strategy"]) == list(library.table["strategy"])
    pd.testing.assert_series_equal(table["cost"], library.table["cost"], rtol=1e-12)
    frontier = pd.read_csv(tmp_path / FRONTIER_FULL_FILE)
    pd.testing.assert_series_equal(frontier["wtp_from"], library.frontier["wtp_from"], rtol=1e-12)
    runs = pd.read_csv(tmp_path / FRONTIER_FILE)
    assert list(runs["policies"]) == list(library.frontier_collapsed["policies"])
    by_state = pd.read_csv(tmp_path / STATE_SWITCHES_FILE)
    assert len(by_state) == len(library.state_switches)
    assert len(pd.read_csv(tmp_path / SWITCHES_FILE)) == len(library.switches)
    names = list(dict.fromkeys(library.traces["strategy"]))
    for index, name in enumerate(names):
        trace = pd.read_csv(tmp_path / TRACES_FOLDER / trace_file_name(index, name))
        assert list(trace.columns) == ["cycle", "age", "state", "proportion"]
    for stem in ("ce_plane", "frontier", "switch_points_by_state"):
        assert (tmp_path / f"{stem}.svg").read_text(encoding="utf-8").lstrip().startswith("<svg")
        assert (tmp_path / f"{stem}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "Where each state's recommendation changes" in run.stdout
    # Axis titles carry the model's currency in brackets, as in the app.
    assert "Cost per person (discounted) (EUR)" in (tmp_path / "ce_plane.svg").read_text(
        encoding="utf-8"
    )
    assert "Willingness to pay per QALY (EUR)" in (tmp_path / "frontier.svg").read_text(
        encoding="utf-8"
    )


def test_strategies_option_reads_the_table(tmp_path):
    path = tmp_path / "plan.csv"
    path.write_text("state,action\nstage_3,treat\nstage_2,treat\n", encoding="utf-8")
    run = runner.invoke(app, ["compare", DEMO, "--strategies", str(path), "--quiet"])
    assert run.exit_code == 0, run.output
    assert "plan" in run.stdout


def test_bad_strategy_table_names_file_row_and_value(tmp_path):
    path = tmp_path / "plan.csv"
    path.write_text("state,action\nstage_9,treat\n", encoding="utf-8")
    run = runner.invoke(app, ["compare", DEMO, "--strategies", str(path)])
    assert run.exit_code == 2
    assert "plan.csv, line 2: row 1.state: unknown state 'stage_9'" in " ".join(run.stderr.split())


def test_bad_wtp_range_is_a_clear_error():
    run = runner.invoke(app, ["compare", DEMO, "--wtp-range", "500", "100"])
    assert run.exit_code == 2
    # The problem concerns this model: its file is named, not a placeholder.
    assert "demo_progressive.toml: wtp_range: range (500, 100) is not allowed" in " ".join(
        run.stderr.split()
    )


def test_trace_file_names_are_safe():
    assert trace_file_name(0, "optimal policy at WTP 30,000") == (
        "01_optimal-policy-at-wtp-30-000.csv"
    )
    assert trace_file_name(11, "!!!") == "12_strategy.csv"


def test_small_increments_are_never_printed_as_zero():
    # Two policies a few currency units and a few millionths of a QALY apart have a real
    # ICER: the printed increments must not read 0 and 0.0000 beside it.
    assert _money(0.12) == "0.12" and _money(-3.5) == "-3.50"
    assert _money(0.0) == "0" and _money(27116.4) == "27,116" and _money(float("nan")) == ""
    assert _qalys(2.09e-6) == "2.09e-06" and _qalys(-4e-5) == "-4.00e-05"
    assert _qalys(0.0) == "0.0000" and _qalys(0.5356) == "0.5356" and _qalys(float("nan")) == ""


def test_from_age_option_adds_the_age_strategy():
    run = runner.invoke(app, ["compare", DEMO, "--from-age", "70", "--from-age", "80", "--quiet"])
    assert run.exit_code == 0, run.output
    assert "treat from age 70" in run.stdout and "treat from age 80" in run.stdout


def test_from_age_on_an_infinite_horizon_is_a_clear_error():
    stationary = str(demo_model_path().with_name("teaching_stationary.toml"))
    run = runner.invoke(app, ["compare", stationary, "--from-age", "65"])
    assert run.exit_code == 2
    assert "age 65 given, but the model has an infinite horizon" in " ".join(run.stderr.split())


def test_no_optimal_and_a_reference_strategy():
    run = runner.invoke(
        app, ["compare", DEMO, "--no-optimal", "--reference", "never treat", "--quiet"]
    )
    assert run.exit_code == 0, run.output
    assert "optimal policy" not in run.stdout
    assert "ICER vs never treat" in run.stdout


def test_unknown_reference_is_a_clear_error():
    run = runner.invoke(app, ["compare", DEMO, "--reference", "nope"])
    assert run.exit_code == 2
    assert "reference" in run.stderr and "'nope'" in run.stderr
