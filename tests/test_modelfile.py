"""Model files: reading, writing and round trips."""

from __future__ import annotations

import shutil
import string

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from caredecide.errors import ModelError
from caredecide.model import DirichletGroup, Model, MortalitySpec, Parameter, Settings
from caredecide.modelfile import (
    MAX_MODEL_BYTES,
    dumps_model,
    load_model,
    loads_model,
    save_model,
)
from synthetic_cohort import MODELS_DIR
from tests.conftest import load_dict, small_model_dict
from tests.test_distributions import EVERY_FORM


def test_demo_loads_with_its_declared_structure(demo_model_path):
    model = load_model(demo_model_path)
    assert model.state_ids == (
        "stage_1",
        "stage_2",
        "stage_3",
        "stage_1_tx",
        "stage_2_tx",
        "stage_3_tx",
        "dead",
    )
    assert model.action_ids == ("wait", "treat")
    assert model.n_cycles() == 45  # ages 55 to 100 in annual cycles
    assert model.settings.severity_order == ("stage_1", "stage_2", "stage_3")
    assert "Synthetic" in model.title
    assert all(p.source.startswith("Synthetic") for p in model.parameters.values())
    assert model.source_path == demo_model_path


def test_demo_load_save_load_is_identical(demo_model_path, tmp_path):
    first = load_model(demo_model_path)
    path = tmp_path / "copy.toml"
    save_model(first, path)
    second = load_model(path)
    assert second == first
    # Writing again gives the very same text: the writer is deterministic.
    assert dumps_model(second) == path.read_text()


def test_life_table_path_is_relative_to_the_model_file(tmp_path):
    shutil.copy(MODELS_DIR / "demo_life_table.csv", tmp_path / "life.csv")
    data = small_model_dict()
    data["mortality"] = {"table": "life.csv", "source": "Synthetic life table"}
    data["transitions"]["wait"]["well"]["dead"] = "background"
    import tomli_w

    (tmp_path / "m.toml").write_text(tomli_w.dumps(data))
    model = load_model(tmp_path / "m.toml")
    assert model.mortality.table == "life.csv"
    assert model.mortality.table_ages[0] == 40.0
    save_model(model, tmp_path / "again.toml")
    assert load_model(tmp_path / "again.toml") == model


def test_missing_life_table_is_named(tmp_path):
    data = small_model_dict()
    data["mortality"] = {"table": "nowhere.csv"}
    with pytest.raises(ModelError, match=r"mortality.table: life table .*nowhere\.csv.* not found"):
        load_dict(data, base_dir=tmp_path)


def test_oversized_text_is_refused():
    with pytest.raises(ModelError, match=f"larger than the limit of {MAX_MODEL_BYTES:,} bytes"):
        loads_model("#" * (MAX_MODEL_BYTES + 1))


def test_wrong_type_is_named():
    data = small_model_dict()
    data["settings"]["cycle_years"] = "one"
    with pytest.raises(ModelError, match=r"settings\.cycle_years: 'one' is not a number"):
        load_dict(data)


def test_written_file_is_readable_by_hand(small_model):
    text = dumps_model(small_model)
    assert "[transitions.wait.well]" in text
    assert 'well = "rest"' in text
    assert "[parameters.p_sick]" in text


# -- property: random valid models survive dumps -> loads ----------------------------------
_ids = st.text(string.ascii_lowercase, min_size=1, max_size=6).map(lambda s: "s_" + s)
_label = st.text(
    st.characters(codec="utf-8", exclude_categories=("Cs", "Cc")), max_size=20
) | st.sampled_from(
    # Text a person may write: several lines, tabs, quotes, backslashes, brackets, CR LF.
    [
        "two\nlines",
        "\nleading newline",
        "trailing newline\n",
        'say """ three',
        "a\tb \\ c",
        "Smith [2019], p. 3",
        "windows\r\nline",
        "'single' and \"double\"",
    ]
)
_number = st.floats(0.0, 1e6, allow_nan=False, allow_infinity=False)
# Every way of writing a distribution spec (model files do not check it against the value).
_distributions = st.none() | st.sampled_from(EVERY_FORM)


