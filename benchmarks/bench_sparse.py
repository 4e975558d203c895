"""Models of 1,000 to 4,000 states, at most 10 non-zeros per row: sparse vs dense transitions.

Not a test: prints times and peak memory measured in this run on this machine.

Model: SYNTHETIC (invented numbers), 2 actions; each state moves to itself, a few states
on, or to an absorbing state (4 to 5 non-zeros per row), one draw (the base case). Policy
iteration is also run with a step back to the previous state in every row (the moves then
form cycles, so the dense solver cannot solve by substitution and factorises); an
infinite horizon (policy and value iteration) and a 60-cycle finite horizon whose
transitions do not vary with the cycle (backward induction, then the cohort trace and
totals of the optimal policy by ``evaluate_policy``; and the whole base case through the
analysis entry point ``caredecide.analysis.analyse_base_case`` given the compiled arrays,
which reads the dense transitions into sparse rows once and hands them from the solver to
the evaluation; its dense run evaluates with the dense arrays; every case). Each form
solves it in a fresh process (so its peak resident memory is its own):
``transition_form="dense"`` (compiled loops on dense arrays) and ``"sparse"`` (CSR);
``"auto"`` must pick sparse. Policies must be identical (finite horizon; outside reported
ties for the iterative methods) and values agree to 1e-10 relative (1e-6 for the iterative
methods, whose stopping rule is 1e-10) before a ratio is printed.

Run: python benchmarks/bench_sparse.py [--states 1000 2000 4000] [--cycles 60] [--repeats 3]

Prints every case for each size of the grid (``--states``, default 1,000, 2,000 and
4,000 states), then a summary table of the dense / sparse ratios per size and case, with
the issue's target (base case >= 10x faster than dense and under 1 GiB at 2,000 states)
marked, and the machine load at the start and the end. First, a one-way analysis
(``caredecide.sensitivity.one_way`` of three estimates, 7 parameter sets) of a SYNTHETIC
chain model of ``--one-way-states`` states (default 2,000; 0: none): the library's rule
(sparse chunks) against dense chunks and dense solves, the tables checked to agree;
``--only-one-way`` skips the grid.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

CHILD = r"""
import json, resource, sys, time
import numpy as np
from caredecide.compiled import CompiledModel
from caredecide.objective import Objective
from caredecide.solvers import solve

S, A, form, method, cycles, back = {states}, 2, {form!r}, {method!r}, {cycles!r}, {back!r}
rng = np.random.default_rng(11)
P = np.zeros((1, 1, A, S, S))
for a in range(A):
    for s in range(S - 1):
        targets = [s, min(s + 1, S - 2), min(s + 2, S - 2), min(s + 5, S - 2), S - 1]
        P[0, 0, a, s, targets] += rng.uniform(0.05, 1.0, 5) * [1.0, 0.4 / (a + 1), 0.2, 0.1, 0.03]
        if back and s > 0:  # a step back (recovery): the moves then form cycles
            P[0, 0, a, s, s - 1] += 0.05
P[0, 0, :, S - 1, S - 1] = 1.0
P /= P.sum(-1, keepdims=True)
qaly = np.linspace(0.95, 0.2, S)
qaly[-1] = 0.0
cost = np.zeros((1, 1, S, A))
cost[0, 0, :-1, 1] = rng.uniform(200, 2000, S - 1)
absorbing = np.zeros(S, bool)
absorbing[-1] = True
model = CompiledModel(
    state_ids=tuple(f"s{{k}}" for k in range(S)), action_ids=("wait", "treat"),
    transition=P, allowed=np.ones((S, A), bool), state_qaly=qaly[None, None].copy(),
    state_cost=np.zeros((1, 1, S)), decision_qaly=np.zeros((1, 1, S, A)),
    decision_cost=cost, life_years=(~absorbing).astype(float),
    start_distribution=np.eye(S)[0], n_cycles=cycles, discount_outcomes=0.035,
    discount_costs=0.035, absorbing=absorbing,
)
objective = Objective("net_benefit", 30000.0)
small = model.take_draws(slice(0, 1))
warm = solve(small, objective, method=method, transition_form=form)  # warm: load the loops
evaluation = 0.0
from caredecide.analysis import analyse_base_case
from caredecide.evaluate import evaluate_policy
from caredecide.model import Action, Model, Settings, State
if cycles is not None:
    evaluate_policy(small, warm.policy, objective, transition_form=form)  # load its loops
