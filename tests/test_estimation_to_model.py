"""Estimates -> model-file parameters and groups, with their source recorded."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from caredecide.distributions import distribution_from_spec
from caredecide.errors import ModelError
from caredecide.estimation import estimate_counts, estimate_panel, load_records
from caredecide.estimation.to_model import (
    dumps_parameters,
    estimates_to_parameters,
    merge_into_model,
    write_estimates,
)
from caredecide.model import DirichletGroup, Parameter
from caredecide.modelfile import load_model, loads_model
from synthetic_cohort import demo_model_path
from synthetic_cohort import generator as generator_module

DATA = Path(generator_module.__file__).parent / "data"


@pytest.fixture(scope="module")
def records():
    return load_records(DATA / "visits.csv", DATA / "patients.csv")


@pytest.fixture(scope="module")
def panel(records):
    return estimate_panel(records)


def test_panel_rates_become_lognormal_rate_parameters(panel):
    estimated = estimates_to_parameters(panel, prefix="c_")
    names = [
        "c_rate_stage_1_stage_2",
        "c_rate_stage_1_dead",
        "c_rate_stage_2_stage_3",
        "c_rate_stage_2_dead",
        "c_rate_stage_3_dead",
        "c_hr_treatment",
    ]
    assert list(estimated.parameters) == names
    low, high = panel.confidence_intervals()
    for index, name in enumerate(names):
        p = estimated.parameters[name]
        assert p.value == pytest.approx(np.exp(panel.log_parameters[index]), rel=1e-15)
        assert p.distribution == {
            "type": "lognormal",
            "meanlog": panel.log_parameters[index],
            "sdlog": panel.standard_errors()[index],
        }
        assert (p.low, p.high) == (low[index], high[index])
        # The lognormal median is exp(meanlog) = the estimate (common practice).
        assert distribution_from_spec(p.distribution).quantile(np.array([0.5]))[0] == (
            pytest.approx(p.value)
        )
    rate = estimated.parameters["c_rate_stage_1_stage_2"]
    assert rate.kind == "rate" and rate.per_years == 1.0
    assert estimated.parameters["c_hr_treatment"].kind == "hazard_ratio"
    for text in (
        "visits.csv",
        "patients.csv",
        "Kalbfleisch & Lawless 1985",
        "300 patients",
        "1482 observed intervals",
    ):
        assert text in rate.source


def test_count_rows_become_dirichlet_groups(records):
    estimates = estimate_counts(records, tolerance=0.5, prior=0.0)
    estimated = estimates_to_parameters(estimates)
    untreated = estimates[0]
    group = estimated.groups["from_stage_1"]
    assert group.members == (
        "p_stage_1_stage_1",
        "p_stage_1_stage_2",
        "p_stage_1_stage_3",
        "p_stage_1_dead",
    )
    np.testing.assert_array_equal(group.counts, untreated.counts[0])
    assert "Briggs, Ades & Price 2003" in group.source
    assert f"{untreated.n_transitions} observed transitions" in group.source
    # stage_2 never moves back to stage_1: that destination has no Dirichlet weight.
    assert "p_stage_2_stage_1" not in estimated.groups["from_stage_2"].members
    # Treated stage_1 intervals do not exist in the sample: left out with a note.
    assert "from_stage_1_treated" not in estimated.groups
    assert any("row stage_1 (treated)" in note for note in estimated.notes)


def test_prior_keeps_every_destination(records):
    estimates = estimate_counts(records, tolerance=0.5, prior=1.0)
    group = estimates_to_parameters(estimates).groups["from_stage_2"]
    assert len(group.members) == 4 and group.prior == 1.0


def test_parameter_without_standard_error_is_written_fixed():
    visits = pd.DataFrame(
        {"patient_id": ["SYN-1", "SYN-1"], "years_since_entry": [0.0, 2.0], "stage": ["s", "s"]}
    )
    from caredecide.estimation import records_from_frames

    estimate = estimate_panel(records_from_frames(visits))
    estimated = estimates_to_parameters(estimate)
    p = estimated.parameters["rate_s_dead"]
    assert p.distribution is None and p.low is None
    assert "rate_s_dead: no standard error" in estimated.notes[0]


def test_tables_paste_into_a_model_file(panel, records):
    estimated = estimates_to_parameters(
        [panel, *estimate_counts(records, tolerance=0.5)], prefix="c_"
    )
    tables = dumps_parameters(estimated)
    assert tables.startswith("# Transition estimates")
    combined = demo_model_path().read_text() + "\n" + tables
    model = loads_model(combined, base_dir=demo_model_path().parent)
    for name, parameter in estimated.parameters.items():
        assert model.parameters[name] == parameter
    for name, group in estimated.groups.items():
        assert model.groups[name] == group


def test_merge_and_save_round_trip(panel, tmp_path):
    estimated = estimates_to_parameters(panel, prefix="cohort_")
    out = write_estimates(estimated, tmp_path / "merged.toml", model=demo_model_path())
    merged = load_model(out)
    demo = load_model(demo_model_path())
    assert set(merged.parameters) == set(demo.parameters) | set(estimated.parameters)
    assert merged.parameters["cohort_hr_treatment"] == estimated.parameters["cohort_hr_treatment"]
    # Writing into an existing model file updates it in place.
    again = estimates_to_parameters(panel, prefix="second_")
    write_estimates(again, out)
    assert "second_rate_stage_3_dead" in load_model(out).parameters


def test_estimated_parameter_named_like_a_group_member_is_an_error(panel):
    model = load_model(demo_model_path())
    estimated = estimates_to_parameters(panel)
    member_model = replace(
        model,
        groups={
            "g": DirichletGroup(
                name="g", members=("rate_stage_1_dead", "other"), counts=(1.0, 2.0), source="x"
            )
        },
    )
    with pytest.raises(ModelError, match="'rate_stage_1_dead' is a member of group 'g'"):
        merge_into_model(member_model, estimated)


def test_group_member_named_like_a_model_parameter_is_an_error(records):
    model = load_model(demo_model_path())
    clash = Parameter(name="p_stage_1_dead", value=0.1, source="x", kind="probability")
    model = replace(model, parameters={**model.parameters, "p_stage_1_dead": clash})
    estimated = estimates_to_parameters(estimate_counts(records, tolerance=0.5))
    with pytest.raises(ModelError, match="declares parameter 'p_stage_1_dead' and the estimates"):
        merge_into_model(model, estimated)


@pytest.mark.parametrize("prefix", ["my-pre", "1x_", "a b", "é_"])
def test_prefix_that_makes_invalid_names_is_an_error(panel, prefix):
    with pytest.raises(
        ModelError, match=rf"prefix: value {prefix!r}; expected letters, digits and _"
    ):
        estimates_to_parameters(panel, prefix=prefix)


def test_state_ids_become_ascii_names():
    visits = pd.DataFrame(
        {
            "patient_id": ["SYN-1", "SYN-1", "SYN-2", "SYN-2"],
            "years_since_entry": [0.0, 1.0, 0.0, 1.0],
            "stage": ["stade-é 1", "stade-é 1", "stade-é 1", "dead"],
        }
    )
    from caredecide.estimation import records_from_frames

    estimated = estimates_to_parameters(estimate_panel(records_from_frames(visits)))
    assert list(estimated.parameters) == ["rate_stade___1_dead"]
