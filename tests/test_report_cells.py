"""The report's transition-cell part: the same table as the CLI, one matrix per action."""

from __future__ import annotations

import pandas as pd
import pytest

from caredecide.modelfile import load_model
from caredecide.report import build_report, tables_dir_for
from caredecide.sensitivity import cell_sensitivity
from tests.cli.test_sensitivity import HAND_MODEL


def test_report_shows_the_cli_table_and_a_matrix_per_action(tmp_path):
    path = tmp_path / "hand.toml"
    path.write_text(HAND_MODEL, encoding="utf-8")
    out = tmp_path / "report.html"
    build_report(path, out)
    page = out.read_text(encoding="utf-8")
    part = page[page.index("<h3>Transition cells</h3>") :]
    assert part.count("<svg") >= 2  # wait and treat
    assert "Action: wait" in part and "Action: treat" in part
    shown = pd.read_csv(tables_dir_for(out) / "transition_cells_table.csv")
    # The CLI prints summary_table() of the same analysis: the same rows and columns.
    expected = cell_sensitivity(load_model(path)).summary_table()
    assert list(shown.columns) == list(expected.columns)
    assert list(shown["from"] + ">" + shown["to"]) == list(expected["from"] + ">" + expected["to"])
    # Source: by hand, as in tests/cli/test_sensitivity_cells.py: the wait cell at 0.9.
    wait = shown[(shown["action"] == "wait") & (shown["to"] == "dead")].iloc[0]
    assert wait["switch below 1"] == pytest.approx(0.9, abs=1e-8)
