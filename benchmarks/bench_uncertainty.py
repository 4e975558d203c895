"""End to end: `caredecide uncertainty` on the demo model, split by step, serial vs workers.

Not a test: prints times measured in this run on this machine, and their ratios.

1. The split (CPU seconds of one serial run, in a fresh process): imports, sampling,
   compile, solve, evaluate, value of information (EVPI, EVPPI), outputs (tables and
   charts written to a temporary folder), the rest; with the peak resident memory.
2. Serial against ``--workers 2`` (wall and CPU seconds, fresh processes, interleaved):
   as the command runs it (threads only on idle cores, so on a busy machine it runs
   serially) and with two threads forced whatever the load (what threads give).
3. With ``--baseline PATH`` (a checkout of an older caredecide, e.g. from
   ``git worktree add --detach /tmp/base16 d231d62``, main when issue 16 was filed), the
   same serial run of that version on its own demo model (the demo file format changed
   since), interleaved in the same run, and the ratio.

Every process runs with one BLAS thread (``OPENBLAS_NUM_THREADS=1`` ...), the baseline's
too, as the command line now sets by default: BLAS threads spinning on a shared machine
would otherwise decide the times. Every version runs once on 50 draws before the timing
(compiled loops and bytecode caches written, as after installing).

With idle cores beside it, the command builds and lays its charts out in second processes
(``caredecide.cli.chart_process``, one per idle core, at most two; the scatter of the draws
starts as soon as the first 1,000 draws are evaluated); "CPU (with its processes)" counts
theirs, "peak" is the command's own process.

Run: python benchmarks/bench_uncertainty.py [--draws 10000] [--repeats 3] [--baseline PATH]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = Path("synthetic_cohort") / "models" / "demo_progressive.toml"  # of each version

CHILD = r"""
import json, resource, sys, time
start_cpu = time.process_time()
sys.path.insert(0, {src!r})
import caredecide.cli as cli
import caredecide.cli.uncertainty as cli_uncertainty
import caredecide.uncertainty.psa as psa
from caredecide.uncertainty.sampling import ParameterSampler
split = {{"imports": time.process_time() - start_cpu}}

def timed(owner, name, step):
    original = getattr(owner, name)
    def wrapper(*args, **kwargs):
        begin = time.process_time()
        try:
            return original(*args, **kwargs)
        finally:
            split[step] = split.get(step, 0.0) + time.process_time() - begin
    setattr(owner, name, wrapper)

if hasattr(psa, "usable_threads"):  # versions with --workers threads: count them
    usable = (lambda requested, *watch: requested) if {force_threads!r} else psa.usable_threads
    def counting(requested, *watch):
        split["threads"] = usable(requested, *watch)
        return split["threads"]
    psa.usable_threads = counting
if {split_steps!r}:
    timed(ParameterSampler, "draw", "sampling")
    timed(psa, "compile_model", "compile")
    timed(psa, "solve", "solve")
    for name in ("policy_totals", "evaluate_policies"):  # the evaluation this version calls
        if hasattr(psa, name):
            timed(psa, name, "evaluate")
    timed(psa, "evpi", "value of information")
    timed(psa, "evppi_regression", "value of information")
    timed(cli_uncertainty, "_write_outputs", "outputs")
sys.argv = ["caredecide", "uncertainty", {model!r}, "--draws", {draws!r}, "--out", {out!r},
            "--quiet", *{extra!r}]
try:
    cli.main()
except SystemExit as stop:
    if stop.code:
        raise
