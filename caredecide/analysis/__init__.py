"""Analysis entry points: the only functions the front ends (CLI, report, app) call.

Each returns a result object with named fields, ``to_frame()`` and ``to_dict()``, in the
manner of scipy's result objects. Every rule of an analysis (defaults, search ranges,
what is skipped and why) lives here or below, never in a front end, so the command line,
the report and the app show the same figures for the same model.

- :func:`analyse_base_case` -> :class:`BaseCaseResult` (compile -> solve -> evaluate);
- :func:`analyse_strategies` -> :class:`~caredecide.compare.ComparisonResult`;
- :func:`analyse_sensitivity` -> :class:`SensitivitySuite`;
- :func:`analyse_uncertainty` -> :class:`~caredecide.uncertainty.psa.PSAResult`;
- :func:`analyse_convergence` -> :class:`~caredecide.convergence.SweepTrace` and
  :func:`analyse_method_race` -> :class:`~caredecide.convergence.MethodRace`;
- :func:`analyse_best_schedule` ->
  :class:`~caredecide.uncertainty.policy_search.PolicySearchResult`;
- :func:`analyse_scenarios` -> :class:`ScenarioResult`;
- :func:`analyse_verification` -> :class:`~caredecide.verify.VerificationReport`.
"""

from importlib import import_module
from typing import Any

# Imported on first use, so a front end that needs one analysis does not load the others
# (and a missing optional module costs only its own analysis).
_HOMES = {
    "BaseCaseResult": "base_case",
    "analyse_base_case": "base_case",
    "analyse_strategies": "others",
    "analyse_uncertainty": "others",
    "analyse_best_schedule": "others",
    "analyse_verification": "others",
    "candidate_table": "others",
    "analyse_convergence": "convergence",
    "analyse_method_race": "convergence",
    "ScenarioResult": "scenarios",
    "analyse_scenarios": "scenarios",
    "SensitivitySuite": "sensitivity",
    "analyse_sensitivity": "sensitivity",
    "willingness_to_pay_search": "sensitivity",
}


def __getattr__(name: str) -> Any:
    if name not in _HOMES:
        raise AttributeError(f"module 'caredecide.analysis' has no attribute {name!r}")
    return getattr(import_module(f"caredecide.analysis.{_HOMES[name]}"), name)


__all__ = [
    "BaseCaseResult",
    "ScenarioResult",
    "SensitivitySuite",
    "analyse_base_case",
    "analyse_best_schedule",
    "analyse_convergence",
    "analyse_method_race",
    "analyse_scenarios",
    "analyse_sensitivity",
    "analyse_strategies",
    "analyse_uncertainty",
    "analyse_verification",
    "candidate_table",
    "willingness_to_pay_search",
]
