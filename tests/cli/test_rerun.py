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
    run = runner.invoke(app, ["report", str(model), "--out", str(tmp_path / "r.html"),
                              "--draws", "20", "--seed", "3", "--quiet"])
    assert run.exit_code == 0, run.output
    return model, tmp_path / "r.run.json"


def test_rerun_reproduces_and_exits_zero(recorded, tmp_path):
    _, record = recorded
    run = runner.invoke(app, ["rerun", str(record), "--out", str(tmp_path / "again"), "--quiet"])
    assert run.exit_code == 0, run.output
    assert ("Reproduced: the model file, its input files and every output match the "
            "record.") in run.stdout
    assert "RESEARCH USE ONLY" in run.stderr
    again = sorted(p.name for p in (tmp_path / "again").iterdir())
    assert again == sorted(p.name for p in (tmp_path / "r_tables").iterdir())
    for name in again:  # byte-identical result tables
        assert (tmp_path / "again" / name).read_bytes() == (tmp_path / "r_tables" /
                                                             name).read_bytes()


def test_rerun_detects_a_changed_model(recorded):
    model, record = recorded
    model.write_text(model.read_text(encoding="utf-8").replace("cost = 2000.0", "cost = 2500.0"),
                     encoding="utf-8")
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
