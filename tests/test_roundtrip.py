"""Comment-preserving model edits (issue 14 item 6): every write-back keeps comments, key
order and layout, changing only what changed. No reference values: text comparisons."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.model import Parameter
from caredecide.modelfile import load_model, loads_model
from caredecide.modelfile.roundtrip import updated_model_text
from synthetic_cohort import demo_model_path

runner = CliRunner()
DATA = Path(demo_model_path()).parents[1] / "data"


def _comment_lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.lstrip().startswith("#")]


def test_changing_one_value_changes_one_line_only() -> None:
    text = demo_model_path().read_text(encoding="utf-8")
    model = loads_model(text, file="demo.toml", base_dir=demo_model_path().parent)
    name = sorted(model.parameters)[0]
    old = model.parameters[name]
    value = float(old.value) * 1.0625  # inside the demo's ranges, exact in binary
    changed = dataclasses.replace(
        model,
        parameters={**model.parameters, name: dataclasses.replace(old, value=value)},
    )
    new_text = updated_model_text(text, changed, file="demo.toml")
    old_lines, new_lines = text.splitlines(), new_text.splitlines()
    assert len(old_lines) == len(new_lines)
    differing = [(a, b) for a, b in zip(old_lines, new_lines, strict=True) if a != b]
    assert len(differing) == 1, differing
    reread = loads_model(new_text, file="demo.toml", base_dir=demo_model_path().parent)
    assert reread.parameters[name].value == value


def test_added_parameter_keeps_every_comment_and_the_key_order() -> None:
    text = demo_model_path().read_text(encoding="utf-8")
    model = loads_model(text, file="demo.toml", base_dir=demo_model_path().parent)
    extra = Parameter(name="p_extra", value=0.5, kind="probability", source="Synthetic: test")
    changed = dataclasses.replace(model, parameters={**model.parameters, "p_extra": extra})
    new_text = updated_model_text(text, changed, file="demo.toml")
    assert _comment_lines(new_text) == _comment_lines(text)
    assert new_text.startswith(text.splitlines()[0])  # the synthetic-data header first
    assert "p_extra" in new_text
    reread = loads_model(new_text, file="demo.toml", base_dir=demo_model_path().parent)
    assert list(reread.parameters)[:-1] == list(model.parameters)


def test_estimate_into_a_model_keeps_its_comments(tmp_path: Path) -> None:
    model = tmp_path / "demo.toml"
    shutil.copy(demo_model_path(), model)
    for extra in demo_model_path().parent.glob("demo_life_table.csv"):
        shutil.copy(extra, tmp_path)
    out = tmp_path / "mine.toml"
    run = runner.invoke(
        app,
        [
            "estimate",
            str(DATA / "visits.csv"),
            "--patients",
            str(DATA / "patients.csv"),
            "--method",
            "counts",
            "--model",
            str(model),
            "--out",
            str(out),
            "--prefix",
            "cohort_",
            "--quiet",
        ],
    )
    assert run.exit_code == 0, run.output
    original, written = model.read_text(encoding="utf-8"), out.read_text(encoding="utf-8")
    assert _comment_lines(original)  # the demo has a header and section comments
    for line in _comment_lines(original):
        assert line in written
    assert written.splitlines()[:3] == original.splitlines()[:3]
    merged = load_model(out)
    assert any(name.startswith("cohort_") for name in [*merged.parameters, *merged.groups])
    assert not list(tmp_path.glob(".caredecide-staging-*"))


def test_app_table_edit_keeps_comments() -> None:
    # The app's parameter grid writes back through the same round trip.
    from ui.tables import model_to_tables, model_with_table

    text = demo_model_path().read_text(encoding="utf-8")
    model = loads_model(text, file="demo.toml", base_dir=demo_model_path().parent)
    frame = model_to_tables(model)["parameters"].copy()
    frame.loc[frame.index[0], "value"] = 0.0321
    changed = model_with_table(model, "parameters", frame)
    new_text = updated_model_text(text, changed, file="demo.toml")
    assert _comment_lines(new_text) == _comment_lines(text)
    assert "0.0321" in new_text
