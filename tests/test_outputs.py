"""Atomic output sets (issue 14 item 3): every output set is staged beside its target and
moved into place only when all of it was written; staging and scratch folders are removed
on every exit path. No reference values: these check what is left on disk."""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.outputs import STAGING_PREFIX, staged_file, staged_folder

runner = CliRunner()
BASE = Path(__file__).parent / "data" / "broken_models" / "base_small.toml"


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.rglob("*") if p.name.startswith(STAGING_PREFIX))


def test_staged_folder_moves_everything_or_nothing(tmp_path: Path) -> None:
    target = tmp_path / "out"
    target.mkdir()
    (target / "keep.txt").write_text("mine")
    (target / "a.csv").write_text("old")
    with pytest.raises(RuntimeError), staged_folder(target) as staging:
        (staging / "a.csv").write_text("new")
        raise RuntimeError("the second file failed")
    assert (target / "a.csv").read_text() == "old"  # nothing moved
    assert _leftovers(tmp_path) == []
    with staged_folder(target) as staging:
        (staging / "a.csv").write_text("new")
        (staging / "sub").mkdir()
        (staging / "sub" / "b.csv").write_text("b")
    assert (target / "a.csv").read_text() == "new"
    assert (target / "sub" / "b.csv").read_text() == "b"
    assert (target / "keep.txt").read_text() == "mine"  # others untouched
    assert _leftovers(tmp_path) == []


def test_staged_folder_creates_a_missing_target_at_once(tmp_path: Path) -> None:
    with staged_folder(tmp_path / "new" / "out") as staging:
        (staging / "x.csv").write_text("x")
    assert (tmp_path / "new" / "out" / "x.csv").read_text() == "x"
    assert _leftovers(tmp_path) == []


def test_staged_file_replaces_only_on_success(tmp_path: Path) -> None:
    target = tmp_path / "m.toml"
    target.write_text("old")
    with pytest.raises(ValueError), staged_file(target) as path:
        path.write_text("half")
        raise ValueError("stop")
    assert target.read_text() == "old" and _leftovers(tmp_path) == []
    with staged_file(target) as path:
        path.write_text("new")
    assert target.read_text() == "new" and _leftovers(tmp_path) == []


def test_solve_out_leaves_nothing_when_one_file_fails(tmp_path: Path, monkeypatch) -> None:
    # Writing trace.csv fails after policy.csv was written: formerly policy.csv stayed.
    real = pd.DataFrame.to_csv

    def failing(self, path=None, *args, **kwargs):
        if path is not None and Path(str(path)).name == "trace.csv":
            raise OSError(28, "No space left on device")
        return real(self, path, *args, **kwargs)

    monkeypatch.setattr(pd.DataFrame, "to_csv", failing)
    out = tmp_path / "results"
    run = runner.invoke(app, ["solve", str(BASE), "--out", str(out), "--quiet"])
    assert run.exit_code == 2
    assert "--out" in run.stderr and "No space left on device" in run.stderr
    assert not out.exists() or list(out.iterdir()) == []
    assert _leftovers(tmp_path) == []


def test_report_is_written_whole_or_not_at_all(tmp_path: Path, monkeypatch) -> None:
    import caredecide.runrecord as runrecord

    def broken(record, path):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(runrecord, "write_record", broken)
    model = tmp_path / "model.toml"
    shutil.copy(BASE, model)
    run = runner.invoke(app, ["report", str(model), "--out", str(tmp_path / "r.html"), "--quiet"])
    assert run.exit_code == 2, run.output
    assert "Input/output error" in run.stderr
    assert not (tmp_path / "r.html").exists() and not (tmp_path / "r_tables").exists()
    assert _leftovers(tmp_path) == []


def test_rerun_leaves_no_scratch_folder(tmp_path: Path, monkeypatch) -> None:
    model = tmp_path / "model.toml"
    shutil.copy(BASE, model)
    run = runner.invoke(app, ["report", str(model), "--out", str(tmp_path / "r.html"), "--quiet"])
    assert run.exit_code == 0, run.output
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    run = runner.invoke(app, ["rerun", str(tmp_path / "r.run.json"), "--quiet"])
    assert run.exit_code == 0, run.output
    assert list(scratch.iterdir()) == []  # formerly a rerun-* folder stayed
