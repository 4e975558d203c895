"""``caredecide sensitivity`` on a small hand-checkable synthetic model file."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app

runner = CliRunner()

# Synthetic: invented for this test. Two cycles, one decision that matters (cycle 0):
# gap = Q(wait) - Q(treat) = loss - p (1 - hr) (QALYs, no discounting, start-of-cycle
# counting), so treating is best when p (1 - hr) > loss; threshold p* = loss / (1 - hr).
HAND_MODEL = """
format = 2
title = "Synthetic: hand-checkable threshold model"
description = "Synthetic: invented for a test."

[settings]
cycle_years = 1.0
horizon_cycles = 2
start = "sick"
discount_outcomes = 0.0
discount_costs = 0.0
objective = "net_benefit"
willingness_to_pay = 1000.0
within_cycle = "start"

[[states]]
id = "sick"
qaly_weight = 1.0

[[states]]
id = "dead"
absorbing = true

[[actions]]
id = "wait"
allowed_in = "all"

[[actions]]
id = "treat"
allowed_in = ["sick"]
oneoff_qaly_loss = "loss"

[transitions.wait.sick]
dead = "p"
sick = "rest"

[transitions.treat.sick]
dead = "p * hr"
sick = "rest"

[parameters.p]
value = 0.1
low = 0.01
high = 0.2
source = "Synthetic: invented for a test"

[parameters.hr]
value = 0.4
low = 0.2
high = 0.9
source = "Synthetic: invented for a test"

