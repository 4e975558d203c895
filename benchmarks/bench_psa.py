"""Benchmark: probabilistic sensitivity analysis of the demo model, end to end.

Prints, for ``--draws`` draws (default 10,000) of the synthetic demo model:

* the end-to-end PSA (sampling, compile, solve, evaluation of every candidate policy,
  and all outputs: acceptability, expected loss, EVPI, curves, EVPPI, convergence) with
  the default chunking, and its peak memory (resident set size of a fresh process);
* beside it, the reference measured in the same run: the solver alone on the same
  parameter sets (compile + ``solve`` in the same chunks, no evaluation or outputs), and
  ``solve`` alone, so the ratios show what the analysis adds to the core;
* with ``--memory``: the peak memory per draw of one chunk of each bundled model beside
  the estimate the default chunk size is computed from;
* with ``--million``: one run of 1,000,000 draws, to show that memory stays bounded;
  ``--workers K`` runs it on a local Dask cluster of K processes. On the demo model this
  took 15 minutes on 2 cores (peak 1.25 GiB: a 4,000-draw chunk, 275 MiB of kept per-draw
  results joined at the end, and the interpreter), so ``--million-model light`` runs it
  on a small synthetic model embedded below (3 states, 20 cycles, no age dependence)
  for a quicker check.

Each measurement runs in its own subprocess so peak memory is that run's alone.
Not a test: run ``python benchmarks/bench_psa.py``.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

LIGHT_MODEL = """
format = 2
title = "Synthetic: light model for the million-draw memory check"
description = "Synthetic: invented for a benchmark; not a clinical scenario."

[settings]
cycle_years = 1.0
horizon_cycles = 20
start_age = 60.0
start = "well"
discount_outcomes = 0.03
discount_costs = 0.03
objective = "net_benefit"
willingness_to_pay = 20000.0
within_cycle = "trapezoid"

[[states]]
id = "well"
qaly_weight = 0.9
cost = 100.0

[[states]]
id = "sick"
qaly_weight = "u_sick"
cost = "c_sick"

[[states]]
id = "dead"
absorbing = true

[[actions]]
id = "wait"
allowed_in = "all"

[[actions]]
id = "treat"
allowed_in = ["sick"]
oneoff_cost = 500.0
cost_per_cycle = "c_drug"

[transitions.wait.well]
sick = "p_sick"
dead = 0.01
well = "rest"

[transitions.wait.sick]
dead = "p_die_sick"
sick = "rest"

[transitions.treat.sick]
dead = "with_rr(p_die_sick, rr_treat)"
sick = "rest"

[parameters.p_sick]
value = 0.1
source = "Synthetic: invented for a benchmark"
distribution = { type = "beta", mean = 0.1, se = 0.02 }

[parameters.p_die_sick]
value = 0.2
source = "Synthetic: invented for a benchmark"
distribution = { type = "beta", mean = 0.2, se = 0.04 }

[parameters.rr_treat]
value = 0.6
source = "Synthetic: invented for a benchmark"
distribution = { type = "lognormal", low = 0.4, high = 0.9 }

[parameters.u_sick]
value = 0.6
source = "Synthetic: invented for a benchmark"
distribution = { type = "beta", mean = 0.6, se = 0.05 }

[parameters.c_sick]
value = 2000.0
source = "Synthetic: invented for a benchmark"
distribution = { type = "gamma", mean = 2000.0, se = 400.0 }

