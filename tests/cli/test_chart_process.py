"""``caredecide.cli.chart_process``: charts laid out in second processes are the very
bytes the command writes itself (idle cores or not, a process failing or not)."""

from __future__ import annotations

import json
import subprocess
import sys

import altair as alt
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import caredecide.chunks as chunks
from caredecide.cli.chart_process import (
    ChartJob,
    ChartRenderer,
    build_chart,
    table_from_payload,
    table_payload,
)
from caredecide.cli.console import save_chart
from synthetic_cohort import MODELS_DIR


def _charts() -> dict[str, alt.Chart]:
    rng = np.random.default_rng(5)
    frame = pd.DataFrame(
        {"qalys": rng.normal(8, 1, 600), "cost": rng.normal(4e4, 9e3, 600), "arm": ["a", "b"] * 300}
    )
    curve = pd.DataFrame({"wtp": [0.0, 1e4, 2e4], "share": [0.1, np.nan, 0.8]})
    return {
        "scatter": alt.Chart(frame, title="Coût (€) per person")
        .mark_point()
        .encode(x="qalys:Q", y="cost:Q", color="arm:N"),
        "curve": alt.Chart(curve).mark_line(point=True).encode(x="wtp:Q", y="share:Q"),
        "bars": alt.Chart(curve).mark_bar().encode(x="wtp:O", y="share:Q"),
    }


def _serial(folder) -> dict[str, bytes]:
    folder.mkdir()
    for stem, chart in _charts().items():
        save_chart(chart, folder, stem)
    return {path.name: path.read_bytes() for path in sorted(folder.iterdir())}


def _rendered(renderer: ChartRenderer, folder) -> dict[str, bytes]:
    folder.mkdir()
    try:
        charts = _charts()
        renderer.submit({"scatter": charts.pop("scatter")})  # one process
        renderer.submit(charts)  # the other
        paths = renderer.results(folder)
    finally:
        renderer.close()
    assert [p.name for p in paths] == [
        f"{stem}.{kind}" for stem in ("scatter", "curve", "bars") for kind in ("svg", "png")
    ]
    return {path.name: path.read_bytes() for path in sorted(folder.iterdir())}


@pytest.fixture
def machine_cores(monkeypatch):
    """machine_cores(n): n cores free, this process on one of them."""

    def force(cores: int) -> None:
        monkeypatch.setattr(chunks, "idle_cores", lambda: float(cores - 1))

    return force


def test_second_processes_write_the_bytes_the_command_writes(tmp_path, machine_cores):
    machine_cores(3)
    renderer = ChartRenderer()
    assert renderer.processes == 2
    files = _rendered(renderer, tmp_path / "processes")
    assert renderer.laid_out_here == 0  # every chart came from a second process
    assert files == _serial(tmp_path / "serial")
    assert files["scatter.png"][:8] == b"\x89PNG\r\n\x1a\n"
    assert "Coût (€)" in files["scatter.svg"].decode("utf-8")


def test_no_idle_core_lays_everything_out_in_the_command(tmp_path, machine_cores):
    machine_cores(1)
    renderer = ChartRenderer()
    assert renderer.processes == 0
    files = _rendered(renderer, tmp_path / "here")
    assert renderer.laid_out_here == 3
    assert files == _serial(tmp_path / "serial")


def test_one_idle_core_one_second_process_for_every_lane(tmp_path, machine_cores):
    machine_cores(2)  # this process on one core, one idle
    renderer = ChartRenderer()
    assert renderer.processes == 1
    files = _rendered(renderer, tmp_path / "one")
    assert renderer.laid_out_here == 0
    assert files == _serial(tmp_path / "serial")


def test_charts_of_a_failed_process_are_laid_out_by_the_command(tmp_path, machine_cores):
    machine_cores(3)
    renderer = ChartRenderer()
    assert renderer.processes == 2
    for process in renderer._processes:  # both stop before any chart arrives
        process.kill()
        process.wait()
    files = _rendered(renderer, tmp_path / "failed")
    assert renderer.laid_out_here == 3
    assert files == _serial(tmp_path / "serial")


RUN = """
import sys
import caredecide.chunks as chunks
import caredecide.cli as cli
chunks.idle_cores = lambda: float({cores} - 1)  # 1 core: none idle, 2: one, 3: two
sys.argv = ["caredecide", "uncertainty", {model!r}, "--draws", "220", "--quiet", "--out", {out!r}]
cli.main()
"""


def test_uncertainty_outputs_are_the_same_with_and_without_second_processes(tmp_path):
    # Each command in a fresh process, as a user runs it (the renderer numbers gradients
    # over all it has laid out, so a process that drew other charts first would differ).
    demo = MODELS_DIR / "demo_progressive.toml"
    files = {}
    for cores in (1, 2, 3):
        out = tmp_path / f"cores{cores}"
        code = RUN.format(cores=cores, model=str(demo), out=str(out))
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        assert done.returncode == 0, done.stderr
        assert "RESEARCH USE ONLY" in done.stderr
        files[cores] = {path.name: path.read_bytes() for path in sorted(out.iterdir())}
    assert {"ce_plane_draws.svg", "ce_plane_draws.png", "evppi.png"} <= set(files[1])
    assert "summary.json" in files[1] and "draws.csv" in files[1]
    for cores in (2, 3):
        assert files[1].keys() == files[cores].keys()
        assert [name for name in files[1] if files[1][name] != files[cores][name]] == []


