"""Format 2 names: the previous format loads with a warning and is rewritten by
``caredecide check --upgrade``; no old name is left anywhere but the upgrade table."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.errors import ExpressionError, ModelError
from caredecide.expressions import FUNCTIONS, parse_expression
from caredecide.model import FORMAT_VERSION
from caredecide.modelfile import load_model, loads_model, validate_model
from caredecide.upgrade import PREVIOUS_FORMAT_VERSION, RENAMED_FUNCTIONS, upgrade_text

ROOT = Path(__file__).resolve().parents[1]
runner = CliRunner()

# A format-1 file using every renamed function, with comments in every place a comment
# can go (own line, end of line, inside a table, after the last key).
PREVIOUS = """\
# SYNTHETIC: a file of the previous format, invented for this test.
format = 1   # the previous format
title = "Upgrade check"

[settings]
cycle_years = 1.0
horizon_cycles = 5
start = "well"

[[states]]
id = "well"
qaly_weight = 0.9
cost = 100

[[states]]
id = "dead"
absorbing = true
alive = false

[[actions]]
id = "wait"

[rates.wait.well]
# the rate behind a 5-year probability
dead = "prob_to_rate(p_die_5y, 5)"   # keep this comment
# a label-like parameter that only contains an old name is not touched
[transitions.wait.dead]
dead = 1

[parameters.p_die_5y]
value = 0.2
kind = "probability"
per_years = 5
source = "invented for the test"

[parameters.my_prob_to_rate_note]
value = 0.1
source = "invented; name contains an old function name but is not a call"
kind = "rate"
note = "used as chance_within: rate_to_prob (my_prob_to_rate_note, 1)"