[parameters.c_drug]
value = 1500.0
source = "Synthetic: invented for a benchmark"
distribution = { type = "gamma", mean = 1500.0, se = 300.0 }
"""


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _model(which: str):
    from caredecide.modelfile import load_model, loads_model
    from synthetic_cohort import demo_model_path

    if which == "light":
        return loads_model(LIGHT_MODEL, file="<light benchmark model>")
    return load_model(demo_model_path())


def child_psa(draws: int, seed: int, workers: int | None, which: str = "demo") -> dict:
    from caredecide.compile import default_memory_limit
    from caredecide.uncertainty.psa import (
        DEFAULT_MEMORY_LIMIT,
        analyse_uncertainty,
        default_chunk_size,
    )

    model = _model(which)
    start = time.perf_counter()
    if workers:
        from caredecide.uncertainty.cluster import dask_client, dask_map

        with dask_client(workers=workers) as client:
            result = analyse_uncertainty(model, draws, seed, map_chunks=dask_map(client))
            worker_peaks = client.run(_peak_mib)  # each worker process's own peak
    else:
        worker_peaks = {}
        result = analyse_uncertainty(model, draws, seed)
    solved = time.perf_counter()
    outputs = {
        "acceptability": result.acceptability_by_age_band(),
        "loss": result.expected_loss(),
        "evpi": result.evpi(),
        "curves": result.acceptability_curves(),
        "frontier": result.acceptability_frontier(),
        "evppi": result.evppi(),
        "convergence": result.convergence(),
    }
    done = time.perf_counter()
    return {
        "draws": draws,
        "chunk_size": default_chunk_size(model, draws, None),
        "budget_mib": min(DEFAULT_MEMORY_LIMIT, default_memory_limit()) / 2**20,
        "candidates": len(result.candidates),
        "solve_and_evaluate_s": solved - start,
        "outputs_s": done - solved,
        "total_s": done - start,
        "evpi": outputs["evpi"]["evpi"],
        "evpi_se": outputs["evpi"]["mc_se"],
        "peak_rss_mib": _peak_mib(),
        "worker_peak_rss_mib": max(worker_peaks.values(), default=0.0),
        "kept_bytes": int(
            result.parameters.nbytes + result.optimal.nbytes + result.candidate_totals.nbytes
        ),
    }


def child_solver(draws: int, seed: int) -> dict:
    from caredecide.compile import compile_model
    from caredecide.modelfile import load_model
    from caredecide.objective import Objective
    from caredecide.solvers import solve
    from caredecide.uncertainty.psa import chunk_ranges, default_chunk_size
    from caredecide.uncertainty.sampling import ParameterSampler
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    objective = Objective.from_settings(model.settings)
    sampler = ParameterSampler.from_model(model)
    compile_s = solve_s = sample_s = 0.0
    for start, stop in chunk_ranges(draws, default_chunk_size(model, draws, None)):
        t0 = time.perf_counter()
        values = sampler.draw(seed, start, stop)
        t1 = time.perf_counter()
        compiled = compile_model(model, {n: values[:, j] for j, n in enumerate(sampler.names)})
        t2 = time.perf_counter()
        solve(compiled, objective)
        t3 = time.perf_counter()
        del compiled  # as in the PSA: one chunk's arrays alive at a time
        sample_s, compile_s, solve_s = sample_s + t1 - t0, compile_s + t2 - t1, solve_s + t3 - t2
    return {
        "sample_s": sample_s,
        "compile_s": compile_s,
        "solve_s": solve_s,
        "peak_rss_mib": _peak_mib(),
    }


def child_memory(draws: int, path: str) -> dict:
    """Peak memory per draw of one chunk (compile, solve, evaluate) against the estimate."""
    import numpy as np

    from caredecide.compile import estimate_compiled_bytes
    from caredecide.modelfile import load_model
    from caredecide.objective import Objective
    from caredecide.uncertainty.psa import PSAContext, draw_bytes, solve_chunk
    from caredecide.uncertainty.sampling import ParameterSampler

    model = load_model(path)
    n_t = model.n_cycles() or 1
    context = PSAContext(
        model=model,
        objective=Objective.from_settings(model.settings),
        sampler=ParameterSampler.from_model(model),
        seed=1,
        candidate_policies=np.zeros((5, n_t, len(model.states)), np.int8),
    )
    solve_chunk(context, 0, 10)  # imports and caches warm
    before = _peak_mib()
    solve_chunk(context, 0, draws)
    per_draw = (_peak_mib() - before) * 2**20 / draws
    arrays = estimate_compiled_bytes(model, 1)
    return {
        "model": Path(path).stem,
        "measured_per_draw": per_draw,
        "arrays_per_draw": arrays,
        "estimate_per_draw": draw_bytes(model),
    }


def _run(kind: str, draws: int, seed: int, workers: int | None = None, which: str = "demo") -> dict:
    command = [
        sys.executable,
        __file__,
        "--child",
        kind,
        "--draws",
        str(draws),
        "--seed",
        str(seed),
        "--model",
        which,
    ]
    if kind == "memory":
        command[-2] = "--model-path"
    if workers:
        command += ["--workers", str(workers)]
    output = subprocess.run(command, check=True, capture_output=True, text=True, cwd=ROOT)
    return json.loads(output.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument(
        "--million",
        action="store_true",
        help="also run 1,000,000 draws and report peak memory (slow)",
    )
    parser.add_argument(
        "--workers",
        type=int,
        default=None,
        help="run the --million case on a local Dask cluster of K processes",
    )
    parser.add_argument(
        "--million-model",
        choices=("demo", "light"),
        default="demo",
        help="model of the --million run (light: small synthetic model)",
    )
    parser.add_argument(
        "--model", choices=("demo", "light"), default="demo", help=argparse.SUPPRESS
    )
    parser.add_argument(
        "--memory",
        action="store_true",
        help="measure the peak memory per draw of a 3,000-draw chunk of each "
        "bundled model against the chunk-size estimate, then stop",
    )
    parser.add_argument("--model-path", help=argparse.SUPPRESS)
    parser.add_argument("--child", choices=("psa", "solver", "memory"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child == "memory":
        print(json.dumps(child_memory(args.draws, args.model_path)))
        return
    if args.memory:
        print(
            "Peak working memory per draw of one 3,000-draw chunk (compile, solve, evaluate "
            "5 candidates), fresh process each (research use only):"
        )
        for path in sorted((ROOT / "synthetic_cohort" / "models").glob("*.toml")):
            m = _run("memory", 3000, args.seed, which=str(path))
            print(
                f"  {m['model']}: measured {m['measured_per_draw'] / 1024:.1f} KiB = "
                f"{m['measured_per_draw'] / m['arrays_per_draw']:.1f} x the compiled arrays "
                f"({m['arrays_per_draw'] / 1024:.1f} KiB); estimate "
                f"{m['estimate_per_draw'] / 1024:.1f} KiB "
                f"(measured / estimate {m['measured_per_draw'] / m['estimate_per_draw']:.2f})"
            )
        return
    if args.child == "psa":
        print(json.dumps(child_psa(args.draws, args.seed, args.workers, args.model)))
        return
    if args.child == "solver":
        print(json.dumps(child_solver(args.draws, args.seed)))
        return

    print(f"PSA benchmark: synthetic demo model, {args.draws:,} draws (research use only)")
    reference = _run("solver", args.draws, args.seed)
    psa = _run("psa", args.draws, args.seed)
    core = reference["compile_s"] + reference["solve_s"]
    print(
        f"  chunk size from the default memory budget ({psa['budget_mib']:.0f} MiB of working "
        f"memory per chunk): {psa['chunk_size']:,} draws; {psa['candidates']} candidate "
        "policies"
    )
    print(
        f"  reference, solver alone: sampling {reference['sample_s']:.2f} s, compile "
        f"{reference['compile_s']:.2f} s, solve {reference['solve_s']:.2f} s "
        f"(peak {reference['peak_rss_mib']:.0f} MiB)"
    )
    print(
        f"  PSA end to end: {psa['total_s']:.2f} s = draws solved and evaluated "
        f"{psa['solve_and_evaluate_s']:.2f} s + outputs {psa['outputs_s']:.2f} s "
        f"(peak {psa['peak_rss_mib']:.0f} MiB)"
    )
    print(
        f"  ratio PSA / (compile + solve): {psa['total_s'] / core:.2f}x; "
        f"PSA / solve alone: {psa['total_s'] / reference['solve_s']:.1f}x"
    )
    print(f"  EVPI of the timing decision {psa['evpi']:,.2f} (MC s.e. {psa['evpi_se']:,.2f})")
    if args.million:
        big = _run("psa", 1_000_000, args.seed, args.workers, args.million_model)
        print(
            f"  1,000,000 draws of the {args.million_model} model"
            f"{f' on {args.workers} Dask workers' if args.workers else ''}: "
            f"{big['total_s']:.0f} s (outputs {big['outputs_s']:.0f} s), chunk "
            f"{big['chunk_size']:,}, kept per-draw results {big['kept_bytes'] / 2**20:.0f} MiB, "
            f"peak {big['peak_rss_mib']:.0f} MiB of this process"
            + (
                f", largest worker peak {big['worker_peak_rss_mib']:.0f} MiB"
                if args.workers
                else ""
            )
        )


if __name__ == "__main__":
    main()
