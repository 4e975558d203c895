"""``caredecide.cli.chart_process``: charts laid out in second processes are the very
bytes the command writes itself (idle cores or not, a process failing or not)."""

from __future__ import annotations

import subprocess
import sys

import altair as alt
import numpy as np
import pandas as pd
import pytest

import caredecide.chunks as chunks
from caredecide.cli.chart_process import ChartRenderer
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
    machine_cores(2)
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


def test_charts_of_a_failed_process_are_laid_out_by_the_command(tmp_path, machine_cores):
    machine_cores(2)
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
chunks.idle_cores = lambda: float({cores} - 1)
sys.argv = ["caredecide", "uncertainty", {model!r}, "--draws", "220", "--quiet", "--out", {out!r}]
cli.main()
"""


def test_uncertainty_outputs_are_the_same_with_and_without_second_processes(tmp_path):
    # Each command in a fresh process, as a user runs it (the renderer numbers gradients
    # over all it has laid out, so a process that drew other charts first would differ).
    demo = MODELS_DIR / "demo_progressive.toml"
    files = {}
    for cores in (1, 2):
        out = tmp_path / f"cores{cores}"
        code = RUN.format(cores=cores, model=str(demo), out=str(out))
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        assert done.returncode == 0, done.stderr
        assert "RESEARCH USE ONLY" in done.stderr
        files[cores] = {path.name: path.read_bytes() for path in sorted(out.iterdir())}
    assert {"ce_plane_draws.svg", "ce_plane_draws.png", "evppi.png"} <= set(files[1])
    assert "summary.json" in files[1] and "draws.csv" in files[1]
    assert files[1].keys() == files[2].keys()
    assert [name for name in files[1] if files[1][name] != files[2][name]] == []
