"""Entry points for strategies, uncertainty and verification, with their shared rules."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from caredecide.model import Model
from caredecide.objective import Objective

if TYPE_CHECKING:  # each analysis imports its own modules on use (the report's notes)
    from caredecide.compare import ComparisonResult
    from caredecide.uncertainty.policy_search import PolicySearchResult
    from caredecide.uncertainty.psa import PSAResult
    from caredecide.verify import VerificationReport


def analyse_strategies(
    model: Model, strategies: Any = None, *, frontier: bool = True, **options: Any
) -> ComparisonResult:
    """Compare the optimal policy with fixed strategies at the model's willingness to pay.

    With ``frontier`` (and the net-benefit objective) the willingness-to-pay frontier is
    searched over the same range as the sensitivity suite's threshold
    (:func:`~caredecide.analysis.sensitivity.willingness_to_pay_search`). Other options go
    to :func:`caredecide.compare.compare_strategies`.
    """
    from caredecide.analysis.sensitivity import willingness_to_pay_search
    from caredecide.compare import compare_strategies

    objective = Objective.from_settings(model.settings, options.get("wtp"))
    if frontier and "wtp_range" not in options:
        options["wtp_range"] = willingness_to_pay_search(objective)
    return compare_strategies(model, strategies, **options)


def candidate_table(model: Model, table: Path | str | None = None) -> Path | None:
    """The strategy table whose strategies join the candidates of an analysis.

    ``table`` when given, else ``<model>.strategies.csv`` beside the model file when one
    exists (the same rule as :func:`caredecide.compare.compare_strategies`), else None.
    """
    from caredecide.strategies import sibling_table

    return Path(table) if table is not None else sibling_table(model.source_path)


def analyse_uncertainty(
    model: Model,
    n_draws: int,
    seed: int,
    *,
    strategies: Any = None,
    table: Path | str | None = None,
    **options: Any,
) -> PSAResult:
    """The probabilistic analysis (:func:`caredecide.uncertainty.psa.analyse_uncertainty`).

    ``strategies`` (a sequence of strategies) are added to the built-in candidates as
    given; when it is None, the strategies of :func:`candidate_table` (``table``, or the
    table beside the model file) are added, so every front end values the same candidates.
    """
    from caredecide.strategies import read_strategy_table
    from caredecide.uncertainty.psa import analyse_uncertainty as run

    if strategies is None:
        found = candidate_table(model, table)
        strategies = read_strategy_table(found) if found is not None else []
    return run(model, n_draws, seed, strategies=strategies, **options)


def analyse_verification(model: Model, **options: Any) -> VerificationReport:
    """The verification battery (:func:`caredecide.verify.verify_model`)."""
    from caredecide.verify import verify_model

    return verify_model(model, **options)


def analyse_best_schedule(
    model: Model, n_draws: int, seed: int, **options: Any
) -> PolicySearchResult:
    """The one schedule best over the probabilistic draws
    (:func:`caredecide.uncertainty.policy_search.best_policy_over_draws`)."""
    from caredecide.uncertainty.policy_search import best_policy_over_draws

    return best_policy_over_draws(model, n_draws, seed, **options)
