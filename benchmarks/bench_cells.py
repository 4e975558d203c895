"""Cell sensitivity benchmark: every transition cell vs the one-way analysis of every parameter.

Not a test: prints times measured in this run on this machine and their ratio.

Measured, for each SYNTHETIC demo model (the grid of sizes: 7 to 15 movable cells, 10 to 14
parameters, finite and infinite horizons):

* ``cells``: :func:`caredecide.sensitivity.cell_sensitivity` - the switching factor below
  and above 1 of every movable transition cell (one grid batch, then Brent's method on all
  brackets at once, one batch per step), the changed states and ages, and the value lost at
  factors 0.5 and 2;
* ``one-way``: :func:`caredecide.sensitivity.one_way` of every parameter (1 + 2P parameter
  sets in one compile -> solve call).

* ``recompiled``: the same analysis (same grid, brackets, Brent steps and tolerance) with
  every moved draw built by recompiling the model file with the cell's expression
  multiplied by the factor (the plain "compile hook" way), instead of moving the cell in
  the compiled arrays; the factors and values lost must agree to 1e-9.

The target (issue 20) is ``cells / one-way <= 3`` on the demo model. Each analysis runs
``--repeat`` times, interleaved, and the smallest wall-clock and CPU times are kept (other
work on a shared machine slows both; the minimum is the least disturbed run).

Answers are checked, outside the timings, against recompiling the model: for every reported
switching factor the model file with the cell's expression multiplied by the factor just
inside it keeps the base-case policy and just past it does not (probability cells in rows
with a remainder and rate cells; cells whose row has no remainder have no text form).

Run: python benchmarks/bench_cells.py [--repeat 5] [--model PATH ...]
"""

from __future__ import annotations

import argparse
import copy
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from caredecide.cautions import CAUTION_SHORT
from caredecide.chunks import join_compiled
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.sensitivity import cell_sensitivity, one_way
from caredecide.sensitivity import cells as cells_module
from caredecide.sensitivity.cell_scaling import EXITS_RESCALED, RATE_SCALED, CellScaler
from caredecide.sensitivity.variation import default_objective
from caredecide.solvers import solve
from synthetic_cohort import MODELS_DIR

MODELS = (
    "demo_progressive.toml",
    "demo_counts_table.toml",
    "lesion_surveillance.toml",
    "teaching_stationary.toml",
)
STEP = 1e-5
"""Relative distance from a switching factor at which the reference checks the policy."""


def timed(function, *args, **kwargs) -> tuple[float, float, object]:
    """(wall seconds, CPU seconds of this process, result)."""
    wall, cpu = time.perf_counter(), time.process_time()
    result = function(*args, **kwargs)
    return time.perf_counter() - wall, time.process_time() - cpu, result


def recompiled_policy(model, cell, factor: float, objective) -> np.ndarray:
    """Policy of the model file with the cell's expression multiplied by ``factor``."""
    table = "rates" if cell.rule == RATE_SCALED else "transitions"
    rows = copy.deepcopy(dict(getattr(model, table)))
    rows[cell.action_id][cell.from_id][cell.to_id] = f"({cell.expression}) * {float(factor)!r}"
    compiled = compile_model(replace(model, **{table: rows}))
    return solve(compiled, objective)


class RecompilingScaler(CellScaler):
    """The reference: each moved draw compiled from the model text with the cell scaled."""

    def scaled(self, which: np.ndarray, factors: np.ndarray):
        pieces = []
        for c, k in zip(which, factors, strict=True):
            cell = self.cells[c]
            table = "rates" if cell.rule == RATE_SCALED else "transitions"
            rows = copy.deepcopy(dict(getattr(self.model, table)))
            rows[cell.action_id][cell.from_id][cell.to_id] = f"({cell.expression}) * {float(k)!r}"
            pieces.append(compile_model(replace(self.model, **{table: rows})))
        return join_compiled(pieces)


def recompiled_analysis(model):
    """cell_sensitivity with the reference scaler (every other step unchanged)."""
    original = cells_module.CellScaler
    cells_module.CellScaler = RecompilingScaler
    try:
        return cell_sensitivity(model)
    finally:
        cells_module.CellScaler = original


def check_same(result, reference, name: str) -> None:
    for field in ("factor_below", "factor_above", "value_lost"):
        ours, theirs = getattr(result, field), getattr(reference, field)
        if not np.allclose(ours, theirs, rtol=1e-9, atol=1e-9, equal_nan=True):
            raise SystemExit(f"{name}: {field} differs from the recompiling reference")


def check_against_recompiling(model, result) -> int:
    """Every switching factor bounds a policy change in the recompiled model; checks done."""
    objective = default_objective(model)
    base = solve(compile_model(model), objective)
    decision = base.decision_states[None, :] & ~base.indifferent[0]
    checked = 0
    for i, cell in enumerate(result.cells):
        if cell.rule == EXITS_RESCALED:
            continue
        for factor, sign in ((result.factor_below[i], -1), (result.factor_above[i], 1)):
            if np.isnan(factor):
                continue
            inside = recompiled_policy(model, cell, factor * (1 - sign * STEP), objective)
            past = recompiled_policy(model, cell, factor * (1 + sign * STEP), objective)
            same_inside = not ((inside.policy[0] != base.policy[0]) & decision).any()
            differs_past = ((past.policy[0] != base.policy[0]) & decision).any()
            if not (same_inside and differs_past):
                raise SystemExit(
                    f"{model.file_label}: {cell.path} factor {factor!r} does not bound a "
                    "policy change in the recompiled model"
                )
            checked += 1
    return checked


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--model", type=Path, action="append", default=None)
    args = parser.parse_args(argv)
    paths = args.model or [MODELS_DIR / name for name in MODELS]
    print(f"# {CAUTION_SHORT}", file=sys.stderr)
    print(
        f"{'model':<28} {'cells':>5} {'params':>6} {'cells s':>9} {'one-way s':>9} "
        f"{'ratio wall':>10} {'ratio cpu':>9} {'recompiled s':>11} {'speed-up':>9} "
        f"{'checked':>7}"
    )
    for path in paths:
        model = load_model(path)
        cell_sensitivity(model)  # warm caches (imports, parsing) for both paths
        one_way(model)
        if any(c.rule == EXITS_RESCALED for c in CellScaler(model).cells):
            print(f"{path.name}: skipped (a row without remainder has no text form)")
            continue
        cells_wall = cells_cpu = one_wall = one_cpu = ref_wall = np.inf
        result = reference = None
        for _ in range(args.repeat):
            wall, cpu, result = timed(cell_sensitivity, model)
            cells_wall, cells_cpu = min(cells_wall, wall), min(cells_cpu, cpu)
            wall, cpu, _ = timed(one_way, model)
            one_wall, one_cpu = min(one_wall, wall), min(one_cpu, cpu)
            wall, _, reference = timed(recompiled_analysis, model)
            ref_wall = min(ref_wall, wall)
        check_same(result, reference, path.name)
        checked = check_against_recompiling(model, result)
        print(
            f"{path.name:<28} {len(result.cells):>5} {len(model.base_parameter_values()):>6} "
            f"{cells_wall:>9.3f} {one_wall:>9.3f} {cells_wall / one_wall:>10.2f} "
            f"{cells_cpu / one_cpu:>9.2f} {ref_wall:>11.3f} {ref_wall / cells_wall:>9.1f} "
            f"{checked:>7}"
        )
    print(
        "ratio = cells / one-way (target <= 3 on demo_progressive.toml, issue 20); "
        "speed-up = recompiled / cells"
    )


if __name__ == "__main__":
    main()
