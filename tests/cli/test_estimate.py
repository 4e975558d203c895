"""``caredecide estimate``: tables on stdout, caution and notes on stderr, model output."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cautions import caution_short
from caredecide.cli import app
from caredecide.estimation import estimate_counts, estimate_panel, load_records
from caredecide.modelfile import load_model
from synthetic_cohort import demo_model_path
from synthetic_cohort import generator as generator_module
from synthetic_cohort.generator import fully_observed_design, generate_cohort, progressive_rates

runner = CliRunner()
DATA = Path(generator_module.__file__).parent / "data"
VISITS, PATIENTS = str(DATA / "visits.csv"), str(DATA / "patients.csv")


def test_panel_table_and_caution():
    result = runner.invoke(app, ["estimate", VISITS, "--patients", PATIENTS])
    assert result.exit_code == 0, result.stderr
    assert "RESEARCH USE ONLY" in result.stderr
    assert "300 patients" in result.stdout
    assert "rate stage_1 -> stage_2" in result.stdout
    assert "hazard ratio on treatment" in result.stdout
    assert "Probabilities per 1-year cycle (treated)" in result.stdout


def test_panel_csv_equals_the_library_estimate():
    result = runner.invoke(
        app, ["estimate", VISITS, "--patients", PATIENTS, "--csv", "--no-treatment-effect"]
    )
    assert result.exit_code == 0, result.stderr
    printed = pd.read_csv(io.StringIO(result.stdout))
    expected = estimate_panel(load_records(VISITS, PATIENTS), treatment_effect=False).table()
    assert list(printed["parameter"]) == list(expected["parameter"])
    np.testing.assert_allclose(printed["estimate"], expected["estimate"], rtol=1e-12)
    np.testing.assert_allclose(printed["se_log"], expected["se_log"], rtol=1e-12)


def test_counts_csv_on_regular_visits(tmp_path):
    patients, visits = generate_cohort(
        fully_observed_design(
            progressive_rates([0.3, 0.2], [0.05, 0.1, 0.2]), (0.5, 0.3, 0.2), follow_up_years=3
        ),
        n_patients=200,
        seed=1,
    )
    visits.to_csv(tmp_path / "visits.csv", index=False)
    patients.to_csv(tmp_path / "patients.csv", index=False)
    result = runner.invoke(
        app,
        [
            "estimate",
            str(tmp_path / "visits.csv"),
            "--patients",
            str(tmp_path / "patients.csv"),
            "--method",
            "counts",
            "--csv",
        ],
    )
    assert result.exit_code == 0, result.stderr
    printed = pd.read_csv(io.StringIO(result.stdout))
    (counts,) = estimate_counts(load_records(tmp_path / "visits.csv", tmp_path / "patients.csv"))
    expected = counts.table()
    np.testing.assert_allclose(printed["probability"], expected["probability"])
    np.testing.assert_array_equal(printed["count"], expected["count"])


def test_counts_on_irregular_visits_notes_the_skipped_intervals():
    result = runner.invoke(app, ["estimate", VISITS, "--patients", PATIENTS, "--method", "counts"])
    assert result.exit_code == 0, result.stderr
    assert "were left out; use --method panel" in result.stderr
    assert "Transition probabilities per cycle (counts)" in result.stdout


def test_out_writes_parameter_tables(tmp_path):
    out = tmp_path / "estimates.toml"
    result = runner.invoke(
        app, ["estimate", VISITS, "--patients", PATIENTS, "--out", str(out), "--prefix", "c_"]
    )
    assert result.exit_code == 0, result.stderr
    text = out.read_text()
    assert "[parameters.c_rate_stage_1_stage_2]" in text
    assert "[parameters.c_hr_treatment]" in text
    assert "300 patients, 1482 observed intervals" in text
    # Running again replaces the tables file written before.
    again = runner.invoke(app, ["estimate", VISITS, "--patients", PATIENTS, "--out", str(out)])
    assert again.exit_code == 0, again.stderr
    assert "[parameters.rate_stage_1_stage_2]" in out.read_text()


def test_merge_into_a_model_file(tmp_path):
    out = tmp_path / "model.toml"
    result = runner.invoke(
        app,
        [
            "estimate",
            VISITS,
            "--patients",
            PATIENTS,
            "--model",
            str(demo_model_path()),
            "--out",
            str(out),
            "--prefix",
            "cohort_",
        ],
    )
    assert result.exit_code == 0, result.stderr
    model = load_model(out)
    rate = model.parameters["cohort_rate_stage_2_stage_3"]
    assert rate.kind == "rate" and "visits.csv" in rate.source and "panel" in rate.source
    assert set(load_model(demo_model_path()).parameters) < set(model.parameters)


def test_model_without_out_is_an_error():
    result = runner.invoke(app, ["estimate", VISITS, "--model", str(demo_model_path())])
    assert result.exit_code == 2
    assert "--model needs --out" in result.stderr


@pytest.mark.parametrize(
    ("content", "expected"),
    [
        ("patient_id,years_since_entry\nSYN-1,0\n", "missing column(s) ['stage']"),
        (
            "patient_id,years_since_entry,stage\nSYN-1,-1,stage_1\n",
            "row 2, column years_since_entry",
        ),
    ],
)
def test_bad_visits_file_exits_with_a_clear_error(tmp_path, content, expected):
    path = tmp_path / "bad_visits.csv"
    path.write_text(content)
    result = runner.invoke(app, ["estimate", str(path)])
    assert result.exit_code == 2
    assert "bad_visits.csv" in result.stderr
    assert expected in result.stderr


def test_missing_file_exits_with_its_name():
    result = runner.invoke(app, ["estimate", "no_such_visits.csv"])
    assert result.exit_code == 2
    assert "no_such_visits.csv" in result.stderr


def test_quiet_prints_only_the_results():
    result = runner.invoke(app, ["estimate", VISITS, "--patients", PATIENTS, "--csv", "-q"])
    assert result.exit_code == 0
    # --quiet leaves only the caution on stderr: it is shown by every command, always.
    assert result.stderr.strip() == caution_short(VISITS)  # bundled records: demo note
    assert result.stdout.startswith("parameter,estimate,se_log,low,high")


def test_bad_prefix_is_refused_before_fitting(tmp_path):
    out = tmp_path / "estimates.toml"
    result = runner.invoke(
        app, ["estimate", VISITS, "--patients", PATIENTS, "--prefix", "my-", "--out", str(out)]
    )
    assert result.exit_code == 2
    assert "prefix: value 'my-'; expected letters, digits and _" in result.stderr
    assert "fitting" not in result.stderr and not out.exists()


def test_out_in_a_missing_folder_is_an_error(tmp_path):
    out = tmp_path / "no_such_folder" / "estimates.toml"
    result = runner.invoke(app, ["estimate", VISITS, "--out", str(out)])
    assert result.exit_code == 2
    assert f"folder {out.parent} does not exist" in " ".join(result.stderr.split())