def _plane_table(rows: int = 40) -> pd.DataFrame:
    rng = np.random.default_rng(8)
    return pd.DataFrame(
        {
            "strategy": np.tile(np.array(["wait", "treat"], dtype=object), rows // 2),
            "draw": np.repeat(np.arange(rows // 2), 2),
            "cost": rng.normal(4e4, 9e3, rows),
            "qalys": rng.normal(8, 1, rows),
        }
    )


def _jobs() -> list[ChartJob]:
    curves = pd.DataFrame(
        {
            "wtp": [0.0, 0.0, 5e4, 5e4],
            "strategy": ["wait", "treat", "wait", "treat"],
            "probability_cost_effective": [0.9, 0.1, 0.3, 0.7],
            "mc_se": [0.03, 0.03, 0.046, 0.046],
        }
    )
    return [
        ChartJob("plane", "draws_plane", {"frame": _plane_table()}, {"currency": "€"}),
        ChartJob("curves", "acceptability_curves", {"curves": curves, "frontier": None}),
    ]


def test_chart_jobs_built_in_second_processes_give_the_bytes_built_here(tmp_path, machine_cores):
    serial = tmp_path / "serial"
    serial.mkdir()
    for job in _jobs():
        save_chart(build_chart(job), serial, job.stem)
    machine_cores(3)
    renderer = ChartRenderer()
    folder = tmp_path / "processes"
    folder.mkdir()
    try:
        plane, curves = _jobs()
        renderer.submit([curves], lane=1)  # lanes, not the order of calls, pick the process
        renderer.submit([plane], lane=0, png_there=True)  # its PNG rasterised there
        paths = renderer.results(folder)
    finally:
        renderer.close()
    assert renderer.laid_out_here == 0
    assert [p.name for p in paths] == ["curves.svg", "curves.png", "plane.svg", "plane.png"]
    assert {p.name: p.read_bytes() for p in paths} == {
        p.name: p.read_bytes() for p in serial.iterdir()
    }


def test_a_table_that_cannot_go_as_json_is_built_by_the_command(tmp_path, machine_cores):
    machine_cores(2)
    renderer = ChartRenderer()
    table = _plane_table().set_index("draw")  # an index the payload does not carry
    folder = tmp_path / "out"
    folder.mkdir()
    try:
        renderer.submit([ChartJob("plane", "draws_plane", {"frame": table})], lane=0)
        paths = renderer.results(folder)
    finally:
        renderer.close()
    assert renderer.laid_out_here == 0  # sent as the specification built here instead
    reference = tmp_path / "here"
    reference.mkdir()
    save_chart(build_chart(ChartJob("plane", "draws_plane", {"frame": table})), reference, "plane")
    assert {p.name: p.read_bytes() for p in paths} == {
        p.name: p.read_bytes() for p in reference.iterdir()
    }


@pytest.mark.parametrize(
    ("frame", "reason"),
    [
        (pd.DataFrame({"a": [1.0, 2.0]}, index=[3, 4]), "index"),
        (pd.DataFrame({0: [1.0]}), "column names"),
        (pd.DataFrame({"when": pd.to_datetime(["2026-01-01"])}), "dtype"),
    ],
)
def test_tables_that_cannot_go_as_json_are_refused_with_the_reason(frame, reason):
    with pytest.raises(TypeError, match=reason):
        table_payload(frame)


def test_an_unknown_chart_is_refused_with_the_known_ones():
    with pytest.raises(ValueError, match=r"unknown chart 'pie'.*draws_plane"):
        build_chart(ChartJob("x", "pie"))
    with pytest.raises(ValueError, match="unknown chart 'pie'"):
        ChartRenderer(enabled=False).submit([ChartJob("x", "pie")])


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=0, max_size=20).flatmap(
        lambda xs: st.tuples(
            st.just(xs),
            st.lists(st.integers(-(2**62), 2**62), min_size=len(xs), max_size=len(xs)),
            st.lists(st.one_of(st.none(), st.text(max_size=8)), min_size=len(xs), max_size=len(xs)),
            st.lists(st.booleans(), min_size=len(xs), max_size=len(xs)),
        )
    )
)
def test_tables_go_as_json_and_come_back_bit_for_bit(columns):
    # Python's json writes each float as its shortest repr, which reads back as the same
    # double (IEEE 754 round trip; common practice); NaN and infinities as NaN/Infinity.
    floats, ints, texts, flags = columns
    frame = pd.DataFrame(
        {
            "x": pd.Series(floats, dtype="float64"),
            "n": pd.Series(ints, dtype="int64"),
            "label": pd.Series(texts, dtype=object),
            "flag": pd.Series(flags, dtype=bool),
        }
    )
    back = table_from_payload(json.loads(json.dumps(table_payload(frame))))
    pd.testing.assert_frame_equal(back, frame, check_exact=True)
    numbers, sent = back["x"].to_numpy(), frame["x"].to_numpy()
    assert (np.isnan(numbers) == np.isnan(sent)).all()  # a NaN's sign is not kept
    kept = ~np.isnan(sent)
    assert numbers[kept].tobytes() == sent[kept].tobytes()  # -0.0 too


def test_a_chart_file_submitted_twice_is_refused():
    renderer = ChartRenderer(enabled=False)
    job = ChartJob("plane", "draws_plane", {"frame": _plane_table()})
    renderer.submit([job])
    with pytest.raises(ValueError, match=r"submitted twice: \['plane'\]"):
        renderer.submit([job])
