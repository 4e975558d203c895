"""The guarded reader: regular files only, a byte cap, a nesting limit (issue 14 item 2).

Every loader goes through :mod:`caredecide.guarded`; each test below would fail with the
former readers (a ``stat`` size check lets ``/dev/zero`` through, ``tomllib`` and ``json``
recurse into ``RecursionError`` on deep nesting). No reference values: these are refusals.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.errors import ModelError
from caredecide.estimation.records import load_records
from caredecide.guarded import (
    MAX_NESTING,
    check_data_depth,
    check_nesting,
    read_limited_bytes,
    read_limited_text,
    sha256_limited,
)
from caredecide.modelfile import load_model, loads_model
from caredecide.mortality import read_life_table
from caredecide.runrecord import RunRecordError, read_record
from caredecide.strategies import read_strategy_table

runner = CliRunner()
DEEP_ARRAY = "a = " + "[" * 5000 + "]" * 5000 + "\n"
DEEP_TABLE = "a = " + "{ b = " * 5000 + "1" + " }" * 5000 + "\n"
DEEP_DOTTED = "[" + ".".join(["k"] * 5000) + "]\nx = 1\n"
needs_dev_zero = pytest.mark.skipif(not Path("/dev/zero").exists(), reason="no /dev/zero")


@pytest.fixture
def zero_link(tmp_path: Path) -> Path:
    link = tmp_path / "zero.toml"
    link.symlink_to("/dev/zero")
    return link


@needs_dev_zero
def test_symlink_to_dev_zero_is_refused_by_every_loader(zero_link: Path) -> None:
    expected = r"zero\.toml: (mortality\.table: )?is not a regular file"
    for read in (load_model, read_strategy_table, load_records, read_life_table):
        with pytest.raises(ModelError, match=expected):
            read(zero_link)
    with pytest.raises(RunRecordError, match=expected):
        read_record(zero_link)
    with pytest.raises(ModelError, match=expected):
        sha256_limited(zero_link, 10)


@needs_dev_zero
def test_cli_refuses_dev_zero_with_exit_2(zero_link: Path) -> None:
    run = runner.invoke(app, ["check", str(zero_link)])
    assert run.exit_code == 2
    assert "zero.toml: is not a regular file" in run.stderr
    assert "Traceback" not in run.stderr


def test_named_pipe_is_refused_without_waiting(tmp_path: Path) -> None:
    pipe = tmp_path / "pipe.toml"
    os.mkfifo(pipe)
    with pytest.raises(ModelError, match=r"pipe\.toml: is not a regular file"):
        read_limited_bytes(pipe, 100)


def test_folder_and_missing_file_are_named(tmp_path: Path) -> None:
    with pytest.raises(ModelError, match=r": is a folder; expected a model file"):
        read_limited_text(tmp_path, 100, what="a model file")
    with pytest.raises(ModelError, match=r"nope\.toml: file not found; expected a model"):
        read_limited_text(tmp_path / "nope.toml", 100, what="a model file")


def test_cap_counts_bytes_read_not_stat(tmp_path: Path) -> None:
    path = tmp_path / "m.toml"
    path.write_bytes(b"x" * 11)
    with pytest.raises(ModelError, match=r"larger than the limit of 10 bytes"):
        read_limited_bytes(path, 10)
    path.write_bytes(b"x" * 10)
    assert read_limited_bytes(path, 10) == b"x" * 10


def test_binary_and_nul_text_are_refused(tmp_path: Path) -> None:
    path = tmp_path / "bin.toml"
    path.write_bytes(b"title = 'a'\n\x00\x01")
    with pytest.raises(ModelError, match=r"bin\.toml: character 12 is a NUL byte"):
        read_limited_text(path, 100)


@pytest.mark.parametrize("text", [DEEP_ARRAY, DEEP_TABLE, DEEP_DOTTED])
def test_deep_toml_is_refused_not_recursion_error(text: str) -> None:
    with pytest.raises(ModelError, match=f"nested more than {MAX_NESTING} levels"):
        loads_model(text, file="deep.toml")


@pytest.mark.parametrize("text", [DEEP_ARRAY, DEEP_TABLE, DEEP_DOTTED])
def test_cli_refuses_deep_toml_with_exit_2(tmp_path: Path, text: str) -> None:
    path = tmp_path / "deep.toml"
    path.write_text(text, encoding="utf-8")
    run = runner.invoke(app, ["check", str(path)])
    assert run.exit_code == 2, run.stderr
    assert "deep.toml" in run.stderr and "nested more than" in run.stderr
    assert run.exception is None or isinstance(run.exception, SystemExit)


def test_app_loader_refuses_deep_toml(tmp_path: Path) -> None:
    from ui import working_model as common

    checked = common.read_model(DEEP_ARRAY, "deep.toml", str(tmp_path))
    assert any("nested more than" in p.message for p in checked.problems)
    checked = common.check_model(DEEP_TABLE, "deep.toml", str(tmp_path))
    assert any("nested more than" in p.message for p in checked.problems)


def test_app_distribution_cell_refuses_deep_text() -> None:
    from ui.tables import cell_distribution

    with pytest.raises(ModelError, match=r"parameters\.p: brackets are nested more than"):
        cell_distribution("[" * 5000, "parameters.p")


def test_deep_json_record_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "record.json"
    path.write_text("[" * 5000 + "]" * 5000, encoding="utf-8")
    with pytest.raises(RunRecordError, match=r"record\.json, line 1: brackets are nested"):
        read_record(path)


def test_brackets_in_strings_and_comments_do_not_count() -> None:
    deep = "[" * (MAX_NESTING + 5)
    text = (
        f'a = "{deep}"\nb = \'{deep}\'\n# {deep}\nc = """\n{deep}\n"""\n'
        f"d = '''{deep}'''\ne = [[1], [2]]\n"
    )
    check_nesting(text, file="x.toml")  # no error
    check_nesting(json.dumps({"a": deep, "b": [[1]]}), file="x.json", kind="json")


def test_nesting_at_the_limit_passes_one_more_fails() -> None:
    check_nesting("a = " + "[" * MAX_NESTING + "]" * MAX_NESTING, file="x.toml")
    with pytest.raises(ModelError, match=r"x\.toml, line 2: brackets"):
        check_nesting("\na = " + "[" * (MAX_NESTING + 1), file="x.toml")
    check_data_depth({"a": [{"b": 1}]}, file="x")


def test_huge_integer_is_a_model_error() -> None:
    with pytest.raises(ModelError, match=r"big\.toml: TOML value cannot be read"):
        loads_model("x = " + "9" * 6000 + "\n", file="big.toml")
