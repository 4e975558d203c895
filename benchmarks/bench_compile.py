"""Compile benchmark: rate rows of the SYNTHETIC demo model, current path vs the former one.

Not a test: prints times measured in this run on this machine and their ratios.

The demo model gives stage-2 and stage-3 rows as rates with age-dependent background
mortality, so ``compile_model`` exponentiates one generator per draw x cycle x action
(45 cycles, 2 actions). For each batch size (``--draws``, default 1,000 and 10,000):

* PSA-like batches: random draws from the parameter distributions
  (``caredecide.uncertainty.sampling.sample_parameters``), every generator different;
* one-way-like batches: every parameter moved over a grid across its range, one at a
  time (``caredecide.sensitivity.parameter_sets``), as one-way and threshold analyses do.

``compile_model`` is timed with the current rate-row path (Pade scaling and squaring on
the block of states that have or receive rates, each distinct rate column once) and with
the former path (uniformization of the whole 7 x 7 matrices, every draw and cycle; the
``_RATE_ROWS`` switch of ``caredecide.compile``). Both are run alternately, best of
``--repeats``; the arrays must agree to 1e-12 and the de-duplicated result must equal
the plain one bit for bit.

Then, on the generator stack of the first PSA-like batch, the matrix exponential alone:
current path, former path and ``scipy.linalg.expm`` (a reference library; it loops in
Python over the stack, one matrix at a time), with the largest difference from scipy.

Run: python benchmarks/bench_compile.py [--draws 1000 10000] [--repeats 3] [--scipy-draws N]
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from unittest import mock

import numpy as np
import pandas as pd
import scipy.linalg

from caredecide import compile as compile_module
from caredecide import conversions
from caredecide.cautions import CAUTION_SHORT
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.sensitivity import parameter_ranges, parameter_sets
from caredecide.uncertainty.sampling import sample_parameters

FORMER = {"deduplicate": False, "method": "uniformization", "factor": False}
"""The rate-row path before this benchmark existed: whole matrices, no de-duplication."""
PLAIN_PADE = {"deduplicate": False, "method": "pade"}
AGREEMENT = 1e-12
ARRAYS = ("transition", "state_qaly", "state_cost", "decision_qaly", "decision_cost")


def one_way_like(model, n_sets: int) -> pd.DataFrame:
    """About ``n_sets`` parameter sets moving one parameter at a time over its range."""
    ranges = parameter_ranges(model)
    ranges = ranges[ranges["varies"]]
    per_parameter = max(2, n_sets // len(ranges))
    frames = [
        parameter_sets(model, {row.parameter: np.linspace(row.low, row.high, per_parameter)})
        for row in ranges.itertuples()
    ]
    return pd.concat(frames, ignore_index=True)


def compile_with(model, sets: pd.DataFrame, options: dict | None):
    """``compile_model`` with the rate-row path ``options`` (None: the current default)."""
    if options is None:
        return compile_model(model, sets)
    with mock.patch.dict(compile_module._RATE_ROWS, options):
        return compile_model(model, sets)


def best_times(runs: dict[str, Callable[[], object]], repeats: int) -> tuple[dict, dict]:
    """Best wall time of each run over ``repeats`` rounds, alternating; last outputs."""
    times = dict.fromkeys(runs, np.inf)
    outputs: dict[str, object] = {}
    for _ in range(repeats):
        for name, run in runs.items():
            start = time.perf_counter()
            outputs[name] = run()
            times[name] = min(times[name], time.perf_counter() - start)
    return times, outputs


def compare_batch(model, label: str, sets: pd.DataFrame, repeats: int) -> float:
    """Time current vs former compile on one batch, check agreement, print; the ratio."""
    runs = {
        "current": lambda: compile_with(model, sets, None),
        "plain": lambda: compile_with(model, sets, PLAIN_PADE),
        "former": lambda: compile_with(model, sets, FORMER),
    }
    times, out = best_times(runs, repeats)
    current, plain, former = out["current"], out["plain"], out["former"]
    for name in ARRAYS:
        assert np.array_equal(getattr(current, name), getattr(plain, name)), name
        difference = np.abs(getattr(current, name) - getattr(former, name)).max()
        assert difference <= AGREEMENT, f"{name} differs from the former path by {difference:g}"
    largest = float(np.abs(current.transition - former.transition).max())
    ratio = times["former"] / times["current"]
    print(
        f"{label:>10} {len(sets):>7,d} sets | former {times['former']:7.2f} s | "
        f"current {times['current']:7.2f} s (without de-duplication {times['plain']:7.2f} s) "
        f"| {ratio:5.1f}x | largest difference {largest:.1e}"
    )
    return ratio


def generator_stack(model, sets: pd.DataFrame) -> np.ndarray:
    """The (N, S, S) generators x cycle length that ``compile_model`` exponentiates."""
    seen: list[np.ndarray] = []
    exponential = conversions._generator_exponential

    def record(Q, method="pade"):
        seen.append(Q.copy())
        return exponential(Q, method)

    with (
        mock.patch.object(conversions, "_generator_exponential", record),
        mock.patch.dict(compile_module._RATE_ROWS, {"deduplicate": False}),
    ):
        compile_model(model, sets)
    (Q,) = seen
    return Q.reshape(-1, *Q.shape[-2:])


def compare_exponential(Q: np.ndarray, repeats: int) -> None:
    """The matrix exponential alone: current, former, scipy.linalg.expm looped."""
    runs = {
        "current": lambda: conversions._generator_exponential(Q),
        "former": lambda: conversions._generator_exponential(Q, "uniformization"),
        "scipy": lambda: np.stack([scipy.linalg.expm(q) for q in Q]),
    }
    times, out = best_times(runs, repeats)
    reference = out["scipy"]
    print(f"matrix exponential of {len(Q):,d} generators ({Q.shape[-1]} states):")
    for name in ("current", "former"):
        difference = float(np.abs(out[name] - reference).max())
        assert difference <= AGREEMENT, f"{name} differs from scipy.linalg.expm by {difference:g}"
        print(
            f"  {name:>8}: {times[name]:7.3f} s | scipy.linalg.expm looped {times['scipy']:7.3f} s "
            f"| {times['scipy'] / times[name]:6.1f}x | largest difference from scipy "
            f"{difference:.1e}"
        )
    print(f"  current vs former: {times['former'] / times['current']:.1f}x")


def main(argv: list[str] | None = None) -> int:
    from synthetic_cohort import demo_model_path

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", default=str(demo_model_path()))
    parser.add_argument("--draws", type=int, nargs="+", default=[1000, 10000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--scipy-draws", type=int, default=200)
    parser.add_argument("--seed", type=int, default=20261202)
    args = parser.parse_args(argv)
    print(CAUTION_SHORT, file=sys.stderr)

    model = load_model(args.model)
    print(f"model: {model.title}")
    compile_model(model, sample_parameters(model, 2, args.seed))  # warm-up: imports
    for n_draws in args.draws:
        compare_batch(model, "PSA-like", sample_parameters(model, n_draws, args.seed), args.repeats)
        compare_batch(model, "one-way", one_way_like(model, n_draws), args.repeats)
    Q = generator_stack(model, sample_parameters(model, args.scipy_draws, args.seed))
    compare_exponential(Q, args.repeats)
    print(
        f"arrays agree with the former path to {AGREEMENT:g}; with and without "
        "de-duplication they are identical"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
