"""Shared fixtures: the synthetic demo model and a small model built as a dict.

Tests change the dict (``small_model_dict``) and read it back with ``load_dict`` so each
validation rule can be hit in isolation.
"""

from __future__ import annotations

import copy
import os
from pathlib import Path
from typing import Any

import pytest
import tomli_w
from hypothesis import settings

from caredecide.model import Model
from caredecide.modelfile import loads_model
from synthetic_cohort import demo_model_path as _demo_model_path

# Under load (CI, a shared machine) a property test can exceed hypothesis's 200 ms
# deadline without anything being wrong: the "ci" profile has no deadline. It is loaded
# when CI is set, or by name with HYPOTHESIS_PROFILE=ci.
settings.register_profile("ci", deadline=None, print_blob=True)
if os.environ.get("HYPOTHESIS_PROFILE"):
    settings.load_profile(os.environ["HYPOTHESIS_PROFILE"])
elif os.environ.get("CI"):
    settings.load_profile("ci")

SLOW = {
    # Modules (or module::test) that take more than a few seconds each on a quiet
    # machine (measured with --durations); `pytest -m "not slow and not browser"` skips them.
    "tests/cli/test_uncertainty.py",
    "tests/cli/test_best_schedule.py::test_best_schedule_prints_and_writes_the_library_figures",
    "tests/test_policy_search.py::test_search_matches_brute_force_on_200_random_tiny_models",
    "tests/cli/test_rerun.py",
    "tests/cli/test_report.py",
    "tests/test_acceptability.py",
    "tests/test_conversions.py::test_stiff_and_gentle_stack_matches_scipy_expm",
    "tests/test_conversions.py::test_matches_scipy_expm_from_slow_to_stiff",
    "tests/cli/test_sensitivity.py::test_sensitivity_prints_ranking_and_thresholds_and_writes_files",
    "tests/cli/test_compare.py::test_out_writes_table_frontier_traces_and_charts",
}


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Mark the tests listed in :data:`SLOW` with ``slow``."""
    root = Path(__file__).resolve().parent.parent
    for item in items:
        module = Path(str(item.fspath)).resolve().relative_to(root).as_posix()
        test = f"{module}::{item.name.split('[')[0]}"
        if module in SLOW or test in SLOW:
            item.add_marker(pytest.mark.slow)


SMALL_MODEL: dict[str, Any] = {
    "format": 2,
    "title": "Synthetic test model",
    "description": "Invented for tests.",
    "settings": {
        "cycle_years": 1.0,
        "horizon_cycles": 10,
        "start_age": 60.0,
        "start": "well",
        "discount_outcomes": 0.03,
        "discount_costs": 0.03,
        "objective": "net_benefit",
        "willingness_to_pay": 20000.0,
        "within_cycle": "start",
    },
    "states": [
        {"id": "well", "qaly_weight": 0.9, "cost": 100.0},
        {"id": "sick", "qaly_weight": "u_sick", "cost": 2000.0},
        {"id": "dead", "qaly_weight": 0.0, "cost": 0.0, "absorbing": True},
    ],
    "actions": [
        {"id": "wait", "allowed_in": "all"},
        {
            "id": "treat",
            "allowed_in": ["sick"],
            "oneoff_cost": 500.0,
            "oneoff_qaly_loss": 0.01,
            "cost_per_cycle": "c_drug",
        },
    ],
    "transitions": {
        "wait": {
            "well": {"sick": "p_sick", "dead": 0.01, "well": "rest"},
            "sick": {"dead": "p_die_sick", "sick": "rest"},
        },
        "treat": {"sick": {"dead": "with_rr(p_die_sick, rr_treat)", "sick": "rest"}},
    },
    "parameters": {
        "p_sick": {"value": 0.1, "kind": "probability", "source": "Synthetic: test"},
        "p_die_sick": {"value": 0.2, "kind": "probability", "source": "Synthetic: test"},
        "rr_treat": {"value": 0.5, "kind": "relative_risk", "source": "Synthetic: test"},
        "u_sick": {"value": 0.6, "kind": "qaly_weight", "source": "Synthetic: test"},
        "c_drug": {"value": 1000.0, "kind": "cost", "source": "Synthetic: test"},
    },
}


def small_model_dict() -> dict[str, Any]:
    """A fresh, valid small model as a TOML-shaped dict (change it freely)."""
    return copy.deepcopy(SMALL_MODEL)


def load_dict(data: dict[str, Any], **kwargs: Any) -> Model:
    """Write ``data`` as TOML and read it back as a model (validating by default)."""
    return loads_model(tomli_w.dumps(data), file="test.toml", **kwargs)


@pytest.fixture
def demo_model_path() -> Path:
    """Path of the synthetic demo model file."""
    return _demo_model_path()


@pytest.fixture
def small_model() -> Model:
    """The small test model, loaded and validated."""
    return load_dict(small_model_dict())
