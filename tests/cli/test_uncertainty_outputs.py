"""``caredecide uncertainty``: probabilistic means, population value of information,
parameters held fixed, per-strategy costs and QALYs in draws.csv."""

from __future__ import annotations

import pandas as pd
import pytest
from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.uncertainty.voi import discounted_population
from synthetic_cohort import MODELS_DIR

runner = CliRunner()
DEMO = MODELS_DIR / "demo_progressive.toml"


def test_population_and_means_are_printed_and_written(tmp_path):
    out = tmp_path / "out"
    result = runner.invoke(
        app,
        ["uncertainty", str(DEMO), "--draws", "40", "--seed", "2", "--population-per-year",
         "1000", "--decision-years", "3", "--quiet", "--out", str(out)],
    )  # fmt: skip
    assert result.exit_code == 0, result.output
    assert "RESEARCH USE ONLY" in result.stderr
    assert "Probabilistic means per strategy" in result.stdout
    assert "Parameters held fixed at their base value" in result.stdout
    assert "q_toxicity" in result.stdout.split("held fixed")[1]
    population = pd.read_csv(out / "population_value_of_information.csv")
    # Demo outcome discount 3.5%: 1000 (1 + 1/1.035 + 1/1.035^2) persons (see
    # tests/test_psa_outputs.py for the hand arithmetic).
    assert population["persons"].iloc[0] == pytest.approx(discounted_population(1000, 3, 0.035))
    assert (out / "ce_plane_draws.svg").read_text().lstrip().startswith("<svg")
    draws = pd.read_csv(out / "draws.csv")
    means = pd.read_csv(out / "strategy_means.csv")
    for name in means["strategy"].iloc[:-1]:
        assert draws[f"cost: {name}"].mean() == pytest.approx(
            means.set_index("strategy").at[name, "mean_cost"], rel=1e-9
        )


def test_unknown_reference_is_a_clear_error():
    result = runner.invoke(
        app, ["uncertainty", str(DEMO), "--draws", "5", "--reference", "nope", "--quiet"]
    )
    assert result.exit_code == 2
    assert "reference" in result.stderr and "nope" in result.stderr


def test_long_tables_of_numbers_read_back_as_pandas_writes_them(tmp_path):
    # draws.csv goes through Arrow's CSV writer: every value must read back exactly as
    # from pandas' own CSV (shortest round-trip text of a float64: common practice),
    # ordinary numbers in the very same text; short or text tables stay with pandas.
    import numpy as np

    from caredecide.cli.uncertainty import FAST_CSV_ROWS, _write_csv

    rng = np.random.default_rng(3)
    edges = [0.0, -0.0, 55.0, np.nan, np.inf, -np.inf, 1e-7, 2.5e15, 0.1, 1 / 3]
    frame = pd.DataFrame(
        {
            "draw": np.arange(FAST_CSV_ROWS),
            "edges": np.resize(edges, FAST_CSV_ROWS),
            "cost: a, b": rng.gamma(2.0, 900.0, FAST_CSV_ROWS),
            "whole": 3.0,
        }
    )
    _write_csv(frame, tmp_path / "fast.csv")
    frame.to_csv(tmp_path / "pandas.csv", index=False)
    pd.testing.assert_frame_equal(
        pd.read_csv(tmp_path / "fast.csv"), pd.read_csv(tmp_path / "pandas.csv"), check_exact=True
    )
    ordinary = frame.drop(columns="edges")
    _write_csv(ordinary, tmp_path / "fast.csv")
    ordinary.to_csv(tmp_path / "pandas.csv", index=False)
    assert (tmp_path / "fast.csv").read_text() == (tmp_path / "pandas.csv").read_text()
    assert (tmp_path / "fast.csv").read_text().startswith('draw,"cost: a, b",whole\n0,')
    short = frame.head(5).assign(label="x")
    _write_csv(short, tmp_path / "short.csv")
    assert (tmp_path / "short.csv").read_text() == short.to_csv(index=False)


def test_draws_plane_labels_the_chart_not_each_of_thousands_of_points():
    # One description for the scatter; no screen-reader label per draw (common practice
    # for dense scatter plots: a label per mark is noise to a screen reader).
    import vl_convert

    from caredecide.decision_charts import make_draws_plane_chart

    frame = pd.DataFrame(
        {"strategy": ["a", "b"] * 50, "draw": range(100), "cost": range(100), "qalys": range(100)}
    )
    spec = make_draws_plane_chart(frame).to_dict()
    assert spec["mark"]["aria"] is False
    assert spec["description"].startswith("Scatter plot of the cost (y) and QALYs (x)")
    svg = vl_convert.vegalite_to_svg(spec)
    # 100 points drawn; the only labels left are the axes', the legend's and the title's.
    assert svg.count("<path") >= 100 and svg.count("aria-label") == 4