import scipy.sparse.csgraph, scipy.sparse.linalg  # loaded before timing (the evaluation's)
described = Model(  # what analyse_base_case keeps beside the given compiled arrays
    title="SYNTHETIC sparse benchmark",
    settings=Settings(horizon_cycles=cycles, infinite_horizon=cycles is None),
    states=tuple(State(id=f"s{{k}}") for k in range(S)),
    actions=(Action(id="wait"), Action(id="treat")),
)
start = time.process_time()  # the base case: solve + trace + totals, one entry point
done = analyse_base_case(
    described, objective=objective, compiled=model, method=method, transition_form=form
)
base_case = time.process_time() - start
trace = done.outcome.trace[0, -1].tolist()
totals = done.totals
start = time.process_time()
result = solve(model, objective, method=method, transition_form=form)
seconds = time.process_time() - start
if cycles is not None:
    start = time.process_time()
    outcome = evaluate_policy(model, result.policy, objective, transition_form=form)
    evaluation = time.process_time() - start
    assert outcome.trace[0, -1].tolist() == trace and outcome.value[0] == totals["value"]
    assert (done.solution.policy == result.policy).all()
print(json.dumps({{
    "seconds": seconds, "evaluation": evaluation, "base_case": base_case,
    "form": result.transition_form, "total_value": totals["value"],
    "iterations": result.iterations, "policy": result.policy[0].ravel().tolist(),
    "value": result.value[0].ravel().tolist(),
    "indifferent": result.indifferent[0].ravel().tolist(), "trace": trace,
    "nonzeros_per_row": float(np.count_nonzero(P) / (A * S)),
    "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
}}))
"""


ONE_WAY_CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, {here!r})
from bench_sparse import chain_model_text
from caredecide import chunks
from caredecide.modelfile import loads_model
from caredecide.sensitivity import one_way

form = {form!r}
if form == "dense":  # the reference: the dense chunk rule and dense solves, nothing else
    solve = chunks.solve
    chunks.solve = lambda c, o, **k: solve(c, o, **{{**k, "transition_form": "dense"}})
    chunks.sparse_chunk_size = lambda *a, **k: None
used = []
solver = chunks.solve
chunks.solve = lambda c, o, **k: used.append((c.n_draws, solver(c, o, **k))) or used[-1][1]
names = ["p_prog", "p_die", "rr_treat"]
one_way(loads_model(chain_model_text(320), file="warm.toml"), names)  # load the loops
used.clear()
model = loads_model(chain_model_text({states}), file="chain.toml")
start = time.process_time()
done = one_way(model, names)
seconds = time.process_time() - start
table = done.table.set_index("parameter").loc[names]
print(json.dumps({{
    "seconds": seconds,
    "values": table[["value_low", "value_base", "value_high"]].to_numpy().ravel().tolist(),
    "chunks": [[d, r.transition_form] for d, r in used],
    "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
}}))
"""


def chain_model_text(states: int) -> str:
    """TOML of a SYNTHETIC progressive chain (invented numbers): ``states - 1`` alive
    states and ``dead``; waiting moves on with ``p_prog``, treating with ``p_prog *
    rr_treat`` at a cost per cycle; death ``p_die`` everywhere; each estimate has a
    range (the one-way analysis varies it)."""
    alive = [f"s{i}" for i in range(states - 1)]
    lines = [
        "format = 2",
        'title = "SYNTHETIC sparse one-way benchmark"',
        "[settings]",
        "cycle_years = 1.0",
        'horizon = "infinite"',
        "start_age = 40.0",
        'start = "s0"',
        "discount_outcomes = 0.035",
        "discount_costs = 0.035",
        'objective = "net_benefit"',
        "willingness_to_pay = 30000.0",
        'within_cycle = "start"',
    ]
    for i, state in enumerate(alive):
        lines += ["[[states]]", f'id = "{state}"', f"qaly_weight = {0.95 - 0.75 * i / states:.4f}"]
        lines += [f"cost = {100 + i}"]
    lines += ["[[states]]", 'id = "dead"', "qaly_weight = 0.0", "cost = 0.0", "absorbing = true"]
    lines += ["[[actions]]", 'id = "wait"', 'allowed_in = "all"']
    everywhere = "[" + ", ".join(f'"{s}"' for s in alive) + "]"
    lines += ["[[actions]]", 'id = "treat"', f"allowed_in = {everywhere}", "cost_per_cycle = 900"]
    for action, effect in (("wait", ""), ("treat", " * rr_treat")):
        for i, state in enumerate(alive):
            lines.append(f"[transitions.{action}.{state}]")
            if i + 1 < len(alive):
                lines.append(f'{alive[i + 1]} = "p_prog{effect}"')
            lines += ['dead = "p_die"', f'{state} = "rest"']
    for name, value, low, high in (
        ("p_prog", 0.1, 0.08, 0.12),
        ("p_die", 0.02, 0.015, 0.025),
        ("rr_treat", 0.7, 0.5, 0.9),
    ):
        lines += [f"[parameters.{name}]", f"value = {value}", f"low = {low}", f"high = {high}"]
        lines += ['kind = "probability"' if name != "rr_treat" else 'kind = "relative_risk"']
        lines += ['source = "Synthetic"']
    return "\n".join(lines) + "\n"


