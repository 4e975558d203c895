"""Large models whose transitions vary with the cycle: sparse rows vs the dense array.

Not a test: prints times and peak memory measured in this run on this machine.

Model: SYNTHETIC (invented numbers), written in the model language and compiled by
``compile_model``: a stable and a progressed state, each copied per risk group (an
attribute with G values) and per drug status (an attribute), the progressed state also
per year since progression (a tunnel of 47 steps); age-dependent background mortality
(Gompertz-Makeham) in every row, so every cycle has its own transitions; starting the
drug is a decision-time move into the on-drug copy. Flat states: 2 G (47 + 2) + 1, i.e.
491, 981 and 1,961 for G = 5, 10, 20 (the expansion allows at most 2,000); 45 yearly
cycles; 2 actions; one draw (the base case); about 3 non-zeros per row.

Each form runs in a fresh process (its peak resident memory is its own): compile
(``compile_model(..., transition_form=...)``), backward induction (``solve``) and the cohort
trace and totals of the optimal policy (``evaluate_policy``), timed separately (CPU
seconds, median of the repeats; every compiled loop loaded first on a small model). The
dense form runs only where its estimated peak (``caredecide.memory``) fits the dense budget
(``--dense-budget-mib``); otherwise its estimate is printed. Policies must be identical and
values, totals and the cohort trace agree to 1e-10 relative before a ratio is printed;
``auto`` must pick the sparse rows (from 300 states on).

Run: python benchmarks/bench_sparse_cycles.py [--groups 5 10 20] [--cycles 45] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

TUNNEL_LENGTH = 47
SPARSE_MIN_STATES = 300  # caredecide.limits: "auto" keeps smaller models dense


def model_text(groups: int, cycles: int, length: int = TUNNEL_LENGTH) -> str:
    """TOML text of the SYNTHETIC benchmark model (see the module docstring)."""
    from bench_solver import parameter_lines  # benchmarks/ is on the path (script or child)

    risk = ", ".join(f"risk_{g} = {g}" for g in range(groups))
    parameters = {
        "p_progress": (0.05, "probability"),
        "hr_drug": (0.6, "hazard_ratio"),
        "r_excess": (0.3, "rate"),
        "hr_drug_death": (0.8, "hazard_ratio"),
        "u_stable": (0.85, "qaly_weight"),
        "u_progressed": (0.6, "qaly_weight"),
        "c_stable": (500.0, "cost"),
        "c_progressed": (8000.0, "cost"),
        "c_drug": (2500.0, "cost"),
        "c_start": (300.0, "cost"),
    }
    lines = [
        "# SYNTHETIC benchmark model: every number is invented. Research use only.",
        "format = 2",
        'title = "SYNTHETIC benchmark: risk groups, drug status, years since progression"',
        "[settings]",
        "cycle_years = 1.0",
        f"horizon_cycles = {cycles}",
        "start_age = 50.0",
        'start = "stable__risk_0__off_drug"',
        "discount_outcomes = 0.035",
        "discount_costs = 0.035",
        'objective = "net_benefit"',
        "willingness_to_pay = 30000.0",
        'within_cycle = "trapezoid"',
        "[attributes.risk]",
        f"values = {{ {risk} }}",
        "[attributes.drug]",
        "values = { off_drug = 0, on_drug = 1 }",
        "[tunnels.years_progressed]",
        f"length = {length}",
        "[[states]]",
        'id = "stable"',
        'qaly_weight = "u_stable - 0.004 * risk"',
        'cost = "c_stable + drug * c_drug"',
        'attributes = ["risk", "drug"]',
        "[[states]]",
        'id = "progressed"',
        'qaly_weight = "u_progressed - 0.002 * years_progressed"',
        'cost = "c_progressed / (1 + 0.1 * years_progressed) + drug * c_drug"',
        'attributes = ["risk", "drug"]',
        'tunnels = ["years_progressed"]',
        "[[states]]",
        'id = "dead"',
        "qaly_weight = 0.0",
        "cost = 0.0",
        "absorbing = true",
        "[[actions]]",
        'id = "wait"',
        'allowed_in = "all"',
        "[[actions]]",
        'id = "start_drug"',
        'allowed_in = ["stable__off_drug", "progressed__off_drug"]',
        'oneoff_cost = "c_start"',
        "[moves.start_drug.stable]",
        "stable__on_drug = 1.0",
        "[moves.start_drug.progressed]",
        "progressed__on_drug = 1.0",
        "[transitions.wait.stable]",
        'progressed = "with_hr(p_progress * (1 + 0.08 * risk), when(drug == 1, hr_drug, 1))"',
        'dead = "background"',
        'stable = "rest"',
        "[transitions.wait.progressed]",
        'dead = "chance_within(rate_behind(background, cycle_years) + r_excess '
        '* when(drug == 1, hr_drug_death, 1) / (1 + 0.2 * years_progressed), cycle_years)"',
        'progressed = "rest"',
    ]
    lines += parameter_lines(parameters)
    lines += ["[mortality]", "gompertz_makeham = { a = 0.0007, b = 5e-5, c = 1.0965 }"]
    return "\n".join(lines) + "\n"


CHILD = r"""
import json, resource, sys, time
import numpy as np
from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.solvers import solve
sys.path.insert(0, {here!r})
from bench_sparse_cycles import model_text

