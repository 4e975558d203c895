"""``caredecide sensitivity --transition-cells`` on the hand-checkable model file."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from tests.cli.test_sensitivity import model_file  # noqa: F401 (the fixture: HAND_MODEL)

runner = CliRunner()


def test_transition_cells_table_csv_and_matrices(model_file, tmp_path):  # noqa: F811
    # Source: by hand (the Bellman equation of HAND_MODEL's two cycles, common practice).
    # Net benefit at 1000 per QALY; treat is best at cycle 0 while its margin
    # 1000 (d_wait - d_treat - loss) > 0, with d_wait = 0.1, d_treat = p hr = 0.04, loss = 0.05.
    # Wait cell scaled by k: 0.1 k - 0.04 - 0.05 = 0 at k = 0.9.
    # Treat cell scaled by k: 0.1 - 0.04 k - 0.05 = 0 at k = 1.25.
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        ["sensitivity", str(model_file), "--transition-cells", "--cell-loss-factors", "0.5",
         "1.5", "--out", str(out), "--quiet"],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr
    assert "Transition cells" in result.stdout
    assert "value lost at 1.5x" in result.stdout
    assert "wait sick -> dead: below: sick treat->wait at ages 0" in result.stdout
    frame = pd.read_csv(out / "transition_cells.csv").set_index("cell")
    assert frame.at["transitions.wait.sick.dead", "factor_below"] == pytest.approx(0.9, abs=1e-8)
    assert frame.at["transitions.treat.sick.dead", "factor_above"] == pytest.approx(1.25, abs=1e-8)
    # Value lost at k = 1.5 on the treat cell: 1000 (0.04 * 1.5 + 0.05 - 0.1) = 10.
    assert frame.at["transitions.treat.sick.dead", "value_lost_above"] == pytest.approx(10.0)
    for action in ("wait", "treat"):
        assert (out / f"transition_cells_{action}.svg").read_text().lstrip().startswith("<svg")
        assert (out / f"transition_cells_{action}.png").stat().st_size > 0


@pytest.mark.parametrize(
    ("options", "named"),
    [
        (["--cell-loss-factors", "2", "3"], "--cell-loss-factors"),
        (["--cell-search-max", "0.5"], "--cell-search-max"),
    ],
)
def test_bad_cell_options_are_refused_by_name_before_the_run(model_file, options, named):  # noqa: F811
    result = runner.invoke(app, ["sensitivity", str(model_file), "--transition-cells", *options])
    assert result.exit_code == 2
    assert named in result.stderr
