"""``caredecide rerun``: a recorded run is reproduced; a changed model is detected."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from caredecide.cli import app

runner = CliRunner()
BASE = Path(__file__).parents[1] / "data" / "broken_models" / "base_small.toml"


@pytest.fixture
def recorded(tmp_path):
    model = tmp_path / "model.toml"
    shutil.copy(BASE, model)
    run = runner.invoke(
        app,
        [
            "report",
            str(model),
            "--out",
            str(tmp_path / "r.html"),
            "--draws",
            "20",
            "--seed",
            "3",
            "--quiet",
        ],
    )
    assert run.exit_code == 0, run.output
    return model, tmp_path / "r.run.json"


def test_rerun_reproduces_and_exits_zero(recorded, tmp_path):
    _, record = recorded
    run = runner.invoke(app, ["rerun", str(record), "--out", str(tmp_path / "again"), "--quiet"])
    assert run.exit_code == 0, run.output
    assert (
        "Reproduced: the model file, its input files and every output match the record."
    ) in run.stdout
    assert "RESEARCH USE ONLY" in run.stderr
    again = sorted(p.name for p in (tmp_path / "again").iterdir())
    assert again == sorted(p.name for p in (tmp_path / "r_tables").iterdir())
    for name in again:  # byte-identical result tables
        assert (tmp_path / "again" / name).read_bytes() == (
            tmp_path / "r_tables" / name
        ).read_bytes()


def test_rerun_detects_a_changed_model(recorded):
    model, record = recorded
    model.write_text(
        model.read_text(encoding="utf-8").replace("cost = 2000.0", "cost = 2500.0"),
        encoding="utf-8",
    )
    run = runner.invoke(app, ["rerun", str(record), "--quiet"])
    assert run.exit_code == 1
    assert "The model file has changed since the run was recorded." in run.stdout
    assert "DIFFERS - output totals.csv" in run.stdout


def test_unreadable_record_is_a_clear_error(tmp_path):
    record = tmp_path / "r.run.json"
    record.write_text("not json", encoding="utf-8")
    run = runner.invoke(app, ["rerun", str(record)])
    assert run.exit_code == 2
    assert "r.run.json: not a JSON run record" in run.stderr


def test_rerun_with_the_model_sent_alongside_the_record(recorded, tmp_path):
    # A reviewer receives the record and the model in a folder of their own.
    model, record = recorded
    inbox = tmp_path / "inbox" / "deeper"
    inbox.mkdir(parents=True)
    shutil.copy(record, inbox / record.name)
    shutil.copy(model, inbox / "sent.toml")
    missing = runner.invoke(app, ["rerun", str(inbox / record.name), "--quiet"])
    assert missing.exit_code == 2
    assert "does not exist; expected the model file of the recorded run" in missing.stderr
    run = runner.invoke(
        app, ["rerun", str(inbox / record.name), "--model", str(inbox / "sent.toml"), "--quiet"]
    )
    assert run.exit_code == 0, run.output
    assert "Reproduced" in run.stdout


def test_rerun_detects_a_changed_strategy_table(tmp_path):
    model = tmp_path / "model.toml"
    shutil.copy(BASE, model)
    table = tmp_path / "model.strategies.csv"
    table.write_text(
        "strategy,state,age_from,age_to,action\ntreat sick before 65,sick,,65,treat\n",
        encoding="utf-8",
    )
    made = runner.invoke(app, ["report", str(model), "--out", str(tmp_path / "r.html"), "--quiet"])
    assert made.exit_code == 0, made.output
    table.write_text(table.read_text(encoding="utf-8").replace(",65,", ",70,"), encoding="utf-8")
    run = runner.invoke(app, ["rerun", str(tmp_path / "r.run.json"), "--quiet"])
    assert run.exit_code == 1
    assert "An input file the model reads (life table or strategy table) has changed" in run.stdout
    assert "DIFFERS - input file model.strategies.csv" in run.stdout