form, repeats, out = {form!r}, {repeats}, {out!r}
objective = None
def one(groups, cycles):
    model = loads_model(model_text(groups, cycles), file="bench.toml")
    objective = Objective.from_settings(model.settings)
    times = {{}}
    t = time.process_time()
    compiled = compile_model(model, transition_form=form, memory_limit_bytes=1 << 40)
    times["compile"] = time.process_time() - t
    t = time.process_time()
    result = solve(compiled, objective)
    times["solve"] = time.process_time() - t
    t = time.process_time()
    outcome = evaluate_policy(compiled, result.policy, objective)
    times["evaluate"] = time.process_time() - t
    return compiled, result, outcome, times
one(1, 4)  # load every compiled loop and lazy import on a small model
times = []
for _ in range(repeats):  # the last run's arrays only are kept (peak memory of one pass)
    compiled = result = outcome = None
    compiled, result, outcome, spent = one({groups}, {cycles})
    times.append(spent)
np.savez(out, policy=result.policy, value=result.value, trace=outcome.trace,
         totals=np.array([outcome.value[0], outcome.qalys[0], outcome.costs[0]]))
print(json.dumps({{
    "times": times,
    "used": compiled.transition_form,
    "solver": result.transition_form,
    "states": compiled.n_states,
    "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
}}))
"""


def run(groups: int, cycles: int, form: str, repeats: int, out: str) -> dict:
    here = os.path.dirname(os.path.abspath(__file__))
    code = CHILD.format(
        form=form, groups=groups, cycles=cycles, repeats=repeats, out=out, here=here
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"{form} run failed:\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def dense_estimate(groups: int, cycles: int) -> int:
    from caredecide import memory
    from caredecide.modelfile import loads_model

    model = loads_model(model_text(groups, cycles), file="bench.toml")
    return memory.pipeline_peak_bytes(memory.shape_of(model, transition_form="dense"))


def _check(dense_file: str, sparse_file: str) -> str:
    import numpy as np

    dense, sparse = np.load(dense_file), np.load(sparse_file)
    if not np.array_equal(dense["policy"], sparse["policy"]):
        raise SystemExit("policies differ between the dense and sparse forms")
    for key in ("value", "trace", "totals"):
        scale = max(float(np.abs(dense[key]).max()), 1e-300)
        gap = float(np.abs(dense[key] - sparse[key]).max()) / scale
        if gap > 1e-10:
            raise SystemExit(f"{key} differs by {gap:.2e} relative between the forms")
    value_gap = float(np.abs(dense["value"] - sparse["value"]).max())
    return (
        f"answers agree (policies identical; max |value difference| {value_gap:.1e}, values "
        f"up to {float(np.abs(dense['value']).max()):.3g}; trace and totals to 1e-10)"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--groups", type=int, nargs="+", default=[5, 10, 20])
    parser.add_argument("--cycles", type=int, default=45)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--dense-budget-mib", type=float, default=1024.0)
    args = parser.parse_args()
    print("SYNTHETIC benchmark model (invented numbers); research use only.")
    budget = args.dense_budget_mib * 1024**2
    stages = ("compile", "solve", "evaluate")
    with tempfile.TemporaryDirectory() as folder:
        for groups in args.groups:
            states = 2 * groups * (TUNNEL_LENGTH + 2) + 1
            print(
                f"\n== {states} states ({groups} risk groups x 2 drug states x (stable + "
                f"{TUNNEL_LENGTH + 1} years-since-progression copies) + dead), 2 actions, "
                f"{args.cycles} age-dependent cycles, one draw (median of {args.repeats}) =="
            )
            estimate = dense_estimate(groups, args.cycles)
            forms = ["sparse", "auto"] + (["dense"] if estimate <= budget else [])
            found = {}
            for form in forms:
                out = os.path.join(folder, f"{form}_{groups}.npz")
                found[form] = run(groups, args.cycles, form, args.repeats, out)
            medians = {
                form: {s: statistics.median(t[s] for t in r["times"]) for s in stages}
                for form, r in found.items()
            }
            if "dense" in found:
                print(
                    _check(
                        os.path.join(folder, f"dense_{groups}.npz"),
                        os.path.join(folder, f"sparse_{groups}.npz"),
                    )
                )
            for form, r in found.items():
                m = medians[form]
                print(
                    f"  {form:6s} compile {m['compile']:7.3f} s  solve {m['solve']:7.3f} s  "
                    f"evaluate {m['evaluate']:7.3f} s  total {sum(m.values()):7.3f} s CPU  "
                    f"peak {r['peak_mib']:7.0f} MiB (process total)  used: {r['used']}"
                )
            if states >= SPARSE_MIN_STATES and found["auto"]["used"] != "sparse":
                raise SystemExit("auto did not pick the sparse rows")
            if "dense" in found:
                d, s = medians["dense"], medians["sparse"]
                for stage in stages:
                    print(f"  dense / sparse, {stage}: {d[stage] / s[stage]:.1f}x")
                print(
                    f"  dense / sparse, compile + solve + evaluate: "
                    f"{sum(d.values()) / sum(s.values()):.1f}x; peak memory "
                    f"{found['dense']['peak_mib'] / found['sparse']['peak_mib']:.1f}x"
                )
            else:
                print(
                    f"  dense: not run; its estimated peak is {estimate / 1024**3:.1f} GiB "
                    f"(caredecide.memory), beyond the {args.dense_budget_mib:.0f} MiB budget"
                )
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(f"load average (1, 5, 15 min) at the end: {load}")
    print("(machine shared with other jobs while measured: absolute times are noisy)")


if __name__ == "__main__":
    main()
