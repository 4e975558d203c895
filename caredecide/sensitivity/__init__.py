"""Deterministic sensitivity of the decision to each estimate.

* :func:`one_way` - each parameter at its low and high value, ranked for a tornado
  diagram, with the states and ages whose optimal action changes;
* :func:`parameter_thresholds` / :func:`setting_thresholds` - the value of an estimate,
  the willingness to pay or a discount rate at which the optimal action switches;
* :func:`two_way` - the decision over a grid of two estimates;
* :func:`decision_tornado` - estimates ranked by the value lost when the base-case
  policy is kept while the estimate moves over its range;
* :func:`cell_sensitivity` - the factor on each transition cell at which the decision
  changes (the transition sensitivity matrix).

Every analysis is a batch of parameter sets solved in one call of the common
compile -> solve path (see docs/methods-sensitivity.md).
"""

from caredecide.sensitivity.cells import CellSensitivityResult, cell_sensitivity
from caredecide.sensitivity.decision import DecisionTornado, decision_tornado
from caredecide.sensitivity.oneway import OneWayResult, one_way
from caredecide.sensitivity.thresholds import (
    NO_SWITCH,
    parameter_thresholds,
    setting_thresholds,
    summarise_thresholds,
)
from caredecide.sensitivity.twoway import two_way
from caredecide.sensitivity.variation import (
    compiled_over_discount_rate,
    compiled_over_willingness_to_pay,
    consistency_rule,
    parameter_ranges,
    parameter_sets,
)

__all__ = [
    "NO_SWITCH",
    "CellSensitivityResult",
    "DecisionTornado",
    "OneWayResult",
    "cell_sensitivity",
    "compiled_over_discount_rate",
    "compiled_over_willingness_to_pay",
    "consistency_rule",
    "decision_tornado",
    "one_way",
    "parameter_ranges",
    "parameter_sets",
    "parameter_thresholds",
    "setting_thresholds",
    "summarise_thresholds",
    "two_way",
]
