"""Benchmark: probabilistic sensitivity analysis of the demo model, end to end.

Prints, for ``--draws`` draws (default 10,000) of the synthetic demo model:

* the end-to-end PSA (sampling, compile, solve, evaluation of every candidate policy,
  and all outputs: acceptability, expected loss, EVPI, curves, EVPPI, convergence) with
  the default chunking, and its peak memory (resident set size of a fresh process);
* beside it, the reference measured in the same run: the solver alone on the same
  parameter sets (compile + ``solve`` in the same chunks, no evaluation or outputs), and
  ``solve`` alone, so the ratios show what the analysis adds to the core;
* with ``--million``: one run of 1,000,000 draws, to show that memory stays bounded
  (takes long: most of the time is spent compiling the age-dependent competing-risk
  rows); ``--workers K`` runs it on a local Dask cluster of K processes.

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


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def child_psa(draws: int, seed: int, workers: int | None) -> dict:
    from caredecide.modelfile import load_model
    from caredecide.uncertainty.psa import default_chunk_size, run_psa
    from synthetic_cohort import demo_model_path

    model = load_model(demo_model_path())
    start = time.perf_counter()
    if workers:
        from caredecide.uncertainty.cluster import dask_client, dask_map

        with dask_client(workers=workers) as client:
            result = run_psa(model, draws, seed, map_chunks=dask_map(client))
            worker_peaks = client.run(_peak_mib)  # each worker process's own peak
    else:
        worker_peaks = {}
        result = run_psa(model, draws, seed)
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
        "candidates": len(result.candidates),
        "solve_and_evaluate_s": solved - start,
        "outputs_s": done - solved,
        "total_s": done - start,
        "evpi": outputs["evpi"]["evpi"],
        "evpi_se": outputs["evpi"]["mc_se"],
        "peak_rss_mib": _peak_mib(),
        "worker_peak_rss_mib": max(worker_peaks.values(), default=0.0),
        "kept_bytes": int(result.parameters.nbytes + result.optimal.nbytes
                          + result.candidate_totals.nbytes),
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
        sample_s, compile_s, solve_s = sample_s + t1 - t0, compile_s + t2 - t1, solve_s + t3 - t2
    return {"sample_s": sample_s, "compile_s": compile_s, "solve_s": solve_s,
            "peak_rss_mib": _peak_mib()}


def _run(kind: str, draws: int, seed: int, workers: int | None = None) -> dict:
    command = [sys.executable, __file__, "--child", kind, "--draws", str(draws), "--seed",
               str(seed)]
    if workers:
        command += ["--workers", str(workers)]
    output = subprocess.run(command, check=True, capture_output=True, text=True, cwd=ROOT)
    return json.loads(output.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--million", action="store_true",
                        help="also run 1,000,000 draws and report peak memory (slow)")
    parser.add_argument("--workers", type=int, default=None,
                        help="run the --million case on a local Dask cluster of K processes")
    parser.add_argument("--child", choices=("psa", "solver"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child == "psa":
        print(json.dumps(child_psa(args.draws, args.seed, args.workers)))
        return
    if args.child == "solver":
        print(json.dumps(child_solver(args.draws, args.seed)))
        return

    print(f"PSA benchmark: synthetic demo model, {args.draws:,} draws (research use only)")
    reference = _run("solver", args.draws, args.seed)
    psa = _run("psa", args.draws, args.seed)
    core = reference["compile_s"] + reference["solve_s"]
    print(f"  chunk size (default memory budget): {psa['chunk_size']:,} draws; "
          f"{psa['candidates']} candidate policies")
    print(f"  reference, solver alone: sampling {reference['sample_s']:.2f} s, compile "
          f"{reference['compile_s']:.2f} s, solve {reference['solve_s']:.2f} s "
          f"(peak {reference['peak_rss_mib']:.0f} MiB)")
    print(f"  PSA end to end: {psa['total_s']:.2f} s = draws solved and evaluated "
          f"{psa['solve_and_evaluate_s']:.2f} s + outputs {psa['outputs_s']:.2f} s "
          f"(peak {psa['peak_rss_mib']:.0f} MiB)")
    print(f"  ratio PSA / (compile + solve): {psa['total_s'] / core:.2f}x; "
          f"PSA / solve alone: {psa['total_s'] / reference['solve_s']:.1f}x")
    print(f"  EVPI of the timing decision {psa['evpi']:,.2f} (MC s.e. {psa['evpi_se']:,.2f})")
    if args.million:
        big = _run("psa", 1_000_000, args.seed, args.workers)
        print(f"  1,000,000 draws{f' on {args.workers} Dask workers' if args.workers else ''}: "
              f"{big['total_s']:.0f} s (outputs {big['outputs_s']:.0f} s), chunk "
              f"{big['chunk_size']:,}, kept per-draw results {big['kept_bytes'] / 2**20:.0f} MiB, "
              f"peak {big['peak_rss_mib']:.0f} MiB of this process"
              + (f", largest worker peak {big['worker_peak_rss_mib']:.0f} MiB"
                 if args.workers else ""))


if __name__ == "__main__":
    main()
