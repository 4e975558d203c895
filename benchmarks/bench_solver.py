"""Solver benchmark: batched solver vs quantecon DiscreteDP looped over draws; memory.

Not a test: prints ratios measured in this run on this machine.

1. 10,000 parameter draws of a 12-state, 3-action stationary model (SYNTHETIC: invented
   numbers), solved to the same tolerance by our batched policy and value iteration and
   by quantecon.markov.DiscreteDP looped over draws (policy iteration: every draw;
   value iteration: a subset, scaled, as said in the output). Policies must agree.
2. The same model over a 60-cycle horizon with age-dependent background mortality,
   10,000 draws through the batch driver (compile -> solve -> evaluate, chunked), run in
   a subprocess whose peak resident memory is read with resource.getrusage; time per draw
   is printed beside the machine's memory-read bandwidth measured with numpy.

Run: python benchmarks/bench_solver.py [--draws 10000] [--vi-subset 500]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from caredecide.batch import solve_batch
from caredecide.compile import compile_model
from caredecide.modelfile import load_model
from caredecide.objective import Objective
from caredecide.solvers import solve

N_STAGES = 11  # + dead = 12 states
ACTIONS = (
    ("wait", None, None),
    ("treat_standard", "hr_standard", "c_standard"),
    ("treat_intensive", "hr_intensive", "c_intensive"),
)
TOLERANCE = 1e-8  # relative to the largest |value| of each draw (values in money are large);
# quantecon is given the same epsilon per draw in money: TOLERANCE x max_s |v(s)|
WTP = 30_000.0
MEMORY_BUDGET = 256 * 1024**2  # working-memory budget per chunk of the finite-horizon run


def model_text(finite: bool) -> str:
    """TOML of a SYNTHETIC 12-state, 3-action benchmark model (all numbers invented)."""
    lines = [
        "# SYNTHETIC benchmark model: invented numbers, research use only.",
        "format = 2",
        'title = "Synthetic benchmark: 11 progressive stages, 3 treatment intensities"',
        "[settings]",
        "cycle_years = 1.0",
        'start = "stage_1"',
        "discount_outcomes = 0.035",
        "discount_costs = 0.035",
        'objective = "net_benefit"',
        f"willingness_to_pay = {WTP}",
        'within_cycle = "start"',
        "severity_order = [" + ", ".join(f'"stage_{k}"' for k in range(1, N_STAGES + 1)) + "]",
    ]
    lines += ["start_age = 40.0", "until_age = 100.0"] if finite else ['horizon = "infinite"']
    for k in range(1, N_STAGES + 1):
        lines += [
            "[[states]]",
            f'id = "stage_{k}"',
            f'qaly_weight = "u_base - 0.04 * {k}"',
            f'cost = "c_base * {k}"',
        ]
    lines += ["[[states]]", 'id = "dead"', "qaly_weight = 0.0", "cost = 0.0", "absorbing = true"]
    for action, _, cost in ACTIONS:
        lines += ["[[actions]]", f'id = "{action}"', 'allowed_in = "all"']
        if cost:
            lines.append(f'cost_per_cycle = "{cost}"')
    death = "background + p_death * {k}" if finite else "p_death * {k}"
    for action, hr, _ in ACTIONS:
        for k in range(1, N_STAGES + 1):
            lines.append(f"[transitions.{action}.stage_{k}]")
            if k < N_STAGES:
                progress = f"with_hr(p_progress, {hr})" if hr else "p_progress"
                lines.append(f'stage_{k + 1} = "{progress}"')
            lines += [f'dead = "{death.format(k=k)}"', f'stage_{k} = "rest"']
    parameters = {
        "p_progress": (0.12, "probability"),
        "p_death": (0.01, "probability"),
        "hr_standard": (0.7, "hazard_ratio"),
        "hr_intensive": (0.45, "hazard_ratio"),
        "c_standard": (1500.0, "cost"),
        "c_intensive": (5000.0, "cost"),
        "u_base": (0.92, "qaly_weight"),
        "c_base": (500.0, "cost"),
    }
    lines += parameter_lines(parameters)
    if finite:
        # Gompertz-Makeham constants as in the synthetic demo model (Bowers et al. 1997
        # Illustrative Life Table, from memory).
        lines += [
            "[mortality]",
            "gompertz_makeham = { a = 0.0007, b = 5e-5, c = 1.0964781961431852 }",
            'source = "Bowers et al. 1997 (from memory), synthetic cohort"',
        ]
    return "\n".join(lines) + "\n"


def parameter_lines(parameters: dict[str, tuple[float, str]]) -> list[str]:
    """TOML lines of ``{name: (value, kind)}`` parameters, invented for a benchmark."""
    lines = []
    for name, (value, kind) in parameters.items():
        lines += [
            f"[parameters.{name}]",
            f"value = {value}",
            f'kind = "{kind}"',
            'source = "Synthetic: invented for the benchmark"',
        ]
        if kind == "probability":
            lines.append("per_years = 1.0")
    return lines


def draws_frame(n: int, seed: int = 2026) -> pd.DataFrame:
    """Parameter draws (uniform ranges, invented for the benchmark)."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "p_progress": rng.uniform(0.05, 0.2, n),
            "p_death": rng.uniform(0.005, 0.015, n),
            "hr_standard": rng.uniform(0.5, 0.9, n),
            "hr_intensive": rng.uniform(0.3, 0.7, n),
            "c_standard": rng.uniform(500, 3000, n),
            "c_intensive": rng.uniform(2000, 9000, n),
            "u_base": rng.uniform(0.85, 0.95, n),
            "c_base": rng.uniform(200, 800, n),
        }
    )