split["total"] = time.process_time()
split["peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps(split))
"""


ONE_BLAS_THREAD = {
    name: "1" for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
}


CHILD_ENV = {
    **{name: value for name, value in os.environ.items() if name != "PYTHONDONTWRITEBYTECODE"},
    **ONE_BLAS_THREAD,
}
"""Children write and reuse bytecode caches, as an installed package has them (a shell
with PYTHONDONTWRITEBYTECODE would otherwise compile every module of a checkout anew in
every run, the baseline's too)."""


def run_child(
    src: Path, draws: int, extra: list[str], split_steps: bool, force_threads: bool = False
) -> dict[str, float]:
    """One fresh process; returns its split (CPU s), wall seconds and children's CPU."""
    with tempfile.TemporaryDirectory() as out:
        code = CHILD.format(
            src=str(src),
            split_steps=split_steps,
            force_threads=force_threads,
            model=str(src / DEMO),
            draws=str(draws),
            out=out,
            extra=extra,
        )
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        start = time.perf_counter()
        done = subprocess.run(
            [sys.executable, "-c", code],
            capture_output=True,
            text=True,
            cwd=str(src),
            env=CHILD_ENV,
        )
        wall = time.perf_counter() - start
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if done.returncode:
        raise SystemExit(f"run failed ({src}):\n{done.stderr[-2000:]}")
    info = json.loads(done.stdout.strip().splitlines()[-1])
    info["wall"] = wall
    info["cpu_all"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return info


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=10_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--baseline", type=Path, default=None)
    parser.add_argument("--split-only", action="store_true", help="Only part 1.")
    args = parser.parse_args()
    print("SYNTHETIC demo model (invented numbers); research use only.")
    for src in (ROOT, args.baseline) if args.baseline else (ROOT,):
        run_child(src, 50, [], False)  # kernels and bytecode cached before any timing

    split = run_child(ROOT, args.draws, [], True)
    print(f"== 1. uncertainty --draws {args.draws} on the demo, serial: CPU seconds by step ==")
    steps = ("imports", "sampling", "compile", "solve", "evaluate", "value of information")
    accounted = 0.0
    for step in (*steps, "outputs"):
        seconds = split.get(step, 0.0)
        accounted += seconds
        print(f"  {step:22s} {seconds:7.2f} s  {seconds / split['total']:6.1%}")
    rest = split["total"] - accounted
    print(f"  {'rest (analysis, CLI)':22s} {rest:7.2f} s  {rest / split['total']:6.1%}")
    print(
        f"  {'total':22s} {split['total']:7.2f} s   wall {split['wall']:.2f} s   "
        f"peak resident memory {split['peak_mib']:.0f} MiB (target <= 1024 MiB)"
    )

    if args.split_only:
        return
    runs: dict[str, list[dict[str, float]]] = {
        "serial": [],
        "--workers 2": [],
        "2 threads forced": [],
    }
    if args.baseline:
        runs["baseline serial"] = []
    launches = {
        "serial": lambda: run_child(ROOT, args.draws, [], False),
        "--workers 2": lambda: run_child(ROOT, args.draws, ["--workers", "2"], False),
        "2 threads forced": lambda: run_child(
            ROOT, args.draws, ["--workers", "2"], False, force_threads=True
        ),
        "baseline serial": lambda: run_child(args.baseline, args.draws, [], False),
    }
    loads = []
    for repeat in range(args.repeats):
        loads.append(os.getloadavg()[0])
        # The order turns each repeat, so no variant always runs first (or after another).
        order = list(runs)
        for name in order[repeat % len(order) :] + order[: repeat % len(order)]:
            runs[name].append(launches[name]())
    print(f"\n== 2. fresh processes, interleaved (order turning), median of {args.repeats} ==")
    median = {
        name: {
            key: statistics.median(r.get(key, 1) for r in rs)
            for key in ("wall", "cpu_all", "peak_mib", "threads")
        }
        for name, rs in runs.items()
    }
    for name, m in median.items():
        threads = "" if name.startswith("baseline") else f"   threads {m['threads']:.0f}"
        print(
            f"  {name:16s} wall {m['wall']:7.2f} s   CPU (with its processes) "
            f"{m['cpu_all']:7.2f} s   peak {m['peak_mib']:5.0f} MiB{threads}"
        )
    serial = median["serial"]
    for name in ("--workers 2", "2 threads forced"):
        pairs = zip(runs[name], runs["serial"], strict=True)
        paired = sorted(other["wall"] / alone["wall"] for other, alone in pairs)
        print(
            f"  {name} / serial: wall {median[name]['wall'] / serial['wall']:.2f}x"
            + (" (target <= 1.00x)" if name == "--workers 2" else "")
            + f"; repeat by repeat {paired[0]:.2f}x to {paired[-1]:.2f}x, "
            f"median {statistics.median(paired):.2f}x"
        )
    if args.baseline:
        base = median["baseline serial"]
        print(
            f"  baseline / this (serial): wall {base['wall'] / serial['wall']:.2f}x, "
            f"CPU {base['cpu_all'] / serial['cpu_all']:.2f}x (target >= 4x)"
        )
    print(
        f"(machine load while measured: {min(loads):.1f} to {max(loads):.1f} on "
        f"{os.cpu_count()} cores; other jobs share them)"
    )


if __name__ == "__main__":
    main()
