"""Compile benchmark: ``compile_model`` on the SYNTHETIC demo model, this path vs the former ones.

Not a test: prints CPU times measured in this run on this machine, and their ratios.

The demo model gives stage-2 and stage-3 rows as rates with age-dependent background
mortality, so without the common exit factored out ``compile_model`` exponentiates one
generator per draw x cycle (45 cycles). For each batch size (``--draws``, default 1,000
and 10,000):

* PSA-like batches: random draws from the parameter distributions
  (``caredecide.uncertainty.sampling.sample_parameters``), every generator different;
* one-way-like batches: every parameter moved over a grid across its range, one at a
  time (``caredecide.sensitivity.parameter_sets``), as one-way and threshold analyses do.

Each batch is compiled, alternately, best CPU time of ``--repeats``:

* ``current``: the compiler as it is (``caredecide.rate_rows``: the common exit factored
  out, one exponential per draw; each distinct column once);
* ``unfactored``: the same compiler with ``_RATE_ROWS["factor"] = False`` (one exponential
  per distinct (draw, cycle) column);
* ``first``: the first rate-row path (uniformization of the whole 7 x 7 matrices, every
  draw and cycle, no de-duplication), through the same switch;
* ``baseline`` (with ``--baseline PATH``, a checkout of an older caredecide, e.g.
  ``git archive <commit> | tar -x -C /tmp/old``): that version's ``compile_model`` on the
  same parameter sets, in a fresh process (its moves, checks and copies as they were).

The arrays must agree with every other path to 1e-12; with and without de-duplication
they are identical. The peak traced memory (tracemalloc) of one compile is shown beside.

Then, on the generator stack of the first PSA-like batch, the matrix exponential alone:
Pade (current), uniformization (first) and ``scipy.linalg.expm`` (a reference library;
it loops in Python over the stack, one matrix at a time), with the largest difference
from scipy.

Run: python benchmarks/bench_compile.py [--draws 1000 10000] [--repeats 3] [--scipy-draws N]
     [--baseline PATH]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable
from pathlib import Path
from unittest import mock

import numpy as np
import pandas as pd
import scipy.linalg

from caredecide import compile as compile_module
from caredecide import conversions, rate_rows
from caredecide.cautions import CAUTION_SHORT
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.sensitivity import parameter_ranges, parameter_sets
from caredecide.uncertainty.sampling import sample_parameters

sys.path.insert(0, str(Path(__file__).resolve().parent))
from child_runs import run_child

PATHS: dict[str, dict | None] = {
    "current": None,
    "unfactored": {"factor": False},
    "first": {"deduplicate": False, "method": "uniformization", "factor": False},
}
"""Rate-row options of each in-process path (``caredecide.compile._RATE_ROWS``)."""
NOT_DEDUPLICATED = {"deduplicate": False}
AGREEMENT = 1e-12
ARRAYS = ("transition", "state_qaly", "state_cost", "decision_qaly", "decision_cost")
DEMO = Path("synthetic_cohort") / "models" / "demo_progressive.toml"  # of each version

BASELINE_CHILD = r"""
import json, sys, time, tracemalloc
sys.path.insert(0, {src!r})
import numpy as np
import caredecide
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
data = np.load({sets!r})
sets = {{name: data[name] for name in data.files}}
model = load_model({model!r})
compile_model(model, {{name: v[:2] for name, v in sets.items()}})  # imports, compiled loops
best = float("inf")
for _ in range({repeats!r}):
    start = time.process_time()
    compiled = compile_model(model, sets)
    best = min(best, time.process_time() - start)
    del compiled
tracemalloc.start()
compiled = compile_model(model, sets)
peak = tracemalloc.get_traced_memory()[1]
tracemalloc.stop()
np.savez({out!r}, **{{name: getattr(compiled, name) for name in {arrays!r}}})
print(json.dumps({{"cpu": best, "peak": peak, "source": caredecide.__file__}}))
"""


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
    """Best CPU time of each run over ``repeats`` rounds, alternating; last outputs."""
    times = dict.fromkeys(runs, np.inf)
    outputs: dict[str, object] = {}
    for _ in range(repeats):
        for name, run in runs.items():
            outputs.pop(name, None)  # the previous result is not held during the run
            start = time.process_time()
            outputs[name] = run()
            times[name] = min(times[name], time.process_time() - start)
    return times, outputs


def traced_peak(run: Callable[[], object]) -> int:
    """Peak bytes traced while ``run`` runs (its result is dropped)."""
    tracemalloc.start()
    try:
        run()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def run_baseline(src: Path, sets: pd.DataFrame, repeats: int) -> tuple[dict, dict]:
    """The older checkout's compile of ``sets`` in a fresh process: (timing, arrays)."""
    with tempfile.TemporaryDirectory() as folder:
        sets_file, out_file = f"{folder}/sets.npz", f"{folder}/arrays.npz"
        np.savez(sets_file, **{str(c): sets[c].to_numpy(dtype=float) for c in sets.columns})
        code = BASELINE_CHILD.format(
            src=str(src),
            sets=sets_file,
            model=str(src / DEMO),
            repeats=repeats,
            out=out_file,
            arrays=ARRAYS,
        )
        info = run_child(code, f"baseline run ({src})", checkout=src)
        with np.load(out_file) as data:
            return info, {name: data[name] for name in ARRAYS}