[parameters.r_check]
value = 0.1
kind = "rate"
source = "invented"
note = "surv_to_rate(0.5, 5) and median_to_rate(5) appear in a note"
# trailing comment
"""

OLD_NAMES = (
    *RENAMED_FUNCTIONS,
    "probability_to_rate",
    "rate_to_probability",
    "rescale_probability",
    "survival_to_rate",
    "median_survival_to_rate",
    "apply_relative_risk",
    "apply_hazard_ratio",
    "apply_odds_ratio",
    "run_psa",
)


def test_format_version_bumped():
    # The renames are a format change (common practice: a format version per incompatible change).
    assert (PREVIOUS_FORMAT_VERSION, FORMAT_VERSION) == (1, 2)
    assert set(RENAMED_FUNCTIONS.values()) <= set(FUNCTIONS)
    assert not set(RENAMED_FUNCTIONS) & set(FUNCTIONS)


def test_previous_format_loads_with_a_warning_naming_each_rename():
    model = loads_model(PREVIOUS, validate=False)
    assert model.format_version == PREVIOUS_FORMAT_VERSION
    assert model.rates["wait"]["well"]["dead"] == "rate_behind(p_die_5y, 5)"
    warnings = validate_model(model)
    first = warnings[0]
    assert first.where == "format"
    for old, new in RENAMED_FUNCTIONS.items():
        assert f"{old} -> {new}" in first.message
    assert "caredecide check --upgrade" in first.message


def test_current_format_has_no_format_warning():
    text, _ = upgrade_text(PREVIOUS)
    model = loads_model(text)
    assert all(w.where != "format" for w in validate_model(model))


def test_old_function_in_current_format_names_the_new_one():
    with pytest.raises(ExpressionError) as caught:
        parse_expression("prob_to_rate(p, 1)", where="rates.wait.well.dead")
    message = str(caught.value)
    assert "rates.wait.well.dead" in message
    assert "prob_to_rate was renamed rate_behind in model file format 2" in message


def test_upgrade_text_renames_calls_and_keeps_comments():
    upgraded, replacements = upgrade_text(PREVIOUS)
    # Every comment line survives unchanged.
    comments = [
        line for line in PREVIOUS.splitlines() if "#" in line and "prob_to_rate" not in line
    ]
    for line in comments:
        if line.startswith("format"):
            continue
        assert line in upgraded.splitlines()
    assert 'dead = "rate_behind(p_die_5y, 5)"   # keep this comment' in upgraded
    assert "format = 2   # the previous format" in upgraded
    # The parameter that merely contains an old name is kept; calls in notes are renamed.
    assert "[parameters.my_prob_to_rate_note]" in upgraded
    assert "rate_behind_survival(0.5, 5) and rate_behind_median(5)" in upgraded
    assert "rate_to_prob (my_prob_to_rate_note, 1)" not in upgraded
    assert [(r.line, r.old, r.new) for r in replacements] == [
        (25, "prob_to_rate", "rate_behind"),
        (40, "rate_to_prob", "chance_within"),
        (46, "surv_to_rate", "rate_behind_survival"),
        (46, "median_to_rate", "rate_behind_median"),
    ]
    assert tomllib.loads(upgraded)["format"] == 2


def test_upgrade_refuses_current_and_unknown_formats():
    upgraded, _ = upgrade_text(PREVIOUS)
    with pytest.raises(ModelError, match="format: is already 2; nothing to upgrade"):
        upgrade_text(upgraded, file="m.toml")
    with pytest.raises(ModelError, match="format: is 7; expected format = 1"):
        upgrade_text(PREVIOUS.replace("format = 1", "format = 7"), file="m.toml")
    with pytest.raises(ModelError, match="TOML syntax error"):
        upgrade_text("format = = 1", file="m.toml")


def test_check_upgrade_command_rewrites_the_file(tmp_path):
    path = tmp_path / "previous.toml"
    path.write_text(PREVIOUS, encoding="utf-8")
    run = runner.invoke(app, ["check", str(path), "--upgrade", "--quiet"])
    assert run.exit_code == 0, run.output
    assert "line 25: prob_to_rate -> rate_behind" in run.stderr
    assert "is now format 2" in run.stderr
    text = path.read_text(encoding="utf-8")
    assert "# the rate behind a 5-year probability" in text
    assert "# trailing comment" in text
    model = load_model(path)
    assert model.format_version == 2
    # The upgraded model is the same model: one value computed both ways.
    before = loads_model(PREVIOUS, validate=False)
    assert model.rates == before.rates
    # A second upgrade is refused with a clear message, and the file is left alone.
    again = runner.invoke(app, ["check", str(path), "--upgrade", "--quiet"])
    assert again.exit_code == 2
    assert "nothing to upgrade" in again.stderr
    assert path.read_text(encoding="utf-8") == text


def _project_files() -> list[Path]:
    roots = ["caredecide", "ui", "docs", "synthetic_cohort", "benchmarks", "tests"]
    files = [ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    for root in roots:
        for suffix in ("*.py", "*.md", "*.toml"):
            files += sorted((ROOT / root).rglob(suffix))
    # The upgrade table and this test name the old functions on purpose.
    exempt = {ROOT / "caredecide" / "upgrade.py", Path(__file__).resolve()}
    return [f for f in files if f.is_file() and f not in exempt]


def test_no_old_name_left_outside_the_upgrade_table():
    pattern = re.compile(r"(" + "|".join(OLD_NAMES) + r")")
    found = []
    for path in _project_files():
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if pattern.search(line):
                found.append(f"{path.relative_to(ROOT)}:{number}: {line.strip()}")
    assert not found, "\n".join(found)


def test_upgrade_lists_what_to_review_where_format_2_reads_cycle_differently(tmp_path):
    # A cost by cycle in a format-1 file was read at cycle boundaries; the upgrade says so
    # before the format-1 warning disappears with the new format line.
    path = tmp_path / "by_cycle.toml"
    text = PREVIOUS.replace("cost = 100\n", 'cost = "when(cycle < 2, 100, 0)"\n', 1)
    text = text.replace('start = "well"\n', 'start = "well"\nwithin_cycle = "trapezoid"\n', 1)
    path.write_text(text, encoding="utf-8")
    run = runner.invoke(app, ["check", str(path), "--upgrade", "--quiet"])
    assert run.exit_code == 0, run.output
    review = [line for line in run.stderr.splitlines() if line.startswith("review:")]
    assert any("states.well.cost" in line and "format 1 read" in line for line in review)
