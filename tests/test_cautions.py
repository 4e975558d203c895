"""Caution wording (issue 14 item 8): the research-use caution on every output; the note
that demo data are synthetic only when a bundled model is in use."""

from __future__ import annotations

import io
import shutil
import zipfile
from pathlib import Path

from typer.testing import CliRunner

from caredecide.cautions import (
    CAUTION_SHORT,
    DEMO_NOTE,
    caution_long,
    caution_short,
    is_bundled_model,
)
from caredecide.cli import app
from synthetic_cohort import demo_model_path

runner = CliRunner()


def test_bundled_models_and_templates_are_recognised(tmp_path: Path) -> None:
    assert is_bundled_model(demo_model_path())
    assert is_bundled_model("template:blank")
    own = tmp_path / "mine.toml"
    shutil.copy(demo_model_path(), own)
    assert not is_bundled_model(own)
    assert not is_bundled_model("upload:mine.toml")
    assert not is_bundled_model(None)


def test_wording_for_own_and_bundled_models(tmp_path: Path) -> None:
    own = tmp_path / "mine.toml"
    assert caution_short(own) == CAUTION_SHORT
    assert "synthetic" not in caution_short(own) + caution_long(own)
    assert caution_short(demo_model_path()).endswith(DEMO_NOTE)
    assert "synthetic" in caution_long(demo_model_path())


def test_solve_on_own_model_keeps_the_caution_without_the_demo_note(tmp_path: Path) -> None:
    own = tmp_path / "mine.toml"
    shutil.copy(demo_model_path(), own)
    run = runner.invoke(app, ["solve", str(own), "--format", "json", "--quiet"])
    assert run.exit_code == 0, run.stderr
    assert CAUTION_SHORT in run.stderr and "Demo data" not in run.stderr
    run = runner.invoke(app, ["solve", str(demo_model_path()), "--quiet"])
    assert run.exit_code == 0, run.stderr
    assert caution_short(demo_model_path()) in run.stderr


def test_report_zip_of_own_model_carries_the_caution_only(tmp_path: Path) -> None:
    from caredecide.report import downloads

    text = demo_model_path().read_text(encoding="utf-8")
    ready = downloads(text, file="mine.toml", base_dir=tmp_path)
    caution = zipfile.ZipFile(io.BytesIO(ready.tables_zip)).read("CAUTION.txt").decode()
    assert caution.startswith(CAUTION_SHORT)
    assert "synthetic" not in caution
    html = ready.report_html.decode()
    assert CAUTION_SHORT in html and DEMO_NOTE not in html