def measure_one_way(states: int, repeats: int) -> None:
    """The one-way analysis of three estimates (7 parameter sets) on a chain model of
    ``states`` states: sparse (the library's rule) against dense (dense chunk rule and
    dense solves), each in fresh processes; the tables must agree first."""
    here = os.path.dirname(os.path.abspath(__file__))
    runs: dict[str, list[dict]] = {"dense": [], "sparse": []}
    for _ in range(repeats):
        for form in runs:
            code = ONE_WAY_CHILD.format(here=here, form=form, states=states)
            done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
            if done.returncode:
                raise SystemExit(done.stderr[-2000:])
            runs[form].append(json.loads(done.stdout.strip().splitlines()[-1]))
    dense, sparse = runs["dense"][0], runs["sparse"][0]
    gap = max(abs(a - b) for a, b in zip(dense["values"], sparse["values"], strict=True))
    scale = max(abs(a) for a in dense["values"])
    if gap > 1e-8 * scale:
        raise SystemExit(f"one-way, {states} states: forms disagree (value {gap:g})")
    t = {form: statistics.median(r["seconds"] for r in rs) for form, rs in runs.items()}
    peak = {form: max(r["peak_mib"] for r in rs) for form, rs in runs.items()}
    print(
        f"\n== one-way analysis (sensitivity.one_way) of 3 estimates, 7 parameter sets: "
        f"{states} states, 2 actions, progressive, infinite horizon (median of {repeats}) =="
    )
    print(f"answers agree (max |value difference| {gap:.1e}, values up to {scale:.3g})")
    for form, r in runs.items():
        chunks = ", ".join(f"{d} draws {f}" for d, f in r[0]["chunks"])
        print(
            f"  {form:6s} one-way {t[form]:7.3f} s CPU   peak {peak[form]:6.0f} MiB "
            f"(process total)   chunks: {chunks}"
        )
    print(f"  dense / sparse, one-way: {t['dense'] / t['sparse']:.1f}x")


def run(states: int, form: str, method: str, cycles: int | None, back: bool) -> dict:
    code = CHILD.format(states=states, form=form, method=method, cycles=cycles, back=back)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode:
        raise SystemExit(done.stderr[-2000:])
    return json.loads(done.stdout.strip().splitlines()[-1])


CASES = (  # method, finite horizon, a step back
    ("policy_iteration", False, False),
    ("policy_iteration", False, True),
    ("value_iteration", False, False),
    ("backward_induction", True, False),
)
TARGET_STATES = 2000
"""The issue's size: base case >= 10x faster than dense and under 1 GiB."""