def write_model(folder: Path, finite: bool) -> Path:
    path = folder / ("bench_finite.toml" if finite else "bench_stationary.toml")
    path.write_text(model_text(finite), encoding="utf-8")
    return path


def quantecon_arrays(compiled, objective, d):
    """R (S, A) and Q (S, A, S) of draw ``d`` for quantecon, built from the same arrays."""
    from caredecide.solvers.stationary import StationaryProblem

    problem = StationaryProblem(compiled.take_draws(slice(d, d + 1)), objective)
    A, S = problem.shape[1:]
    return problem.R[0].T, problem.P[0].reshape(A, S, S).transpose(1, 0, 2), problem.gamma


def bandwidth_gbps(n_bytes: int = 512 * 1024**2, repeats: int = 5) -> float:
    """Memory-read bandwidth (GB/s): best of ``repeats`` numpy sums over a large array."""
    array = np.ones(n_bytes // 8)
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        array.sum()
        best = min(best, time.perf_counter() - start)
    return n_bytes / best / 1e9


def stationary_part(folder: Path, n_draws: int, vi_subset: int) -> None:
    from quantecon.markov import DiscreteDP

    model = load_model(write_model(folder, finite=False))
    objective = Objective("net_benefit", WTP)
    start = time.perf_counter()
    compiled = compile_model(model, draws_frame(n_draws))
    t_compile = time.perf_counter() - start
    timings, results = {}, {}
    for method in ("policy_iteration", "value_iteration", "modified_policy_iteration"):
        start = time.perf_counter()
        results[method] = solve(
            compiled,
            objective,
            method=method,
            tolerance=TOLERANCE,
            relative=True,
            max_iterations=100_000,
        )
        timings[method] = time.perf_counter() - start

    arrays = [quantecon_arrays(compiled, objective, d) for d in range(n_draws)]
    start = time.perf_counter()
    qe_pi = [DiscreteDP(R, Q, g).solve("policy_iteration", max_iter=10_000) for R, Q, g in arrays]
    t_qe_pi = time.perf_counter() - start
    subset = min(vi_subset, n_draws)
    start = time.perf_counter()
    # The same relative epsilon as ours, turned into money per draw for quantecon.
    epsilon = TOLERANCE * np.abs(results["policy_iteration"].value[:, 0]).max(axis=-1)
    qe_vi = [
        DiscreteDP(R, Q, g).solve("value_iteration", epsilon=float(epsilon[d]), max_iter=100_000)
        for d, (R, Q, g) in enumerate(arrays[:subset])
    ]
    t_qe_vi = (time.perf_counter() - start) * n_draws / subset

    ours = results["policy_iteration"]
    sigma = np.array([r.sigma for r in qe_pi])
    decided = ~ours.indifferent[:, 0] & ours.decision_states
    mismatch = int(((ours.policy[:, 0] != sigma) & decided).sum())
    values = np.array([r.v for r in qe_pi])
    max_diff = float(np.abs(ours.value[:, 0] - values).max())
    vi_sigma = np.array([r.sigma for r in qe_vi])
    vi_mismatch = int(
        (
            (results["value_iteration"].policy[:subset, 0] != vi_sigma)
            & ~results["value_iteration"].indifferent[:subset, 0]
            & ours.decision_states
        ).sum()
    )

    print(
        f"== 1. stationary model: {n_draws} draws, 12 states, 3 actions, "
        f"gamma = {1 / 1.035:.6f}, tolerance {TOLERANCE} relative to max |value| per draw =="
    )
    print(f"compile (once, all draws): {t_compile:.2f} s")
    for method, seconds in timings.items():
        r = results[method]
        print(
            f"ours {method:27s} {seconds:8.3f} s  iterations {r.iterations:5d}  "
            f"max error bound {r.error_bound.max():.2e}  success {r.success}"
        )
    print(f"quantecon policy_iteration looped  {t_qe_pi:8.3f} s  (all {n_draws} draws)")
    print(
        f"quantecon value_iteration looped   {t_qe_vi:8.3f} s  (timed on {subset} draws, "
        f"scaled x{n_draws / subset:.0f}; iterations per draw: mean "
        f"{np.mean([r.num_iter for r in qe_vi]):.0f}, max {max(r.num_iter for r in qe_vi)})"
    )
    print(
        f"ratio quantecon PI loop / ours PI: {t_qe_pi / timings['policy_iteration']:8.1f}x "
        "(target >= 5x)"
    )
    print(
        f"ratio quantecon VI loop / ours PI: {t_qe_vi / timings['policy_iteration']:8.1f}x "
        "(target >= 100x)"
    )
    print(f"ratio quantecon VI loop / ours VI: {t_qe_vi / timings['value_iteration']:8.1f}x")
    print(
        f"policies: {mismatch} differences from quantecon PI outside reported ties "
        f"({int((~decided & ours.decision_states).sum())} tied state-draws); "
        f"{vi_mismatch} differences VI vs quantecon VI on the subset; "
        f"max |value difference| vs quantecon PI {max_diff:.2e} money"
    )


def finite_child(n_draws: int) -> None:
    """Runs in a subprocess: the chunked finite-horizon batch; prints one JSON line."""
    folder = Path(sys.argv[sys.argv.index("--folder") + 1])
    model = load_model(folder / "bench_finite.toml")
    draws = draws_frame(n_draws)
    start = time.perf_counter()
    batch = solve_batch(
        model,
        draws,
        Objective("net_benefit", WTP),
        memory_limit_bytes=MEMORY_BUDGET,
        keep=("policy", "value", "totals"),
    )
    seconds = time.perf_counter() - start
    # Breakdown on one chunk: compile vs solve.
    chunk = draws.iloc[: batch.chunk_size]
    start = time.perf_counter()
    compiled = compile_model(model, chunk)
    t_compile = time.perf_counter() - start
    start = time.perf_counter()
    solve(compiled, Objective("net_benefit", WTP))
    t_solve = time.perf_counter() - start
    print(
        json.dumps(
            {
                "seconds": seconds,
                "chunk_size": batch.chunk_size,
                "iterations": batch.iterations[0],
                "chunks": len(batch.iterations),
                "peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
                "transition_bytes_per_draw": compiled.transition[0].nbytes,
                "chunk_compile_seconds": t_compile,
                "chunk_solve_seconds": t_solve,
                "treat_share": float((batch.fields["policy"] > 0).mean()),
            }
        )
    )


def finite_part(folder: Path, n_draws: int) -> None:
    write_model(folder, finite=True)
    out = subprocess.run(
        [sys.executable, __file__, "--child-finite", str(n_draws), "--folder", str(folder)],
        capture_output=True,
        text=True,
        check=True,
    )
    info = json.loads(out.stdout.strip().splitlines()[-1])
    gbps = bandwidth_gbps()
    per_draw = info["seconds"] / n_draws
    solve_per_draw = info["chunk_solve_seconds"] / info["chunk_size"]
    read_time = info["transition_bytes_per_draw"] / (gbps * 1e9)
    print(f"\n== 2. finite horizon: {n_draws} draws, 60 cycles, age-dependent mortality ==")
    print(
        f"chunks of {info['chunk_size']} draws ({info['chunks']} chunks, memory budget "
        f"{MEMORY_BUDGET / 1024**2:.0f} MiB per chunk); backward induction iterations "
        f"{info['iterations']} per chunk"
    )
    print(
        f"peak resident memory of the run (subprocess, getrusage): "
        f"{info['peak_rss_bytes'] / 1024**2:.0f} MiB (target < 1024 MiB)"
    )
    print(
        f"total {info['seconds']:.2f} s = {per_draw * 1e3:.3f} ms per draw (compile + solve "
        f"+ evaluate); one chunk: compile {info['chunk_compile_seconds']:.2f} s, solve "
        f"{info['chunk_solve_seconds']:.2f} s"
    )
    print(
        f"memory-read bandwidth (numpy sum, this machine): {gbps:.1f} GB/s; reading one "
        f"draw's transitions ({info['transition_bytes_per_draw'] / 1024:.0f} KiB) once "
        f"takes {read_time * 1e6:.1f} us; solve per draw {solve_per_draw * 1e6:.1f} us "
        f"= {solve_per_draw / read_time:.1f}x that read"
    )
    print(f"share of (draw, cycle, state) choosing a treatment: {info['treat_share']:.3f}")


def main() -> None:
    if "--child-finite" in sys.argv:
        finite_child(int(sys.argv[sys.argv.index("--child-finite") + 1]))
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--vi-subset", type=int, default=500)
    args = parser.parse_args()
    print("SYNTHETIC benchmark models (invented numbers); research use only.")
    with tempfile.TemporaryDirectory() as folder:
        stationary_part(Path(folder), args.draws, args.vi_subset)
        finite_part(Path(folder), args.draws)


if __name__ == "__main__":
    main()