[parameters.loss]
value = 0.05
low = 0.0
high = 0.1
source = "Synthetic: invented for a test"
"""


@pytest.fixture
def model_file(tmp_path):
    path = tmp_path / "hand.toml"
    path.write_text(HAND_MODEL)
    return path


def test_sensitivity_prints_ranking_and_thresholds_and_writes_files(model_file, tmp_path):
    out = tmp_path / "out"
    result = runner.invoke(
        app, ["sensitivity", str(model_file), "--two-way", "p", "hr", "--grid", "5",
              "--out", str(out)],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr
    assert "One-way sensitivity" in result.stdout
    assert "Decision thresholds" in result.stdout
    thresholds = pd.read_csv(out / "thresholds.csv").set_index("parameter")
    # p* = loss / (1 - hr) = 0.05 / 0.6
    assert thresholds.at["p", "threshold"] == pytest.approx(0.05 / 0.6, abs=1e-8)
    oneway = pd.read_csv(out / "oneway.csv")
    assert list(oneway["rank"]) == [1, 2, 3]
    for name in ("tornado.svg", "tornado.png", "twoway.svg", "twoway.png", "twoway.csv",
                 "policy_switches.csv", "threshold_willingness_to_pay.csv",
                 "threshold_discount_rate.csv"):  # fmt: skip
        assert (out / name).stat().st_size > 0, name
    assert (out / "tornado.svg").read_text().lstrip().startswith("<svg")


def test_sensitivity_on_a_subset_with_commas(model_file):
    result = runner.invoke(app, ["sensitivity", str(model_file), "-p", "p,loss", "--quiet"])
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr  # the caution stays, whatever --quiet says
    assert " hr " not in result.stdout.split("Decision thresholds")[0]


def test_sensitivity_unknown_parameter_is_a_clear_error(model_file):
    result = runner.invoke(app, ["sensitivity", str(model_file), "-p", "nope"])
    assert result.exit_code == 2
    assert "parameters.nope" in result.stderr and "unknown parameter 'nope'" in result.stderr


def test_sensitivity_prints_full_names_the_policy_changes_and_a_text_map(model_file):
    # CliRunner's stdout is a pipe (80 columns by default): names must still be whole.
    result = runner.invoke(
        app, ["sensitivity", str(model_file), "--two-way", "p", "hr", "--grid", "3", "--quiet"]
    )
    assert result.exit_code == 0, result.output
    out = result.stdout
    # base: p (1 - hr) = 0.06 > loss = 0.05 -> treat; p low 0.01 -> 0.006 < 0.05 -> wait
    assert "p: low: sick treat->wait at ages 0" in out
    assert "hr \\ p" in out  # the map's corner cell names both axes
    # grid 3 plus the base values: p in {0.01, 0.1, 0.105, 0.2}, hr in {0.2, 0.4, 0.55, 0.9};
    # treat iff p (1 - hr) > 0.05. First three columns (p = 0.01, 0.1, 0.105): at hr = 0.9
    # and 0.55 wait (at most 0.0473); at 0.2 treat from p = 0.1 (0.08); at the base row
    # hr = 0.4 treat from p = 0.1 (0.06), the base cell marked B. Letters follow first
    # appearance in the CSV order.
    cells = [line.split("│") for line in out.splitlines() if line.startswith("│")]
    rows = ("0.9", "0.55", "0.4", "0.2")
    map_rows = {c[1].strip(): c[2:5] for c in cells if c[1].strip() in rows}
    letters = {k: [c.strip().split()[0].rstrip("*") for c in v] for k, v in map_rows.items()}
    assert map_rows["0.4"][1].strip().endswith("B")
    legend = dict(line.strip().split(" = ") for line in out.splitlines()
                  if line.startswith("  ") and " = " in line)  # fmt: skip
    actions = {k: [legend[c] for c in row] for k, row in letters.items()}
    assert actions == {
        "0.9": ["wait", "wait", "wait"],
        "0.55": ["wait", "wait", "wait"],
        "0.4": ["wait", "treat", "treat"],
        "0.2": ["wait", "treat", "treat"],
    }


def test_sensitivity_two_way_of_one_parameter_twice_is_refused_before_the_run(model_file):
    result = runner.invoke(app, ["sensitivity", str(model_file), "--two-way", "p", "p"])
    assert result.exit_code == 2
    assert "--two-way: needs two different parameters, got 'p' twice" in result.stderr
    assert "hand.toml" in result.stderr
    assert "One-way" not in result.stdout  # nothing was computed


def test_sensitivity_two_way_unknown_parameter_is_refused(model_file):
    result = runner.invoke(app, ["sensitivity", str(model_file), "--two-way", "p", "nope"])
    assert result.exit_code == 2
    assert "parameters.nope: unknown parameter 'nope'" in result.stderr


def test_sensitivity_out_that_is_a_file_is_refused_before_the_run(model_file, tmp_path):
    target = tmp_path / "a_file"
    target.write_text("not a folder")
    result = runner.invoke(app, ["sensitivity", str(model_file), "--out", str(target)])
    assert result.exit_code == 2
    assert f"--out {target} is a file; expected a folder" in result.stderr
    assert "One-way" not in result.stdout
    blocked = target / "sub"
    result = runner.invoke(app, ["sensitivity", str(model_file), "--out", str(blocked)])
    assert result.exit_code == 2
    assert f"--out {blocked}: cannot write the results" in result.stderr


def test_sensitivity_wtp_max_on_a_qaly_model_is_noted(tmp_path):
    path = tmp_path / "qalys.toml"
    path.write_text(HAND_MODEL.replace('objective = "net_benefit"', 'objective = "qalys"'))
    result = runner.invoke(app, ["sensitivity", str(path), "--wtp-max", "50000", "-p", "p"])
    assert result.exit_code == 0, result.output
    assert "--wtp-max is used only with objective = 'net_benefit'" in result.stderr
    assert "Threshold: willingness to pay" not in result.stdout
    assert "Threshold: discount rate" in result.stdout  # finite horizon: still searched


def test_sensitivity_warns_when_a_threshold_search_runs_out_of_steps(model_file, monkeypatch):
    from caredecide.sensitivity import thresholds

    real = thresholds.brent_roots

    def one_step(*args, **kwargs):  # Brent's method cut to a single step
        return real(*args, **{**kwargs, "maxiter": 1})

    monkeypatch.setattr(thresholds, "brent_roots", one_step)
    # A rate row makes the gap non-linear in the parameter, so one step is not enough.
    text = HAND_MODEL.replace('dead = "p"', 'dead = "1 - exp(-p)"').replace(
        'dead = "p * hr"', 'dead = "(1 - exp(-p)) * hr"'
    )
    model_file.write_text(text)
    result = runner.invoke(app, ["sensitivity", str(model_file), "-p", "p"])
    assert result.exit_code == 0, result.output
    assert "threshold(s) in thresholds.csv did not converge" in result.stderr
