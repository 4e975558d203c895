"""Table glue of the model view: lossless round trip, cell conversions, one error per rule."""

from __future__ import annotations

import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from caredecide.errors import ModelError
from caredecide.modelfile import dumps_model, load_model, loads_model
from synthetic_cohort import demo_model_path
from ui import tables, working_model
from ui.templates import TEMPLATES


def _models():
    yield load_model(demo_model_path())
    for name, text in TEMPLATES.items():
        yield loads_model(text, file=name)


@pytest.mark.parametrize("model", list(_models()), ids=["demo", *TEMPLATES])
def test_every_table_written_back_unchanged_gives_the_same_model_and_text(model):
    for name, frame in tables.model_to_tables(model).items():
        rebuilt = tables.model_with_table(model, name, frame)
        assert rebuilt == model, name
        assert dumps_model(rebuilt) == dumps_model(model), name


def test_transition_matrix_has_from_rows_and_to_columns():
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    matrix = tables.model_to_tables(model)["transitions.wait"]
    assert list(matrix.index) == ["early", "late", "treated", "dead"]
    assert matrix.loc["early", "late"] == "p_progress"
    assert matrix.loc["early", "dead"] == "0.01"
    assert matrix.loc["early", "early"] == "rest"
    assert pd.isna(matrix.loc["dead", "dead"]) or matrix.loc["dead", "dead"] == ""


def test_clearing_a_matrix_cell_removes_that_transition():
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    matrix = tables.model_to_tables(model)["transitions.wait"].copy()
    matrix.loc["early", "late"] = ""
    edited = tables.model_with_table(model, "transitions.wait", matrix)
    assert "late" not in edited.transitions["wait"]["early"]
    assert edited.transitions["treat"] == model.transitions["treat"]


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("0.25", 0.25),
        (" 1e-3 ", 0.001),
        ("p_progress * 2", "p_progress * 2"),
        ("rest", "rest"),
        ("", None),
        ("   ", None),
        (None, None),
        (float("nan"), None),
        (3, 3.0),
    ],
)
def test_cell_expression(text, expected):
    assert tables.cell_expression(text) == expected


@given(st.floats(allow_nan=False, allow_infinity=False))
def test_number_cells_round_trip_exactly(value):
    assert tables.cell_expression(tables.expression_cell(value)) == value


def test_start_shares_round_trip():
    assert tables.cell_start(tables.start_cell({"a": 0.6, "b": 0.4})) == {"a": 0.6, "b": 0.4}
    assert tables.cell_start("stage_1") == "stage_1"


def test_start_share_that_is_not_a_number_names_the_state():
    with pytest.raises(ModelError, match=r"settings\.start\.b: 'lots' is not a share"):
        tables.cell_start("a = 0.6, b = lots")


def test_distribution_round_trips_as_an_inline_table():
    spec = {"type": "beta", "mean": 0.15, "se": 0.04}
    assert tables.cell_distribution(tables.distribution_cell(spec), "w") == spec
    assert tables.cell_distribution("", "w") is None


def test_distribution_that_is_not_toml_names_the_parameter():
    with pytest.raises(ModelError, match=r"parameters\.p\.distribution: .* is not an inline"):
        tables.cell_distribution("{ type = beta }", "parameters.p.distribution")


def test_distribution_that_is_not_a_table_names_the_parameter():
    with pytest.raises(ModelError, match=r"parameters\.p\.distribution: '0\.3' is not an inline"):
        tables.cell_distribution("0.3", "parameters.p.distribution")


def test_unknown_table_name_is_refused():
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    with pytest.raises(KeyError, match="unknown model table 'groups'"):
        tables.model_with_table(model, "groups", pd.DataFrame())


def test_upload_over_the_size_limit_is_refused_with_its_size():
    data = b"x" * (working_model.MAX_MODEL_BYTES + 1)
    with pytest.raises(
        ModelError, match=rf"big\.toml: .*{working_model.MAX_MODEL_BYTES + 1} bytes"
    ):
        working_model.decode_upload("big.toml", data)


def test_upload_that_is_not_utf8_is_refused_naming_the_byte():
    with pytest.raises(ModelError, match=r"bin\.toml: byte 2 is not UTF-8 text"):
        working_model.decode_upload("bin.toml", b"ab\xff\xfe")


def test_model_file_over_the_size_limit_is_refused(tmp_path):
    path = tmp_path / "huge.toml"
    path.write_bytes(b"#" * (working_model.MAX_MODEL_BYTES + 1))
    with pytest.raises(
        ModelError, match=r"huge\.toml: the file is larger than the limit of 2,000,000 bytes"
    ):
        working_model.read_model_file(path)


