"""Policy and value iteration over a grid of sizes: project vs plain numpy vs quantecon.

Not a test: prints CPU times measured in this run on this machine, and their ratios.

Grid: S in {12, 50, 200} states, A in {2, 3} actions, D in {1, 1000, 10000} draws of a
SYNTHETIC stationary model (invented numbers: each state moves to itself, the next few
states and an absorbing state, with probabilities drawn per draw; rewards drawn per draw),
gamma = 1 / 1.035, tolerance 1e-8 relative to the largest |value| of each draw. These
moves never go back, so the project's exact policy evaluation solves by substitution;
``--cyclic`` adds a step back to the previous state in every row (the moves then form
cycles and it factorises, as the references always do).

For every cell, interleaved, median CPU seconds of the repeats:

* ``ours``: ``caredecide.solvers.solve`` (policy_iteration / value_iteration);
* ``plain``: :mod:`plain_reference` on all draws at once, and ``plain blocked``: the same
  on blocks of draws whose transitions fill about 1 MiB;
* ``quantecon``: ``quantecon.markov.DiscreteDP(...).solve`` looped over draws (value
  iteration with the same epsilon per draw, in money).

Large cells are timed on the first ``n`` draws and scaled to ``D`` (the work per draw is
the same; the table says how many were timed). Policies must agree with the plain
reference and quantecon outside reported ties before a time is printed.

Run: python benchmarks/bench_stationary_grid.py [--repeats 3] [--markdown]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

# One thread for every BLAS: CPU seconds then compare single-threaded work (threaded BLAS
# spins and inflates CPU time on a shared machine). Set before numpy is imported.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))

from plain_reference import blocked, plain_policy_iteration, plain_value_iteration  # noqa: E402

from caredecide.compiled import CompiledModel  # noqa: E402
from caredecide.objective import Objective  # noqa: E402
from caredecide.solvers import solve  # noqa: E402

RATE = 0.035
TOLERANCE = 1e-8
WTP = 1.0  # rewards are drawn directly in money
OBJECTIVE = Objective("net_benefit", WTP)
TIMED = {12: 2000, 50: 400, 200: 40}  # draws timed per cell at most (scaled to D)
TIMED_QUANTECON = {12: 200, 50: 60, 200: 10}
CALLS_ONE_DRAW = {12: 40, 50: 10, 200: 2}  # D = 1: calls per timing


def synthetic_model(S: int, A: int, D: int, seed: int = 5, cyclic: bool = False) -> CompiledModel:
    """A SYNTHETIC stationary model (invented numbers); last state absorbing; ``cyclic``:
    every live state but the first also steps back one state."""
    rng = np.random.default_rng(seed)
    P = np.zeros((D, 1, A, S, S))
    live = np.arange(S - 1)
    for step in range(4):  # stay, or move up to three states on
        target = np.minimum(live + step, S - 2)
        P[:, 0, :, live, target] += (
            rng.uniform(0.2, 1.0, (S - 1, D, A)) * (0.5 ** (step * (1 + np.arange(A))))[None, None]
        )
    P[:, 0, :, live, S - 1] += rng.uniform(0.01, 0.05, (S - 1, D, A))
    if cyclic:
        P[:, 0, :, live[1:], live[:-1]] += rng.uniform(0.01, 0.1, (S - 2, D, A))
    P[:, 0, :, S - 1, S - 1] = 1.0
    P /= P.sum(-1, keepdims=True)
    qaly = np.broadcast_to(np.linspace(0.95, 0.3, S), (D, 1, S)) * rng.uniform(0.9, 1.0, (D, 1, 1))
    qaly = qaly.copy()
    qaly[..., -1] = 0.0
    cost = np.zeros((D, 1, S, A))
    cost[..., 1:] = rng.uniform(500, 4000, (D, 1, S, A - 1))
    cost[..., -1, :] = 0.0
    absorbing = np.zeros(S, dtype=bool)
    absorbing[-1] = True
    return CompiledModel(
        state_ids=tuple(f"s{k}" for k in range(S)),
        action_ids=tuple(f"a{k}" for k in range(A)),
        transition=P,
        allowed=np.ones((S, A), dtype=bool),
        state_qaly=30_000.0 * qaly,  # QALY weights already in money at 30,000 per QALY
        state_cost=np.zeros((D, 1, S)),
        decision_qaly=np.zeros((D, 1, S, A)),
        decision_cost=cost,
        life_years=(~absorbing).astype(float),
        start_distribution=np.eye(S)[0],
        n_cycles=None,
        discount_outcomes=RATE,
        discount_costs=RATE,
        absorbing=absorbing,
    )


def quantecon_loop(model: CompiledModel, method: str, epsilon: np.ndarray):
    from quantecon.markov import DiscreteDP

    gamma = model.per_cycle_discount()[0]
    out = []
    for d in range(model.n_draws):
        R = WTP * model.state_qaly[d, 0][:, None] - model.decision_cost[d, 0]
        Q = model.transition[d, 0].transpose(1, 0, 2)
        ddp = DiscreteDP(R, Q, gamma)
        if method == "policy_iteration":
            out.append(ddp.solve("policy_iteration", max_iter=10_000).sigma)
        else:
            out.append(
                ddp.solve("value_iteration", epsilon=float(epsilon[d]), max_iter=100_000).sigma
            )
    return np.array(out)


def block_for(S: int, A: int) -> int:
    return max(1, 2**20 // (A * S * S * 8))


def cell(S: int, A: int, D: int, repeats: int, cyclic: bool = False) -> dict[str, object]:
    n = min(D, TIMED[S])
    n_qe = min(n, TIMED_QUANTECON[S])
    calls = CALLS_ONE_DRAW[S] if D == 1 else 1
    model = synthetic_model(S, A, n, cyclic=cyclic)
    small = model.take_draws(slice(0, n_qe))
    block = block_for(S, A)
    cases = {}
    for method, plain, args in (
        ("policy_iteration", plain_policy_iteration, (WTP,)),
        ("value_iteration", plain_value_iteration, (WTP, TOLERANCE)),
    ):
        short = method.split("_")[0][0].upper() + "I"
        cases[f"ours {short}"] = lambda m=method: solve(
            model, OBJECTIVE, method=m, tolerance=TOLERANCE
        )
        cases[f"plain {short}"] = lambda p=plain, a=args: p(model, *a)
        cases[f"plain blocked {short}"] = lambda p=plain, a=args: blocked(p, model, block, *a)
    seconds = {name: [] for name in cases}
    outputs = {}
    for _ in range(repeats):
        for name, call in cases.items():
            start = time.process_time()
            for _ in range(calls):
                outputs[name] = call()
            seconds[name].append((time.process_time() - start) / calls)
    medians = {name: statistics.median(s) * D / n for name, s in seconds.items()}
    # quantecon: slow per draw, so timed once on the first n_qe draws and scaled.
    ours_pi = outputs["ours PI"]
    epsilon = TOLERANCE * np.abs(ours_pi.value[:n_qe, 0]).max(axis=-1)
    for method, short in (("policy_iteration", "PI"), ("value_iteration", "VI")):
        start = time.process_time()
        sigma = quantecon_loop(small, method, epsilon)
        medians[f"quantecon {short}"] = (time.process_time() - start) * D / n_qe
        ours = outputs[f"ours {short}"]
        decided = (~ours.indifferent[:n_qe, 0]) & ours.decision_states
        if ((ours.policy[:n_qe, 0] != sigma) & decided).any():
            raise SystemExit(f"S={S} A={A}: {short} policies differ from quantecon")
        plain_policy = outputs[f"plain {short}"][0]
        decided = (~ours.indifferent[:, 0]) & ours.decision_states
        if ((ours.policy[:, 0] != plain_policy) & decided).any():
            raise SystemExit(f"S={S} A={A}: {short} policies differ from the plain reference")
    diff = float(np.abs(ours_pi.value[:, 0] - outputs["plain PI"][1]).max())
    if diff > 1e-6 * float(np.abs(ours_pi.value).max()):
        raise SystemExit(f"S={S} A={A}: PI values differ from the plain reference by {diff:g}")
    return {"S": S, "A": A, "D": D, "timed": n, "timed_qe": n_qe, **medians}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--states", type=int, nargs="*", default=[12, 50, 200])
    parser.add_argument("--draws", type=int, nargs="*", default=[1, 1000, 10000])
    parser.add_argument("--cyclic", action="store_true", help="add a step back to every row")
    args = parser.parse_args()
    print("SYNTHETIC benchmark models (invented numbers); research use only.")
    if args.cyclic:
        print("Moves with a step back (cyclic): exact evaluation factorises.")
    print(
        "CPU seconds (median, interleaved; large cells timed on the first draws and scaled). "
        "Ratios = other / ours: > 1 means ours is faster."
    )
    header = (
        "| S | A | D | timed draws (quantecon) | ours PI | plain PI | plain blocked PI | "
        "quantecon PI | ours VI | plain VI | plain blocked VI | quantecon VI |"
    )
    print(header)
    print("|" + "---|" * 12)
    warm = synthetic_model(5, 2, 2)  # compile or load the kernels before any timing
    for method in ("policy_iteration", "value_iteration"):
        solve(warm, OBJECTIVE, method=method)
        quantecon_loop(warm, method, np.full(2, 1e-6))  # quantecon compiles on first use
    worst = {}
    for S in args.states:
        for A in (2, 3):
            for D in args.draws:
                r = cell(S, A, D, args.repeats, args.cyclic)
                row = [str(S), str(A), str(D), f"{r['timed']} ({r['timed_qe']})"]
                for short in ("PI", "VI"):
                    ours = r[f"ours {short}"]
                    row.append(f"{ours:.3g} s")
                    for other in ("plain", "plain blocked", "quantecon"):
                        ratio = r[f"{other} {short}"] / ours
                        worst[(other, short)] = min(worst.get((other, short), np.inf), ratio)
                        row.append(f"{ratio:.2f}x")
                print("| " + " | ".join(row) + " |", flush=True)
    print("\nsmallest ratio over the grid (>= 1 means never slower):")
    for (other, short), ratio in worst.items():
        print(f"  {other} {short} / ours {short}: {ratio:.2f}x")
    print("(machine shared with other jobs while measured: absolute times are noisy)")


if __name__ == "__main__":
    main()
