"""Finite-horizon kernels against the plain batched numpy reference, in one run.

Not a test: prints times measured in this run on this machine, and their ratios.

Model: the SYNTHETIC 12-state, 3-action model of ``bench_solver.py`` (invented numbers)
over 60 yearly cycles with age-dependent background mortality, so the transitions vary by
cycle: (D, 60, 3, 12, 12). Three ways of solving the same compiled arrays, interleaved
(reference, numpy path, kernel, reference, ...), median CPU seconds of the repeats:

* ``plain``: :func:`plain_reference.plain_backward_induction` (~20 lines of numpy);
* ``numpy path``: ``caredecide.solvers.solve`` with ``CAREDECIDE_KERNELS=numpy``;
* ``kernel``: ``caredecide.solvers.solve`` (compiled loops), every output kept;
* ``kernel lean``: the same with ``action_values=False`` (policy, values and ties only,
  what the plain reference returns; what a probabilistic analysis asks for).

Policies must agree outside the states the project reports as ties, and values to 1e-9
relative, before any ratio is printed. Then the same for the cohort trace of the optimal
policy (``plain_cohort_trace`` against ``caredecide.evaluate.evaluate_policy`` and the
totals alone, ``policy_totals``), the read
bandwidth of the machine, and one draw solved repeatedly (the app and the threshold search
call the solver on one parameter set thousands of times).

Run: python benchmarks/bench_kernels.py [--draws 10000] [--repeats 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

# One thread for every BLAS: CPU seconds then compare single-threaded work (threaded BLAS
# spins and inflates CPU time on a shared machine). Set before numpy is imported.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))

from bench_solver import WTP, draws_frame, model_text  # noqa: E402
from plain_reference import plain_backward_induction, plain_cohort_trace  # noqa: E402

from caredecide.compile import compile_model  # noqa: E402
from caredecide.evaluate import evaluate_policy, policy_totals  # noqa: E402
from caredecide.modelfile import load_model  # noqa: E402
from caredecide.objective import Objective  # noqa: E402
from caredecide.solvers import solve  # noqa: E402

OBJECTIVE = Objective("net_benefit", WTP)


def compiled_model(n_draws: int, chunk: int = 1000):
    """The finite model compiled for ``n_draws`` draws (in chunks, then joined)."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "bench_finite.toml"
        path.write_text(model_text(finite=True), encoding="utf-8")
        model = load_model(path)
    draws = draws_frame(n_draws)
    parts = [compile_model(model, draws.iloc[i : i + chunk]) for i in range(0, n_draws, chunk)]
    names = ("transition", "state_qaly", "state_cost", "decision_qaly", "decision_cost")
    joined = {name: np.concatenate([getattr(p, name) for p in parts]) for name in names}
    return replace(parts[0], **joined)


