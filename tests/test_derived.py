"""Named intermediate expressions (``[derived]``) and the settings readable in expressions."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from caredecide.compile import compile_model
from caredecide.errors import ModelError
from caredecide.modelfile import dumps_model, loads_model, validate_model
from tests.conftest import load_dict, small_model_dict


def with_derived(**definitions: str) -> dict:
    data = small_model_dict()
    data["derived"] = dict(definitions)
    return data


def problems_of(data: dict) -> str:
    with pytest.raises(ModelError) as caught:
        load_dict(data)
    return str(caught.value)


def test_a_derived_value_is_used_in_a_cell_with_the_published_value():
    # Source: Fleurence & Hollenbeak 2007, PharmacoEconomics 25(1):3-6: a relative risk of
    # 0.5 on the rate of p = 0.3 gives 0.1633400.
    data = with_derived(p_die_treated="with_rr(p_die_sick, rr_treat)")
    data["parameters"]["p_die_sick"]["value"] = 0.3
    data["transitions"]["treat"]["sick"]["dead"] = "p_die_treated"
    compiled = compile_model(load_dict(data))
    sick, dead, treat = 1, 2, 1
    assert compiled.transition[0, 0, treat, sick, dead] == pytest.approx(0.1633400, abs=5e-8)
    assert compiled.transition[0, 0, treat, sick, sick] == pytest.approx(0.8366600, abs=5e-8)


def test_the_same_model_written_inline_compiles_to_the_same_arrays():
    # Common practice: naming a sub-expression must not change any value.
    named = with_derived(
        c_total="c_drug + c_monitoring",  # uses a later definition
        c_monitoring="12 * c_visit",
        c_visit="25",
    )
    named["actions"][1]["cost_per_cycle"] = "c_total"
    inline = small_model_dict()
    inline["actions"][1]["cost_per_cycle"] = "c_drug + 12 * 25"
    a, b = compile_model(load_dict(named)), compile_model(load_dict(inline))
    np.testing.assert_array_equal(a.decision_cost, b.decision_cost)
    np.testing.assert_array_equal(a.transition, b.transition)
    # Hand arithmetic: 500 one-off + 1000 drug + 300 monitoring in `sick` under treat.
    assert a.decision_cost[0, 0, 1, 1] == 1800.0


def test_time_dependence_is_seen_through_a_definition():
    data = with_derived(p_sick_at_age="when(age >= 65, 0.2, p_sick)")
    data["transitions"]["wait"]["well"]["sick"] = "p_sick_at_age"
    compiled = compile_model(load_dict(data))
    well, sick, wait = 0, 1, 0
    # Start age 60, yearly cycles: ages 60..64 use p_sick = 0.1, from 65 on 0.2.
    np.testing.assert_array_equal(
        compiled.transition[0, :, wait, well, sick], [0.1] * 5 + [0.2] * 5
    )


def test_settings_are_readable_in_expressions():
    data = small_model_dict()
    data["states"][0]["cost"] = (
        "1000 * discount_costs + 10 * discount_outcomes + cycle_years + start_age / 60"
        " + willingness_to_pay / 20000"
    )
    compiled = compile_model(load_dict(data))
    # Hand arithmetic with the small model's settings: 30 + 0.3 + 1 + 1 + 1 = 33.3.
    assert compiled.state_cost[0, 0, 0] == pytest.approx(33.3, abs=1e-12)


def test_a_setting_name_cannot_be_a_parameter():
    data = small_model_dict()
    data["parameters"]["discount_costs"] = {"value": 0.1, "source": "Synthetic", "kind": "other"}
    assert "parameters.discount_costs: name 'discount_costs' is reserved" in problems_of(data)


def test_round_trip_keeps_the_definitions():
    data = with_derived(p_die_treated="with_rr(p_die_sick, rr_treat)", c_visit=25)
    data["transitions"]["treat"]["sick"]["dead"] = "p_die_treated"
    model = load_dict(data)
    assert loads_model(dumps_model(model)) == model


def test_a_parameter_used_only_through_a_definition_is_used():
    data = with_derived(p_die_treated="with_rr(p_die_sick, rr_treat)")
    data["transitions"]["treat"]["sick"]["dead"] = "p_die_treated"
    unused = [
        w for w in validate_model(load_dict(data)) if w.extra.get("rule") == "unused_parameter"
    ]
    assert unused == []


# ----------------------------------------------------------------------------- errors
def test_a_loop_of_definitions_is_shown():
    message = problems_of(with_derived(a="b + 1", b="2 * a", c="c"))
    assert "derived.a: is defined in terms of itself: a -> b -> a" in message
    assert "derived.b: is defined in terms of itself: b -> a -> b" in message
    assert "derived.c: is defined in terms of itself: c -> c" in message


def test_unknown_name_in_a_definition_suggests_close_names():
    message = problems_of(with_derived(p_treated="with_rr(p_die_sik, rr_treat)"))
    assert "derived.p_treated: 'with_rr(p_die_sik, rr_treat)' uses unknown name 'p_die_sik'" in (
        message
    )
    assert "(did you mean p_die_sick" in message


def test_a_cell_naming_an_unknown_definition_suggests_the_close_one():
    data = with_derived(p_die_treated="with_rr(p_die_sick, rr_treat)")
    data["transitions"]["treat"]["sick"]["dead"] = "p_die_treatd"
    message = problems_of(data)
    assert "transitions.treat.sick.dead" in message
    assert "unknown name 'p_die_treatd' (did you mean p_die_treated" in message


@pytest.mark.parametrize(
    ("name", "fragment"),
    [
        ("p_sick", "name 'p_sick' is also a parameter"),
        ("age", "name 'age' is reserved"),
        ("willingness_to_pay", "name 'willingness_to_pay' is reserved"),
        ("with_rr", "name 'with_rr' is a function of the expression language"),
        ("2x", "name '2x'; expected letters, digits and _"),
    ],
)
def test_bad_definition_names(name, fragment):
    assert f"derived.{name}: {fragment}" in problems_of(with_derived(**{name: "0.1"}))


def test_syntax_error_in_a_definition_names_it():
    message = problems_of(with_derived(c_year="c_drug *"))
    assert "derived.c_year: expression 'c_drug *' at character 9: unexpected end" in message


def test_rest_is_not_a_definition():
    assert "derived.x: expression 'rest'" in problems_of(with_derived(x="rest"))


def test_a_definition_is_not_a_table():
    data = small_model_dict()
    data["derived"] = {"x": {"value": 1}}
    assert "derived.x" in problems_of(data)


def test_an_unused_definition_is_a_warning_one_used_through_another_is_not():
    data = with_derived(c_total="c_drug + c_visit", c_visit="25", c_spare="1")
    data["actions"][1]["cost_per_cycle"] = "c_total"
    unused = [w for w in validate_model(load_dict(data)) if w.extra.get("rule") == "unused_derived"]
    assert [w.where for w in unused] == ["derived.c_spare"]
    assert "'c_spare' is not used by any cell of the model" in unused[0].message


def test_check_lists_the_definitions(tmp_path):
    import tomli_w
    from typer.testing import CliRunner

    from caredecide.cli import app

    data = with_derived(p_die_treated="with_rr(p_die_sick, rr_treat)")
    data["transitions"]["treat"]["sick"]["dead"] = "p_die_treated"
    path = tmp_path / "derived.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    run = CliRunner().invoke(app, ["check", str(path)])
    assert run.exit_code == 0, run.output
    assert "Derived values" in run.stdout and "with_rr(p_die_sick, rr_treat)" in run.stdout


@settings(deadline=None, max_examples=60)
@given(
    coefficients=st.lists(st.floats(-5, 5, allow_nan=False), min_size=1, max_size=6),
    x=st.floats(-10, 10, allow_nan=False),
)
def test_expanding_definitions_equals_writing_them_out(coefficients, x):
    # Invariant (common practice): a name stands for its definition in parentheses.
    from caredecide.derived import resolve_derived
    from caredecide.expressions import parse_expression

    definitions = {"d0": f"{coefficients[0]!r} * x"}
    written = {"d0": f"({coefficients[0]!r} * x)"}
    for i, c in enumerate(coefficients[1:], start=1):
        definitions[f"d{i}"] = f"{c!r} * d{i - 1} - x"
        written[f"d{i}"] = f"({c!r} * {written[f'd{i - 1}']} - x)"
    last = f"d{len(coefficients) - 1}"
    resolved, problems = resolve_derived(dict(reversed(definitions.items())), ["x"])
    assert problems == []
    expanded = parse_expression(f"2 * {last} + 1").with_definitions(resolved)
    direct = parse_expression(f"2 * {written[last]} + 1")
    assert expanded.names == {"x"}
    assert float(expanded.evaluate({"x": x})) == float(direct.evaluate({"x": x}))
