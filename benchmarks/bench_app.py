"""App benchmark: re-rendering the policy view after one parameter edit, against the library.

Not a test: prints times measured in this run on this machine and their ratios.

Target (the app's issue): changing one value and re-rendering the policy view takes under
one second on the SYNTHETIC demo model.

Measured, in one process, with Streamlit's AppTest on ``ui/app.py`` and the demo model
(given through ``CAREDECIDE_MODEL``, as ``caredecide app`` does):

1. *Edit*: one parameter value (``c_drug_year`` by default) is changed to a new value each
   repetition through the data editor's session-state dict, the route the AppTest tests use
   (the model view applies it and reruns).
2. *Edit re-render*: the policy view is then shown again (``switch_page`` + ``run``): the new
   text is validated, compiled, solved and evaluated (cache miss) and every chart is built.
   This is the number the target is about.
3. *Cache hit*: the policy view re-run with nothing changed (solves cached on the text).
4. Reference, *library alone*: load -> compile -> solve -> evaluate (with the trace and totals
   frames the view shows) of the same edited model texts, no Streamlit, in the same run.

Other processes may load the machine: every time is repeated and the median is reported
(max beside it). Drafts are autosaved to a temporary ``CAREDECIDE_HOME``, never to yours.

Run: python benchmarks/bench_app.py [--repeats 9] [--parameter c_drug_year] [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import statistics
import sys
import tempfile
import time
from pathlib import Path

from caredecide.cautions import CAUTION_SHORT
from caredecide.compile import compile_model
from caredecide.evaluate import evaluate_policy
from caredecide.modelfile import loads_model
from caredecide.objective import Objective
from caredecide.solvers import solve
from synthetic_cohort import demo_model_path

APP = str(Path(__file__).resolve().parents[1] / "ui" / "app.py")
TARGET_SECONDS = 1.0
TEXT_KEY = (
    "cd_model_text"  # ui.working_model.TEXT_KEY (imported lazily: ui needs the env set first)
)
REVISION_KEY = "cd_revision"  # ui.working_model.REVISION_KEY


def library_alone(text: str, base_dir: str, kind: str, wtp: float) -> None:
    """load -> compile -> solve -> evaluate (+ the frames the view shows) of one model text."""
    model = loads_model(text, file="bench.toml", base_dir=base_dir)
    compiled = compile_model(model)
    objective = Objective(kind, wtp)
    result = solve(compiled, objective)
    outcome = evaluate_policy(compiled, result.policy, objective)
    outcome.trace_frame()
    outcome.totals_frame()


def timed(call) -> tuple[float, float]:
    """Wall-clock and CPU seconds of ``call()``.

    CPU time is this process's, every thread (AppTest runs the script in its own thread):
    it hardly depends on what other processes do, so it shows the cost on an idle core.
    """
    wall, cpu = time.perf_counter(), time.process_time()
    call()
    return time.perf_counter() - wall, time.process_time() - cpu


def check(at) -> None:
    """A benchmark of a broken page measures nothing: stop on any exception or error box."""
    if at.exception or at.error:
        sys.exit(f"the app failed: {at.exception or [e.value for e in at.error]}")


def median(times: list[tuple[float, float]], which: int = 0) -> float:
    """Median wall (``which=0``) or CPU (``which=1``) seconds."""
    return statistics.median(t[which] for t in times)


def summary(name: str, times: list[tuple[float, float]]) -> str:
    return (
        f"{name:<46} wall median {median(times) * 1e3:7.1f} ms, "
        f"max {max(t[0] for t in times) * 1e3:7.1f} ms;  CPU median "
        f"{median(times, 1) * 1e3:7.1f} ms  (n={len(times)})"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=9)
    parser.add_argument(
        "--parameter",
        default="c_drug_year",
        help="parameter of the demo model whose value is edited",
    )
    parser.add_argument(
        "--profile",
        action="store_true",
        help="print a cProfile of one more edit re-render (not counted)",
    )
    args = parser.parse_args()

    print(f"{CAUTION_SHORT} (SYNTHETIC demo model)", file=sys.stderr)
    home = tempfile.mkdtemp(prefix="caredecide-bench-app-")
    os.environ["CAREDECIDE_HOME"] = home
    os.environ["CAREDECIDE_MODEL"] = str(demo_model_path())

    import streamlit as st
    from streamlit.testing.v1 import AppTest

    st.cache_data.clear()
    load_before = os.getloadavg()
    at = AppTest.from_file(APP, default_timeout=600)
    first, _ = timed(at.run)
    check(at)
    text = at.session_state[TEXT_KEY]
    base_dir = str(demo_model_path().parent)
    base = loads_model(text, file="bench.toml", base_dir=base_dir)
    settings = base.settings
    kind, wtp = settings.objective, float(settings.willingness_to_pay)
    names = list(base.parameters)
    row = names.index(args.parameter)
    base_value = float(base.parameters[args.parameter].value)

    first_policy, _ = timed(lambda: at.switch_page("views/policy.py").run())
    check(at)
    for _ in range(2):  # warm-up: imports, first chart builds, the base-case solve cached
        at.run()
        check(at)

    edit_times, render_times, hit_times, library_times = [], [], [], []
    profiler = cProfile.Profile() if args.profile else None
    for i in range(args.repeats + (1 if profiler else 0)):
        at.switch_page("views/model.py").run()
        check(at)
        value = base_value * (1.0 + 0.01 * (i + 1))  # a new value each time: a cache miss
        key = f"table_parameters_{at.session_state[REVISION_KEY]}"
        at.session_state[key] = {
            "edited_rows": {row: {"value": value}},
            "added_rows": [],
            "deleted_rows": [],
        }
        edit = timed(at.run)
        check(at)
        edited = at.session_state[TEXT_KEY]
        if (
            loads_model(edited, file="bench.toml", base_dir=base_dir)
            .parameters[args.parameter]
            .value
            != value
        ):
            sys.exit("the edit did not reach the working model")
        at.switch_page("views/policy.py")
        if profiler is not None and i == args.repeats:
            render = profile_run(at, profiler)  # one extra run, not in the statistics
        else:
            render = timed(at.run)
        check(at)
        shown_label = at.metric[3].label if len(at.metric) > 3 else ""
        if not shown_label.startswith("Net monetary benefit") and kind == "net_benefit":
            sys.exit("the policy view did not show its totals")
        hit = timed(at.run)
        check(at)
        if i < args.repeats:
            edit_times.append(edit)
            render_times.append(render)
            hit_times.append(hit)
            # The reference right beside the app's run, so both see the same machine load.
            library_times += [
                timed(lambda t=edited: library_alone(t, base_dir, kind, wtp)) for _ in range(2)
            ]

    load_after = os.getloadavg()

    render, render_cpu = median(render_times), median(render_times, 1)
    edit = median(edit_times)
    print(
        f"App benchmark on the SYNTHETIC demo model ({demo_model_path().name}); "
        f"edit: parameter {args.parameter} (base {base_value:g}) +1%, +2%, ..."
    )
    print(
        f"Machine: {os.cpu_count()} cores; load average {load_before[0]:.2f} before, "
        f"{load_after[0]:.2f} after: other processes share this machine, so each time is "
        f"repeated and the MEDIAN is reported (max beside it). CPU time (this process, all "
        f"threads) is beside it: it is what the work costs on an idle core."
    )
    print(f"first app run (model view, cold)               wall {first * 1e3:7.1f} ms")
    print(f"first policy view (cold: imports, solve)       wall {first_policy * 1e3:7.1f} ms")
    print(summary("edit applied in the model view", edit_times))
    print(summary("policy view re-render after the edit", render_times))
    print(summary("policy view re-render, no change (cache hit)", hit_times))
    print(summary("library alone: load->compile->solve->evaluate", library_times))
    print()
    print("ratios of medians                         wall     CPU")
    for name, top, bottom in (
        (f"edit re-render / {TARGET_SECONDS:g} s target", render_times, None),
        ("edit re-render / library alone", render_times, library_times),
        ("cache hit / edit re-render", hit_times, render_times),
        (f"(edit applied + re-render) / {TARGET_SECONDS:g} s target", None, None),
    ):
        if top is None:
            pair = [
                (median(edit_times, k) + median(render_times, k)) / TARGET_SECONDS for k in (0, 1)
            ]
        elif bottom is None:
            pair = [median(top, k) / TARGET_SECONDS for k in (0, 1)]
        else:
            pair = [median(top, k) / median(bottom, k) for k in (0, 1)]
        print(f"{name:<40} {pair[0]:7.3f} {pair[1]:7.3f}")
    verdict = "MET" if render < TARGET_SECONDS else "NOT MET"
    print(
        f"Target 'edit re-render of the policy view under {TARGET_SECONDS:g} s' on this machine "
        f"under its present load: {verdict} (wall median {render:.3f} s, max "
        f"{max(t[0] for t in render_times):.3f} s; CPU median {render_cpu:.3f} s). "
        f"Edit applied in the model view plus the re-render: wall median "
        f"{edit + render:.3f} s."
    )
    if profiler is not None:
        stream = io.StringIO()
        # Our code and the chart/table conversion it triggers (the rest is Streamlit's own).
        pstats.Stats(profiler, stream=stream).sort_stats("cumulative").print_stats(
            r"caredecide|/ui/|altair|vega_charts|dataframe_util", 40
        )
        print(stream.getvalue())


def profile_run(at, profiler: cProfile.Profile) -> tuple[float, float]:
    """Run the page with ``profiler`` active in every new thread (AppTest's script thread)."""
    import threading

    threading.setprofile(lambda *_: profiler.enable())  # hooks the script thread on start
    try:
        return timed(at.run)
    finally:
        threading.setprofile(None)
        profiler.disable()


if __name__ == "__main__":
    main()