def bandwidth_gbps(n_bytes: int = 512 * 1024**2, repeats: int = 5) -> float:
    """Memory-read bandwidth (GB/s): best CPU time of numpy sums over a large array."""
    array = np.ones(n_bytes // 8)
    best = np.inf
    for _ in range(repeats):
        start = time.process_time()
        array.sum()
        best = min(best, time.process_time() - start)
    return n_bytes / best / 1e9


def with_path(path: str, function, *args, **kwargs):
    """Call ``function`` on the numpy path (``path="numpy"``) or the kernels."""
    os.environ["CAREDECIDE_KERNELS"] = path
    try:
        return function(*args, **kwargs)
    finally:
        os.environ.pop("CAREDECIDE_KERNELS", None)


def timed(function, *args, **kwargs) -> tuple[float, object]:
    """CPU seconds of this process (steadier than wall time on a shared machine)."""
    start = time.process_time()
    out = function(*args, **kwargs)
    return time.process_time() - start, out


def interleaved(cases: dict, repeats: int) -> tuple[dict[str, float], dict[str, object]]:
    """Median seconds of each case, the cases run in turn ``repeats`` times."""
    seconds: dict[str, list[float]] = {name: [] for name in cases}
    outputs = {}
    for _ in range(repeats):
        for name, call in cases.items():
            elapsed, outputs[name] = timed(call)
            seconds[name].append(elapsed)
    return {name: statistics.median(s) for name, s in seconds.items()}, outputs


def check_solutions(reference, result) -> str:
    policy, value = reference
    decided = ~result.indifferent & result.decision_states
    mismatch = int(((policy != result.policy) & decided).sum())
    scale = np.abs(value).max()
    diff = float(np.abs(value - result.value).max())
    if mismatch or diff > 1e-9 * scale:
        raise SystemExit(f"answers disagree: {mismatch} policy differences, value diff {diff:g}")
    return f"policies agree outside {int((~decided & result.decision_states).sum())} ties; " + (
        f"max |value difference| {diff:.1e} (values up to {scale:.3g})"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--one-draw-calls", type=int, default=300)
    args = parser.parse_args()
    print("SYNTHETIC benchmark model (invented numbers); research use only.")
    model = compiled_model(args.draws)
    solve(model.take_draws(slice(0, 2)), OBJECTIVE)  # compile or load the kernels once
    print(
        f"== backward induction: {args.draws} draws x {model.n_cycles} cycles x "
        f"{model.n_states} states x {model.n_actions} actions; transitions "
        f"{model.transition.nbytes / 1024**2:.0f} MiB; median of {args.repeats}, interleaved =="
    )
    times, outputs = interleaved(
        {
            "plain": lambda: plain_backward_induction(model, WTP),
            "numpy path": lambda: with_path("numpy", solve, model, OBJECTIVE),
            "kernel": lambda: solve(model, OBJECTIVE),
            "kernel lean": lambda: solve(model, OBJECTIVE, action_values=False),
        },
        args.repeats,
    )
    print("numpy path:  " + check_solutions(outputs["plain"], outputs["numpy path"]))
    print("kernel:      " + check_solutions(outputs["plain"], outputs["kernel"]))
    print("kernel lean: " + check_solutions(outputs["plain"], outputs["kernel lean"]))
    gbps = bandwidth_gbps()
    for name, seconds in times.items():
        share = model.transition.nbytes / seconds / (gbps * 1e9)
        print(
            f"{name:12s} {seconds:9.4g} s   plain / this {times['plain'] / seconds:6.2f}x   "
            f"transitions read at {share:.2f} of the measured bandwidth"
        )
    print(f"measured read bandwidth (numpy sum of 512 MiB): {gbps:.1f} GB/s")
    best_numpy = min(times["plain"], times["numpy path"])
    for name in ("kernel", "kernel lean"):
        print(
            f"{name} vs best numpy version (numpy path or plain): "
            f"{best_numpy / times[name]:.2f}x (target >= 2x)"
        )

    policy = outputs["kernel"].policy
    times, outputs = interleaved(
        {
            "plain trace": lambda: plain_cohort_trace(model, policy),
            "numpy path": lambda: with_path("numpy", evaluate_policy, model, policy, OBJECTIVE),
            "kernel": lambda: evaluate_policy(model, policy, OBJECTIVE),
            "totals only": lambda: policy_totals(model, [policy], OBJECTIVE)[0],
        },
        args.repeats,
    )
    for name in ("qalys", "costs", "value"):
        kept, alone = getattr(outputs["kernel"], name), getattr(outputs["totals only"], name)
        if not np.allclose(kept, alone, rtol=1e-12, atol=0):
            raise SystemExit(f"totals disagree ({name}): {np.abs(kept - alone).max():g}")
    for name in ("numpy path", "kernel"):
        diff = float(np.abs(outputs[name].trace - outputs["plain trace"]).max())
        if diff > 1e-12:
            raise SystemExit(f"cohort traces disagree ({name}): {diff:g}")
    print(
        "\n== policy evaluation of the optimal policy (trace + totals; totals only: "
        "policy_totals); traces and totals agree =="
    )
    for name, seconds in times.items():
        print(
            f"{name:12s} {seconds:9.4g} s   "
            f"plain trace / this {times['plain trace'] / seconds:6.2f}x"
        )

    one = model.take_draws(slice(0, 1))
    n = args.one_draw_calls
    times, outputs = interleaved(
        {
            "plain": lambda: [plain_backward_induction(one, WTP) for _ in range(n)],
            "numpy path": lambda: [with_path("numpy", solve, one, OBJECTIVE) for _ in range(n)],
            "kernel": lambda: [solve(one, OBJECTIVE) for _ in range(n)],
        },
        args.repeats,
    )
    check_solutions(outputs["plain"][0], outputs["kernel"][0])
    print(f"\n== one draw, solved {n} times per repeat (answers agree) ==")
    for name, seconds in times.items():
        print(
            f"{name:12s} {seconds / n * 1e3:8.3f} ms per call   this / plain "
            f"{seconds / times['plain']:5.2f}x (target <= 1.5x)"
        )
    print("(machine shared with other jobs: absolute times are noisy; ratios are same-run)")


if __name__ == "__main__":
    main()