def measure(states: int, method: str, cycles: int | None, back: bool, repeats: int) -> dict:
    """Run one case in each form ``repeats`` times; check the answers agree; print the
    case's lines and return its ratios and peaks."""
    runs: dict[str, list[dict]] = {"dense": [], "sparse": [], "auto": []}
    for _ in range(repeats):
        for form in runs:
            runs[form].append(run(states, form, method, cycles, back))
    dense, sparse, auto = runs["dense"][0], runs["sparse"][0], runs["auto"][0]
    if auto["form"] != "sparse":
        raise SystemExit(f"auto picked {auto['form']}, expected sparse")
    exact = cycles is not None  # backward induction: no stopping rule
    tied = set() if exact else {i for i, t in enumerate(dense["indifferent"]) if t}
    differ = [
        i
        for i, (a, b) in enumerate(zip(dense["policy"], sparse["policy"], strict=True))
        if a != b and i not in tied
    ]
    gap = max(abs(a - b) for a, b in zip(dense["value"], sparse["value"], strict=True))
    scale = max(abs(a) for a in dense["value"])
    moved = max(
        (abs(a - b) for a, b in zip(dense["trace"], sparse["trace"], strict=True)),
        default=0.0,
    )
    total = abs(dense["total_value"] - sparse["total_value"])  # base case totals
    if differ or gap > (1e-10 if exact else 1e-6) * scale or moved > 1e-12:
        raise SystemExit(
            f"{method}, {states} states: forms disagree ({len(differ)} policies, value "
            f"{gap:g}, trace {moved:g})"
        )
    if total > 1e-10 * max(abs(dense["total_value"]), 1.0):
        raise SystemExit(f"{method}, {states} states: base case totals disagree ({total:g})")
    t = {form: statistics.median(r["seconds"] for r in rs) for form, rs in runs.items()}
    e = {form: statistics.median(r["evaluation"] for r in rs) for form, rs in runs.items()}
    b = {form: statistics.median(r["base_case"] for r in rs) for form, rs in runs.items()}
    peak = {form: max(r["peak_mib"] for r in rs) for form, rs in runs.items()}
    horizon = "infinite horizon" if cycles is None else f"{cycles} cycles"
    kind = "with a step back (cyclic)" if back else "progressive (acyclic)"
    print(
        f"\n== {method}: {states} states, 2 actions, {kind}, {horizon}, one draw, "
        f"{dense['nonzeros_per_row']:.1f} non-zeros per row (median of {repeats}) =="
    )
    print(
        f"answers agree (policies {'identical' if exact else 'equal outside ties'}; max "
        f"|value difference| {gap:.1e}, values up to {scale:.3g}; base case total value "
        f"differs by {total:.1e})"
    )
    for form in runs:
        line = f"  {form:6s} solve {t[form]:8.3f} s CPU"
        if exact:
            line += f"   trace + totals {e[form]:7.3f} s"
        line += f"   base case {b[form]:7.3f} s"
        used = runs[form][0]["form"]
        print(f"{line}   peak {peak[form]:6.0f} MiB (process total)   used: {used}")
    solve_ratio = t["dense"] / t["sparse"]
    print(f"  dense / sparse, solve: {solve_ratio:.1f}x")
    if exact:
        two = (t["dense"] + e["dense"]) / (t["sparse"] + e["sparse"])
        print(f"  dense / sparse, solve + trace + totals (two calls): {two:.1f}x")
    entry = b["dense"] / b["sparse"]
    target = " (target >= 10x)" if states == TARGET_STATES else ""
    print(f"  dense / sparse, base case (analyse_base_case): {entry:.1f}x{target}")
    case = f"{method.replace('_', ' ')}, {'cyclic' if back else 'progressive'}"
    return {
        "states": states, "case": case, "solve": solve_ratio, "base": entry,
        "dense_base": b["dense"], "sparse_base": b["sparse"],
        "dense_peak": peak["dense"], "sparse_peak": max(peak["sparse"], peak["auto"]),
    }  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--states", type=int, nargs="+", default=[1000, 2000, 4000])
    parser.add_argument("--cycles", type=int, default=60)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument(
        "--one-way-states", type=int, default=TARGET_STATES, help="0: no one-way case"
    )
    parser.add_argument("--only-one-way", action="store_true", help="skip the grid")
    args = parser.parse_args()
    print("SYNTHETIC benchmark model (invented numbers); research use only.")
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(f"load average (1, 5, 15 min) at the start: {load}")
    rows = []
    if args.one_way_states:
        measure_one_way(args.one_way_states, args.repeats)
    for states in [] if args.only_one_way else args.states:
        for method, finite, back in CASES:
            horizon = args.cycles if finite else None
            rows.append(measure(states, method, horizon, back, args.repeats))
    if rows:
        summary(rows, args.repeats)
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(f"load average (1, 5, 15 min) at the end: {load}")
    print("(machine shared with other jobs while measured: absolute times are noisy)")


def summary(rows: list[dict], repeats: int) -> None:
    """The table of dense / sparse ratios per size and case, the target marked."""
    print(f"\n== summary: dense / sparse, CPU time (median of {repeats}) ==")
    print(
        f"{'states':>6}  {'case':36s} {'solve':>7} {'base case':>10} {'dense s':>8} "
        f"{'sparse s':>9} {'peak MiB sparse':>16} {'dense':>6}"
    )
    for row in rows:
        mark = ""
        if row["states"] == TARGET_STATES:
            fast = "meets" if row["base"] >= 10 else "BELOW"
            small = "meets" if row["sparse_peak"] < 1024 else "ABOVE"
            mark = f"  {fast} >= 10x, {small} < 1 GiB"
        print(
            f"{row['states']:>6}  {row['case']:36s} {row['solve']:6.1f}x {row['base']:9.1f}x "
            f"{row['dense_base']:8.3f} {row['sparse_base']:9.3f} {row['sparse_peak']:16.0f} "
            f"{row['dense_peak']:6.0f}{mark}"
        )


if __name__ == "__main__":
    main()
