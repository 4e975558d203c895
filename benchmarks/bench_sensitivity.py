"""Sensitivity benchmark: batched one-way + thresholds vs one parameter set at a time.

Not a test: prints times measured in this run on this machine and their ratio.

Batched (caredecide.sensitivity): one-way analysis of every parameter of the SYNTHETIC demo
model (1 + 2P parameter sets in one compile -> solve call) and decision thresholds for every
parameter (a grid of P x G sets in one call, then Brent's method run on all brackets at once,
one batch per step).

Reference: the same analysis re-solving one parameter set at a time through the same
compile -> solve path: each one-way set alone, each grid value alone, and
scipy.optimize.brentq per bracket whose every evaluation compiles and solves one set.

Results are confirmed identical: one-way values (to 1e-9 relative), the same policy
switches, the same brackets and thresholds agreeing to 1e-9 x the parameter's range.

Both wall-clock and CPU time of this process are printed: other work on a shared machine
slows the wall clock of both paths, not always alike.

Run: python benchmarks/bench_sensitivity.py [--model PATH] [--grid 11] [--parameters P ...]
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from caredecide.cautions import CAUTION_SHORT
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.sensitivity import one_way, parameter_ranges, parameter_sets, parameter_thresholds
from caredecide.sensitivity.variation import default_objective
from caredecide.solvers import solve


def solve_one(model, objective, name: str, value: float):
    """Compile and solve ONE parameter set (the reference path)."""
    frame = parameter_sets(model, {name: np.array([value])})
    compiled = compile_model(model, frame)
    return compiled, solve(compiled, objective)


def reference_one_way(model, objective, ranges: pd.DataFrame) -> tuple[float, np.ndarray, list]:
    """Values (P, 2) and policies, solving each set alone."""
    base_compiled = compile_model(model)
    base = solve(base_compiled, objective)
    base_value = float(base.value[0, 0] @ base_compiled.start_distribution)
    values = np.empty((len(ranges), 2))
    switched = []
    for i, row in enumerate(ranges.itertuples()):
        for j, end in enumerate(("low", "high")):
            compiled, result = solve_one(model, objective, row.parameter, getattr(row, end))
            values[i, j] = result.value[0, 0] @ compiled.start_distribution
            changed = (result.policy[0] != base.policy[0]) & result.decision_states[None, :]
            switched += [
                (row.parameter, end, int(t), int(s))
                for t, s in zip(*np.nonzero(changed), strict=True)
            ]
    return base_value, values, switched


def reference_thresholds(model, objective, ranges: pd.DataFrame, grid: int) -> pd.DataFrame:
    """Grid values solved one at a time; brentq per bracket, one set per evaluation."""
    rows = []
    for row in ranges.itertuples():
        if not row.high > row.low:
            continue
        xs = row.low + (row.high - row.low) * np.linspace(0.0, 1.0, grid)
        xs[-1] = row.high
        solved = [solve_one(model, objective, row.parameter, x)[1] for x in xs]
        policy = np.stack([r.policy[0] for r in solved])  # (G, Tpi, S)
        decision = solved[0].decision_states
        for i in range(grid - 1):
            change = (policy[i] != policy[i + 1]) & decision[None, :]
            for t, s in zip(*np.nonzero(change), strict=True):
                a, b = policy[i, t, s], policy[i + 1, t, s]

                def gap(x, t=t, s=s, a=a, b=b, name=row.parameter):
                    q = solve_one(model, objective, name, x)[1].q_values[0, t, s]
                    return q[a] - q[b]

                f_lo = solved[i].q_values[0, t, s, a] - solved[i].q_values[0, t, s, b]
                f_hi = solved[i + 1].q_values[0, t, s, a] - solved[i + 1].q_values[0, t, s, b]
                if f_lo == 0.0:
                    x = xs[i]
                elif f_hi == 0.0:
                    x = xs[i + 1]
                else:
                    x = brentq(gap, xs[i], xs[i + 1], xtol=1e-12, rtol=4 * np.finfo(float).eps)
                rows.append({"parameter": row.parameter, "cycle": int(t), "state_index": int(s),
                             "threshold": x})  # fmt: skip
    return pd.DataFrame(rows, columns=["parameter", "cycle", "state_index", "threshold"])


def main(argv: list[str] | None = None) -> int:
    from synthetic_cohort import demo_model_path

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", default=str(demo_model_path()))
    parser.add_argument("--grid", type=int, default=11)
    parser.add_argument("--parameters", nargs="*", default=None)
    args = parser.parse_args(argv)
    print(CAUTION_SHORT, file=sys.stderr)

    model = load_model(args.model)
    objective = default_objective(model)
    ranges = parameter_ranges(model, args.parameters)
    names = list(ranges["parameter"])
    print(f"model: {model.title} ({len(names)} parameters, grid {args.grid})")

    # Warm-up of both paths (imports, first-call costs) so neither timing pays them.
    one_way(model, names[:1], objective=objective)
    solve_one(model, objective, names[0], float(ranges["base"].iloc[0]))

    start, cpu = time.perf_counter(), time.process_time()
    batched_one = one_way(model, names, objective=objective)
    batched_thr = parameter_thresholds(model, names, objective=objective, grid=args.grid)
    t_batch, c_batch = time.perf_counter() - start, time.process_time() - cpu

    print("reference: re-solving one parameter set at a time ...", file=sys.stderr)
    start, cpu = time.perf_counter(), time.process_time()
    ref_base, ref_values, ref_switched = reference_one_way(model, objective, ranges)
    ref_thr = reference_thresholds(model, objective, ranges, args.grid)
    t_ref, c_ref = time.perf_counter() - start, time.process_time() - cpu

    # --- identical results ----------------------------------------------------------
    table = batched_one.table.set_index("parameter").loc[names]
    np.testing.assert_allclose(table[["value_low", "value_high"]].to_numpy(), ref_values,
                               rtol=1e-9, atol=1e-9)  # fmt: skip
    assert abs(batched_one.base_value - ref_base) <= 1e-9 * max(1.0, abs(ref_base))
    states = list(compile_model(model).state_ids)
    sw = batched_one.switches
    ours = sorted(zip(sw["parameter"], sw["end"], sw["cycle"].astype(int),
                      sw["state"].map(states.index), strict=True))  # fmt: skip
    assert ours == sorted(ref_switched), "policy switches differ"
    found = batched_thr[batched_thr["status"] == "switch"].assign(
        state_index=lambda f: f["state"].map(states.index), cycle=lambda f: f["cycle"].astype(int)
    )
    keys = ["parameter", "cycle", "state_index"]
    merged = found.merge(ref_thr, on=keys, how="outer", suffixes=("", "_ref"), indicator=True)
    assert (merged["_merge"] == "both").all(), "different brackets found"
    span = merged["high"] - merged["low"]
    worst = float((np.abs(merged["threshold"] - merged["threshold_ref"]) / span).max())
    assert worst <= 1e-9, f"thresholds differ by {worst:g} x range"

    print(f"one-way sets: {1 + 2 * len(names)}; thresholds found: {len(found)}")
    print(f"batched (one-way + thresholds): {t_batch:8.2f} s wall, {c_batch:8.2f} s CPU")
    print(f"one set at a time (reference):  {t_ref:8.2f} s wall, {c_ref:8.2f} s CPU")
    print(f"speed-up: {t_ref / t_batch:6.1f}x wall, {c_ref / c_batch:6.1f}x CPU (target >= 10x)")
    print(f"results identical: one-way values, {len(ours)} one-way policy switches, "
          f"{len(found)} thresholds (largest difference {worst:.2e} x range)")  # fmt: skip
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