def test_header_comments_survive_a_rewrite_from_tables():
    old = "# SYNTHETIC\n#  invented\nformat = 1\n# inner comment\n"
    expected = "# SYNTHETIC\n#  invented\nformat = 1\n"
    assert tables.with_header_comments(old, "format = 1\n") == expected
    assert tables.with_header_comments("format = 1\n", "x\n") == "x\n"


@given(
    value=st.floats(min_value=-1e12, max_value=1e12, allow_nan=False),
    cost=st.one_of(st.floats(min_value=0, max_value=1e9), st.sampled_from(["c_x * 2", "rest"])),
)
def test_a_table_edit_is_written_to_the_file_and_read_back(value, cost):
    # Invariant: whatever a table holds reaches the model file unchanged (valid or not).
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    frames = tables.model_to_tables(model)
    params = frames["parameters"].copy()
    params.loc[0, "value"] = value
    states = frames["states"].copy()
    states.loc[1, "cost"] = tables.expression_cell(cost)
    edited = tables.model_with_table(
        tables.model_with_table(model, "parameters", params), "states", states
    )
    back = loads_model(dumps_model(edited), file="t", validate=False)
    assert back.parameters["p_progress"].value == value
    assert back.states[1].cost == cost


@pytest.mark.parametrize(
    ("name", "where", "expected"),
    [
        ("states", "states.late.cost", "row 2 (late), column cost"),
        ("states", "states[3].id", "row 4, column id"),
        ("states", "states.nowhere.cost", ""),
        ("actions", "actions.treat.allowed_in", "row 2 (treat), column allowed_in"),
        ("parameters", "parameters.c_treatment.value", "row 2 (c_treatment), column value"),
        ("parameters", "parameters.c_treatment", "row 2 (c_treatment)"),
        ("settings", "settings.start.b", "column start"),
        ("transitions.wait", "transitions.wait.early.late", "row early, column late"),
        ("transitions.wait", "transitions.wait.early", "row early"),
        ("transitions.wait", "transitions.treat.early.dead", ""),
    ],
)
def test_locate_names_the_row_and_column_of_a_problem(name, where, expected):
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    assert tables.locate(name, tables.model_to_tables(model)[name], where) == expected


def test_problems_under_a_table_do_not_leak_to_a_table_with_a_longer_name():
    from caredecide.errors import Problem

    problems = (
        Problem("transitions.wait.a.b", "x"),
        Problem("transitions.waitlist.a.b", "y"),
        Problem("states[2].id", "z"),
        Problem("", "general"),
    )
    assert [p.message for p in working_model.problems_under(problems, "transitions.wait")] == ["x"]
    assert [p.message for p in working_model.problems_under(problems, "states")] == ["z"]
    assert len(working_model.problems_under(problems, "")) == 4


def test_an_action_without_rows_gets_an_empty_matrix_to_fill():
    model = loads_model(TEMPLATES["treat-or-wait"], file="t")
    from dataclasses import replace

    from caredecide.model import Action

    model = replace(model, actions=(*model.actions, Action(id="refer", allowed_in=("early",))))
    matrix = tables.model_to_tables(model)["transitions.refer"]
    assert list(matrix.index) == list(model.state_ids)
    assert tables.model_with_table(model, "transitions.refer", matrix) == model  # untouched
    filled = matrix.copy()
    filled.loc["early", "dead"] = "0.5"
    edited = tables.model_with_table(model, "transitions.refer", filled)
    assert edited.transitions["refer"] == {"early": {"dead": 0.5}}


def test_number_cells_keep_text_and_refuse_it_with_its_place():
    assert tables.cell_number("0.25", "parameters.p.value") == 0.25
    assert tables.cell_number(3, "parameters.p.value") == 3.0
    assert tables.cell_number("", "parameters.p.low") is None
    with pytest.raises(ModelError, match=r"parameters\.p\.value: 'abc' is not a number"):
        tables.cell_number("abc", "parameters.p.value")
    with pytest.raises(ModelError, match=r"parameters\.p\.value: 'nan' is not a number"):
        tables.cell_number("nan", "parameters.p.value")
    with pytest.raises(ModelError, match=r"parameters\.p\.value: is empty; expected a number"):
        tables.cell_number(None, "parameters.p.value", required=True)
    assert tables.number_text(0.1) == "0.1" and tables.number_text(None) == ""
