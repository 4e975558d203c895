"""Parse once benchmark: a one-way analysis with each model expanded and parsed once.

Not a test: prints CPU times measured in this run on this machine and their ratios.

Measured: ``caredecide.sensitivity.one_way`` (three estimates, 7 parameter sets) of the
SYNTHETIC progressive chain model of ``bench_sparse.py`` (``--states``, default 2,000 and
4,000 states, 2 actions, infinite horizon), solved sparse (the library's rule) and dense
(dense chunk rule and dense solves, as ``bench_sparse.py`` forces them); the one-way
analysis of two estimates of the SYNTHETIC tunnel x attribute model of
``bench_sparse_cycles.py`` (``--tunnel-groups``, default 20: 1,961 flat states generated
from 3 declared ones, 45 cycles; the library's rule picks the form); and of every
parameter of the SYNTHETIC demo model (the workload of ``bench_sensitivity.py``). Each
run is a fresh process: the model text is read (and validated) first, then the analysis
is timed; "read + one-way" adds the reading. Each process first runs the same analysis
on another model object (the 320-state chain, or a second reading of the tunnel model
or of the demo) so that compiled loops and imports are not timed.

Reference: the same runs with an older checkout (``--baseline PATH``, e.g. ``git worktree
add --detach PATH <commit before the parse cache>``), which expands and parses the
model again in the memory estimate, the compile and once per varied estimate. Runs
alternate between the two checkouts; the one-way tables must agree to 1e-9 relative.
The number of fresh parses during the timed analysis is printed for both.

Run: python benchmarks/bench_parse_once.py --baseline PATH [--states 2000 4000]
     [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from child_runs import run_child

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
DEMO = "synthetic_cohort/models/demo_progressive.toml"

CHILD = r"""
import json, sys, time
sys.path.insert(0, {src!r})
sys.path.insert(1, {here!r})
import caredecide
from caredecide import chunks
from caredecide import compile as compile_module
from caredecide.modelfile import loads_model
from caredecide.sensitivity import one_way
from bench_parse_once import tunnel_model_text
from bench_sparse import chain_model_text

if {form!r} == "dense":  # the reference form of bench_sparse.py: dense chunks and solves
    solve = chunks.solve
    chunks.solve = lambda c, o, **k: solve(c, o, **{{**k, "transition_form": "dense"}})
    chunks.sparse_chunk_size = lambda *a, **k: None
parses = []
# Fresh parses: compile._parse_flat where the parse is kept per model, else every call.
name = "_parse_flat" if hasattr(compile_module, "_parse_flat") else "parse_model_expressions"
parse = getattr(compile_module, name)
setattr(compile_module, name, lambda m: parses.append(1) or parse(m))
if {states} == 0:
    with open({demo!r}) as handle:
        text, file, names = handle.read(), "demo.toml", None
    warm = text  # another object of the same model: its loops and imports, not its parse
elif {states} < 0:  # -groups: the tunnel x attribute model of bench_sparse_cycles.py
    text, file, names = tunnel_model_text(-{states}), "tunnels.toml", ["p_progress", "hr_drug"]
    warm = text  # the same form (dense or sparse rows) and loops as the timed run
else:
    text, file, names = chain_model_text({states}), "chain.toml", ["p_prog", "p_die", "rr_treat"]
    warm = chain_model_text(320)
one_way(loads_model(warm, file="warm.toml"), names)  # load the loops
start = time.process_time()
model = loads_model(text, file=file)
read = time.process_time() - start
parses.clear()
start = time.process_time()
done = one_way(model, names)
seconds = time.process_time() - start
table = done.table.set_index("parameter")
print(json.dumps({{
    "source": caredecide.__file__, "read": read, "seconds": seconds, "parses": len(parses),
    "values": table[["value_low", "value_base", "value_high"]].to_numpy().ravel().tolist(),
}}))
"""


def tunnel_model_text(groups: int) -> str:
    """The SYNTHETIC model of ``bench_sparse_cycles.py`` (``groups`` risk groups x a
    2-year tunnel x drug on/off, 45 cycles, age-dependent mortality; 1,961 flat states
    at 20 groups), with a range on two estimates for the one-way analysis."""
    from bench_sparse_cycles import model_text

    text = model_text(groups, 45)
    for name, value, low, high in (("p_progress", 0.05, 0.04, 0.06), ("hr_drug", 0.6, 0.5, 0.7)):
        table = f"[parameters.{name}]\nvalue = {value}\n"
        if table not in text:
            raise SystemExit(f"bench_sparse_cycles.model_text no longer has {table!r}")
        text = text.replace(table, f"{table}low = {low}\nhigh = {high}\n")
    return text


def run(src: Path, states: int, form: str) -> dict:
    """One fresh process of checkout ``src``: read the model, time its one-way analysis."""
    code = CHILD.format(
        src=str(src), here=str(HERE), form=form, states=states, demo=str(REPO / DEMO)
    )
    return run_child(code, f"run ({src}, {states} states, {form})", checkout=src)


def load() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--baseline", type=Path, required=True, help="an older checkout")
    parser.add_argument("--states", type=int, nargs="+", default=[2000, 4000])
    parser.add_argument("--tunnel-groups", type=int, nargs="*", default=[20])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    print("Research use only; SYNTHETIC models with invented numbers.")
    print(f"load average at the start: {load()}")
    checkouts = {"baseline": args.baseline.resolve(), "current": REPO}
    cases = [(s, f) for s in args.states for f in ("sparse", "dense")]
    cases += [(-g, "auto") for g in args.tunnel_groups] + [(0, "auto")]
    for states, form in cases:
        runs: dict[str, list[dict]] = {name: [] for name in checkouts}
        for _ in range(args.repeats):
            for name, src in checkouts.items():  # alternating
                runs[name].append(run(src, states, form))
        first, second = (runs[name][0]["values"] for name in checkouts)
        scale = max(abs(v) for v in first)
        gap = max(abs(a - b) for a, b in zip(first, second, strict=True))
        if gap > 1e-9 * scale:
            raise SystemExit(f"{states} states, {form}: the checkouts disagree ({gap:g})")
        what = (
            "demo_progressive, every parameter"
            if states == 0
            else f"tunnel model, {-states} groups, 2 estimates"
            if states < 0
            else f"{states} states"
        )
        print(f"\n== one-way analysis, {what}, {form} (median of {args.repeats}) ==")
        print(f"answers agree (max |value difference| {gap:.1e}, values up to {scale:.3g})")
        t = {}
        for name, rs in runs.items():
            one = statistics.median(r["seconds"] for r in rs)
            both = statistics.median(r["seconds"] + r["read"] for r in rs)
            t[name] = (one, both)
            print(
                f"  {name:8s} one-way {one:7.3f} s CPU   read + one-way {both:7.3f} s   "
                f"fresh parses in the one-way: {rs[0]['parses']}"
            )
        print(
            f"  baseline / current: one-way {t['baseline'][0] / t['current'][0]:.2f}x, "
            f"read + one-way {t['baseline'][1] / t['current'][1]:.2f}x"
        )
    print(f"\nload average at the end: {load()}")


if __name__ == "__main__":
    main()
