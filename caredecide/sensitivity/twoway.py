"""Two-way sensitivity analysis: the decision over a grid of two estimates.

The ``N x N`` grid of (x, y) values, every other estimate at base (Dirichlet group
mates rescaled, ``rest`` rows recomputed, see :mod:`.variation`), is ONE batch through
the common batch driver (:func:`caredecide.batch.solve_batch`: compile -> solve, chunked
within a memory budget). At each grid point: the optimal action at the
starting state(s) (cycle 0), the objective at the model start, and the policy's
structure summary (:mod:`caredecide.structure`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from caredecide.batch import solve_batch
from caredecide.errors import ModelError, Problem
from caredecide.objective import Objective
from caredecide.sensitivity.variation import (
    check_grid,
    default_objective,
    parameter_ranges,
    parameter_sets,
    solve_parameter_sets,
    source_file,
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
    progress: Callable[[int, int], None] | None = None,
    include_base: bool = False,
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
    progress : callable(done, total), optional
        Called after each chunk of grid points is solved.
    include_base : bool
        Add each parameter's base value to its axis (when inside the range and not on the
        grid already), so that the base case is a cell of the map: there the policy is the
        base-case policy, and the cells that differ from it mean something.

    Returns
    -------
    pandas.DataFrame
        (grid * grid rows): ``x_parameter, x_value, y_parameter, y_value,
        action_at_start`` (the label of the action at cycle 0 in the start state; with
        several start states ``"state: action; ..."``), ``start_value`` (objective at the model
        start), ``structure`` (plain-language policy summary), ``same_as_base``
        (the whole policy equals the base-case policy) and ``is_base`` (both parameters
        at their base values).
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
        values = np.linspace(float(low), float(high), grid)
        base_value = float(ranges.at[name, "base"])
        if include_base and values[0] <= base_value <= values[-1]:
            values = np.union1d(values, [base_value])
        axes.append(values)
    X, Y = np.meshgrid(axes[0], axes[1], indexing="xy")  # (grid, grid): rows y, columns x
    base_compiled, base = solve_parameter_sets(model, parameter_sets(model, {}), objective)
    start = np.asarray(base_compiled.start_distribution)
    starts = np.flatnonzero(start > 0)

    def per_chunk(chunk_start: int, stop: int, result: Any, outcome: Any) -> dict[str, Any]:
        policy = np.asarray(result.policy)  # (chunk, Tpi, S)
        return {
            "first": policy[:, 0, starts],
            "value": result.expected_value(start),
            "same": (policy == base.policy[:1]).all(axis=(1, 2)),
            # Text summaries are per grid point by nature (the maths is one batch).
            "structure": [str(result.structure(draw=k)) for k in range(policy.shape[0])],
        }

    # The batch driver compiles and solves the grid chunk by chunk within a memory budget.
    batch = solve_batch(
        model,
        parameter_sets(model, {x_parameter: X.ravel(), y_parameter: Y.ravel()}),
        objective,
        keep=(),
        reduce=per_chunk,
        progress=progress,
    )
    chunks = batch.reductions
    first = np.concatenate([c["first"] for c in chunks])  # (N^2, n_start)
    state_ids = np.asarray(base_compiled.state_ids, dtype=object)
    # Actions are shown by their labels (the id when a model gives none).
    labels = base_compiled.action_labels or base_compiled.action_ids
    action_ids = np.asarray(
        [label or a for label, a in zip(labels, base_compiled.action_ids, strict=True)],
        dtype=object,
    )
    names = action_ids[first]
    if starts.size == 1:
        action_at_start = names[:, 0]
    else:
        labelled = np.char.add(np.char.add(state_ids[starts].astype(str), ": "), names.astype(str))
        action_at_start = np.array(["; ".join(row) for row in labelled], dtype=object)
    return pd.DataFrame(
        {
            "x_parameter": x_parameter,
            "x_value": X.ravel(),
            "y_parameter": y_parameter,
            "y_value": Y.ravel(),
            "action_at_start": action_at_start,
            "start_value": np.concatenate([c["value"] for c in chunks]),
            "structure": [text for c in chunks for text in c["structure"]],
            "same_as_base": np.concatenate([c["same"] for c in chunks]),
            "is_base": (X.ravel() == ranges.at[x_parameter, "base"])
            & (Y.ravel() == ranges.at[y_parameter, "base"]),
        }
    )