@st.composite
def random_models(draw) -> Model:
    from caredecide.model import Action, State

    names = draw(st.lists(_ids, min_size=2, max_size=5, unique=True))
    alive, dead = names[:-1], names[-1]
    horizon = draw(st.sampled_from(["cycles", "age", "infinite"]))
    n_params = draw(st.integers(1, 4))
    parameters = {}
    for i in range(n_params):
        value = draw(st.floats(0.0, 0.4))
        ranged = draw(st.booleans())
        distribution = draw(_distributions)
        # Only a distribution within [0, 1] fits a probability (validation refuses others).
        within = distribution is None or distribution.get("type") == "beta"
        parameters[f"p{i}"] = Parameter(
            name=f"p{i}",
            value=value,
            kind="probability" if within else "other",
            per_years=draw(st.none() | st.floats(0.1, 10.0)),
            low=value / 2 if ranged else None,
            high=min(1.0, value * 2) if ranged else None,
            source=draw(_label.filter(lambda s: s.strip())),
            label=draw(_label),
            note=draw(_label),
            distribution=distribution,
        )
    weights = st.floats(0.0, 1.0)
    if horizon != "infinite":  # an infinite horizon needs values that do not change with age
        weights = weights | st.just("0.5 + 0 * age")
    states = (
        *(
            State(
                id=s,
                label=draw(_label),
                qaly_weight=draw(weights),
                cost=draw(_number | st.just(-draw(_number))),
                negative_cost_allowed=True,
            )
            for s in alive
        ),
        # A dead state, or an absorbing state where life-years still accrue (e.g. cured).
        State(id=dead, absorbing=True, alive=draw(st.booleans())),
    )
    actions = (
        Action(id="wait", label=draw(_label), allowed_in="all"),
        Action(
            id="act",
            allowed_in=tuple(draw(st.lists(st.sampled_from(alive), min_size=1, unique=True))),
            oneoff_cost=draw(_number),
            oneoff_qaly_loss=draw(st.floats(0.0, 0.1)),
        ),
    )
    # Each row is given either by probabilities ("rest" completes it) or by exit rates.
    by_rates = {
        (action.id, s): draw(st.booleans())
        for action in actions
        for s in (alive if action.id == "wait" else action.allowed_in)
    }
    transitions = {
        action.id: {
            s: {dead: f"p{draw(st.integers(0, n_params - 1))} / 2", s: "rest"}
            for (a, s), rated in by_rates.items()
            if a == action.id and not rated
        }
        for action in actions
    }
    rates = {
        action.id: {
            s: {dead: f"rate_behind(p{draw(st.integers(0, n_params - 1))}, 1)"}
            for (a, s), rated in by_rates.items()
            if a == action.id and rated
        }
        for action in actions
    }
    if len(alive) > 1 and draw(st.booleans()):
        start = {alive[0]: 0.25, alive[1]: 0.75}  # shares summing to exactly 1
    else:
        start = alive[0]
    settings_ = Settings(
        cycle_years=draw(st.sampled_from([0.25, 0.5, 1.0])),
        horizon_cycles=draw(st.integers(1, 20)) if horizon == "cycles" else None,
        until_age=90.0 if horizon == "age" else None,
        infinite_horizon=horizon == "infinite",
        start_age=draw(st.floats(20.0, 80.0)),
        start=start,
        discount_outcomes=draw(st.floats(0.0, 0.1)),
        discount_costs=draw(st.floats(0.0, 0.1)),
        objective=draw(st.sampled_from(["qalys", "net_benefit"])),
        willingness_to_pay=draw(_number),
        within_cycle=draw(st.sampled_from(["start", "end", "trapezoid", "simpson"])),
        currency=draw(st.sampled_from(["", "EUR", "units"])),
        severity_order=tuple(alive),
    )
    groups = {}
    if draw(st.booleans()):
        groups["g"] = DirichletGroup(
            name="g",
            members=("g_a", "g_b"),
            counts=(3.0, 7.0),
            source="Synthetic counts",
            prior=draw(st.sampled_from([0.0, 0.5, 1.0])),
            note=draw(_label),
        )
    mortality = draw(
        st.none()
        | st.builds(
            MortalitySpec,
            gompertz_makeham=st.just((0.0007, 5e-5, 10**0.04)),
            source=_label,
        )
    )
    return Model(
        title=draw(_label.filter(lambda s: s.strip())),
        description=draw(_label),
        settings=settings_,
        states=states,
        actions=actions,
        transitions=transitions,
        rates=rates,
        parameters=parameters,
        groups=groups,
        mortality=mortality,
    )


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(random_models())
def test_random_valid_models_survive_dumps_then_loads(model):
    text = dumps_model(model)
    again = loads_model(text)
    assert again == model
    assert dumps_model(again) == text


def test_every_distribution_example_in_the_docs_is_accepted():
    import re
    import tomllib
    from pathlib import Path

    from caredecide.distributions import distribution_from_spec

    docs = Path(__file__).resolve().parents[1] / "docs" / "model-file.md"
    lines = re.findall(r"^distribution = \{.*\}", docs.read_text(), flags=re.MULTILINE)
    assert len(lines) >= 8
    for line in lines:
        spec = tomllib.loads(line.split("#")[0])["distribution"]
        distribution_from_spec(spec, where=line)


def test_the_docs_example_expressions_parse():
    import re
    from pathlib import Path

    from caredecide.expressions import parse_expression

    docs = Path(__file__).resolve().parents[1] / "docs" / "model-file.md"
    block = docs.read_text().split("Examples:")[1].split("```")[1]
    examples = re.findall(r'= "(.*?)"', block)
    # The block holds three examples today: a pattern that no longer matches must fail
    # here rather than check nothing.
    assert len(examples) >= 3, f"expected at least 3 example expressions, found {examples}"
    for text in examples:
        parse_expression(text, where="docs")


def test_binary_file_is_refused_with_a_clear_error(tmp_path):
    path = tmp_path / "model.toml"
    path.write_bytes(b"format = 1\n\xff\xfe")
    with pytest.raises(ModelError, match="byte 11 is not UTF-8"):
        load_model(path)


def test_text_on_several_lines_is_written_as_a_multiline_string(small_model):
    import dataclasses

    model = dataclasses.replace(small_model, description="First line.\nSecond line.")
    text = dumps_model(model)
    assert 'description = """\nFirst line.\nSecond line."""' in text
    assert loads_model(text) == model


def test_an_action_without_rows_survives_a_round_trip(small_model):
    import dataclasses

    model = dataclasses.replace(small_model, rates={"treat": {}})
    text = dumps_model(model)
    assert "[rates.treat]\n" in text
    assert loads_model(text).rates == {"treat": {}}


def test_a_folder_is_refused_with_a_clear_error(tmp_path):
    with pytest.raises(ModelError, match="is a folder; expected a model file"):
        load_model(tmp_path)
