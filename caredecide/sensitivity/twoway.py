"""Two-way sensitivity analysis: the decision over a grid of two estimates.

The ``N x N`` grid of (x, y) values, every other estimate at base (Dirichlet group
mates rescaled, ``rest`` rows recomputed, see :mod:`.variation`), is ONE batch through
the common compile -> solve path. At each grid point: the optimal action at the
starting state(s) (cycle 0), the objective at the model start, and the policy's
structure summary (:mod:`caredecide.structure`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from caredecide.errors import ModelError, Problem
from caredecide.objective import Objective
from caredecide.sensitivity.variation import (
    check_grid,
    default_objective,
    parameter_ranges,
    parameter_sets,
    solve_parameter_sets,
    source_file,
    start_values,
)


def two_way(
    model: Any,
    x_parameter: str,
    y_parameter: str,
    *,
    grid: int = 11,
    objective: Objective | None = None,
    x_range: tuple[float, float] | None = None,
    y_range: tuple[float, float] | None = None,
) -> pd.DataFrame:
    """The optimal decision at the start over a grid of two parameters.

    Parameters
    ----------
    model : caredecide.model.Model
    x_parameter, y_parameter : str
        Two different parameter names.
    grid : int
        Values per axis (>= 2), evenly spaced over each plausible range.
    objective : Objective, optional
        Default: the model file's objective.
    x_range, y_range : (float, float), optional
        Override the plausible ranges.

    Returns
    -------
    pandas.DataFrame
        (grid * grid rows): ``x_parameter, x_value, y_parameter, y_value,
        action_at_start`` (the action at cycle 0 in the start state; with several
        start states ``"state: action; ..."``), ``start_value`` (objective at the model
        start), ``structure`` (plain-language policy summary) and ``base_structure``
        equality flag ``same_as_base``.
    """
    if x_parameter == y_parameter:
        raise ModelError(
            Problem(
                where="sensitivity.two_way",
                message=f"two-way analysis needs two different parameters, got {x_parameter!r} "
                "twice",
            ),
            file=source_file(model),
        )
    check_grid(grid, "sensitivity.two_way.grid")
    objective = default_objective(model) if objective is None else objective
    ranges = parameter_ranges(model, [x_parameter, y_parameter]).set_index("parameter")
    axes = []
    for name, given in ((x_parameter, x_range), (y_parameter, y_range)):
        low, high = (
            given if given is not None else (ranges.at[name, "low"], ranges.at[name, "high"])
        )
        axes.append(np.linspace(float(low), float(high), grid))
    X, Y = np.meshgrid(axes[0], axes[1], indexing="xy")  # (grid, grid): rows y, columns x
    frame = pd.concat(
        [
            parameter_sets(model, {}),
            parameter_sets(model, {x_parameter: X.ravel(), y_parameter: Y.ravel()}),
        ],
        ignore_index=True,
    )
    compiled, result = solve_parameter_sets(model, frame, objective)
    policy = np.asarray(result.policy)  # (1 + N^2, Tpi, S)
    starts = np.flatnonzero(np.asarray(compiled.start_distribution) > 0)
    state_ids = np.asarray(compiled.state_ids, dtype=object)
    action_ids = np.asarray(compiled.action_ids, dtype=object)
    first = action_ids[policy[1:, 0, starts]]  # (N^2, n_start)
    if starts.size == 1:
        action_at_start = first[:, 0]
    else:
        labelled = np.char.add(np.char.add(state_ids[starts].astype(str), ": "), first.astype(str))
        action_at_start = np.array(["; ".join(row) for row in labelled], dtype=object)
    same = (policy[1:] == policy[:1]).all(axis=(1, 2))
    # Text summaries are per grid point by nature (the maths above is one batch).
    structure = [str(result.structure(draw=k)) for k in range(1, policy.shape[0])]
    return pd.DataFrame(
        {
            "x_parameter": x_parameter,
            "x_value": X.ravel(),
            "y_parameter": y_parameter,
            "y_value": Y.ravel(),
            "action_at_start": action_at_start,
            "start_value": start_values(compiled, result)[1:],
            "structure": structure,
            "same_as_base": same,
        }
    )
