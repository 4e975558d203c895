"""Best shared schedule over the draws vs one probabilistic run of the same draws.

Not a test: prints CPU times and peak memory measured in this run on this machine, and
their ratio. Each run is a fresh Python process (so the peak resident memory is that
analysis's own, imports included), BLAS pinned to one thread:

* ``psa``: :func:`caredecide.uncertainty.psa.analyse_uncertainty` on ``D`` draws;
* ``best``: :func:`caredecide.uncertainty.policy_search.best_policy_over_draws` on the same
  ``D`` draws (same seed: the same sampler and the same draws) - compile and solve in
  chunks, then the exact improvement passes from every start.

Target (issue 18): ``best / psa <= 10`` on the SYNTHETIC demo model at 10,000 draws, with
the search's peak memory under 1 GiB. Grid of sizes: D in {1,000, 3,000, 10,000}.

Answers checked: the base-case schedule's expected value over the draws, as the search
reports it, equals the probabilistic run's expected value of its base-case candidate on the
same draws (to 1e-9 relative), and the best schedule is never below the best candidate.

Run: python benchmarks/bench_best_schedule.py [--draws 1000 3000 10000] [--seed 1]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys

CHILD = r"""
import json, resource, sys, time
from caredecide.modelfile import load_model
from synthetic_cohort import demo_model_path
model = load_model(demo_model_path())
kind, draws, seed = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
start = time.process_time()
if kind == "psa":
    from caredecide.uncertainty.psa import analyse_uncertainty
    result = analyse_uncertainty(model, draws, seed)
    loss = result.expected_loss()
    base = float(loss.loc[loss["origin"].str.contains("base"), "expected_value"].iloc[0])
    best = float(loss["expected_value"].max())
else:
    from caredecide.uncertainty.policy_search import best_policy_over_draws
    result = best_policy_over_draws(model, draws, seed)
    base = float(result.per_draw_base.mean())
    best = float(result.per_draw_best.mean())
cpu = time.process_time() - start
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps({"cpu": cpu, "peak": peak, "base": base, "best": best}))
"""


def run(kind: str, draws: int, seed: int) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    out = subprocess.run(
        [sys.executable, "-c", CHILD, kind, str(draws), str(seed)],
        capture_output=True,
        text=True,
        check=True,
        env=env,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--draws", type=int, nargs="+", default=[1000, 3000, 10000])
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    print("SYNTHETIC demo model; research use only.")
    print(f"{'draws':>8} {'psa CPU s':>10} {'best CPU s':>11} {'ratio':>6} "
          f"{'psa peak MiB':>13} {'best peak MiB':>14}")  # fmt: skip
    for draws in args.draws:
        psa = run("psa", draws, args.seed)
        best = run("best", draws, args.seed)
        # The same draws: the base-case schedule is worth the same in both analyses.
        rel = abs(psa["base"] - best["base"]) / max(1.0, abs(psa["base"]))
        assert rel < 1e-9, f"base-case expected value differs: {psa['base']} vs {best['base']}"
        assert best["best"] >= psa["best"] - 1e-9 * abs(psa["best"]), "search below a candidate"
        print(
            f"{draws:>8,} {psa['cpu']:>10.2f} {best['cpu']:>11.2f} "
            f"{best['cpu'] / psa['cpu']:>6.2f} {psa['peak'] / 2**20:>13.0f} "
            f"{best['peak'] / 2**20:>14.0f}"
        )


if __name__ == "__main__":
    main()