def largest_difference(a: dict | object, b: dict | object) -> float:
    """Largest absolute difference over the compiled arrays (objects or name -> array)."""

    def arrays(x):
        return x if isinstance(x, dict) else {name: getattr(x, name) for name in ARRAYS}

    first, second = arrays(a), arrays(b)
    return max(float(np.abs(first[name] - second[name]).max()) for name in ARRAYS)


def compare_batch(
    model, label: str, sets: pd.DataFrame, repeats: int, baseline: Path | None
) -> dict[str, float]:
    """Time every path on one batch, check agreement, print one line; the CPU times."""
    paths = {**PATHS, "not de-duplicated": NOT_DEDUPLICATED}
    times = dict.fromkeys(paths, np.inf)
    differences: dict[str, float] = {}
    current = None
    for _ in range(repeats):  # alternating; only the current result is held
        for name, options in paths.items():
            if name == "current":
                current = None
            start = time.process_time()
            result = compile_with(model, sets, options)
            times[name] = min(times[name], time.process_time() - start)
            if name == "current":
                current = result
            elif name == "not de-duplicated":
                for array in ARRAYS:
                    assert np.array_equal(getattr(current, array), getattr(result, array)), array
            else:
                differences[name] = largest_difference(current, result)
            del result
    peaks = {
        name: traced_peak(lambda o=options: compile_with(model, sets, o))
        for name, options in (("current", None), ("unfactored", PATHS["unfactored"]))
    }
    if baseline is not None:
        info, arrays = run_baseline(baseline, sets, repeats)
        times["baseline"], peaks["baseline"] = info["cpu"], info["peak"]
        differences["baseline"] = largest_difference(current, arrays)
        del arrays
    for name, difference in differences.items():
        assert difference <= AGREEMENT, f"{label}: {name} differs by {difference:g}"
    parts = [f"current {times['current']:6.3f} s (peak {peaks['current'] / 2**20:5.0f} MiB)"]
    for name in ("unfactored", "first", "baseline"):
        if name in times:
            ratio = times[name] / times["current"]
            peak = f", peak {peaks[name] / 2**20:5.0f} MiB" if name in peaks else ""
            parts.append(f"{name} {times[name]:6.3f} s = {ratio:5.1f}x{peak}")
    print(
        f"{label:>9} {len(sets):>7,d} sets | "
        + " | ".join(parts)
        + f" | largest difference {max(differences.values()):.1e}"
    )
    return times


def generator_stack(model, sets: pd.DataFrame) -> np.ndarray:
    """The (N, S, S) generators x cycle length of the unfactored path (one per draw x
    cycle), as ``compile_model`` exponentiates them."""
    seen: list[np.ndarray] = []
    exponential = rate_rows._generator_exponential

    def record(Q, method="pade"):
        seen.append(Q.copy())
        return exponential(Q, method)

    with (
        mock.patch.object(rate_rows, "_generator_exponential", record),
        mock.patch.dict(compile_module._RATE_ROWS, {"deduplicate": False, "factor": False}),
    ):
        compile_model(model, sets)
    Q = np.concatenate(seen)
    return Q.reshape(-1, *Q.shape[-2:])


def compare_exponential(Q: np.ndarray, repeats: int) -> None:
    """The matrix exponential alone: Pade, uniformization, scipy.linalg.expm looped."""
    runs = {
        "pade": lambda: conversions._generator_exponential(Q),
        "uniformization": lambda: conversions._generator_exponential(Q, "uniformization"),
        "scipy": lambda: np.stack([scipy.linalg.expm(q) for q in Q]),
    }
    times, out = best_times(runs, repeats)
    reference = out["scipy"]
    print(f"matrix exponential of {len(Q):,d} generators ({Q.shape[-1]} states):")
    for name in ("pade", "uniformization"):
        difference = float(np.abs(out[name] - reference).max())
        assert difference <= AGREEMENT, f"{name} differs from scipy.linalg.expm by {difference:g}"
        print(
            f"  {name:>14}: {times[name]:7.3f} s | scipy.linalg.expm looped "
            f"{times['scipy']:7.3f} s | {times['scipy'] / times[name]:6.1f}x | largest "
            f"difference from scipy {difference:.1e}"
        )


def main(argv: list[str] | None = None) -> int:
    from synthetic_cohort import demo_model_path

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", default=str(demo_model_path()))
    parser.add_argument("--draws", type=int, nargs="+", default=[1000, 10000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--scipy-draws", type=int, default=200)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--baseline", type=Path, default=None)
    args = parser.parse_args(argv)
    print(CAUTION_SHORT, file=sys.stderr)

    model = load_model(args.model)
    print(f"model: {model.title}")
    print("CPU seconds, best of", args.repeats, "(ratios: that path / current)")
    compile_model(model, sample_parameters(model, 2, args.seed))  # warm-up: imports
    for n_draws in args.draws:
        psa = sample_parameters(model, n_draws, args.seed)
        compare_batch(model, "PSA-like", psa, args.repeats, args.baseline)
        compare_batch(model, "one-way", one_way_like(model, n_draws), args.repeats, None)
    Q = generator_stack(model, sample_parameters(model, args.scipy_draws, args.seed))
    compare_exponential(Q, args.repeats)
    print(
        f"arrays agree with every other path to {AGREEMENT:g}; with and without "
        "de-duplication they are identical"
    )
    print(f"(machine load while measured: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
