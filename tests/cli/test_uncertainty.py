"""``caredecide uncertainty`` on a small synthetic model file."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import tomli_w
from typer.testing import CliRunner

from caredecide.cautions import CAUTION_SHORT
from caredecide.cli import app
from caredecide.modelfile import load_model
from caredecide.uncertainty.psa import run_psa
from tests.test_psa import uncertain_model_dict

runner = CliRunner()


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("psa") / "small.toml"
    path.write_text(tomli_w.dumps(uncertain_model_dict()))
    return path


def test_writes_tables_charts_and_summary(model_file, tmp_path):
    out = tmp_path / "psa"
    result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "250", "--seed",
                                 "9", "--chunk-size", "100", "--wtp-range", "0", "50000",
                                 "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert CAUTION_SHORT in result.stderr
    assert "EVPI of the timing decision" in result.stdout
    assert "upper bound" in result.stdout
    for name in ("acceptability_by_age_band.csv", "acceptability_curves.csv", "evppi.csv",
                 "expected_loss.csv", "draws.csv", "convergence.csv", "summary.json",
                 "acceptability_by_state.svg", "acceptability_curves.png", "evppi.svg"):
        assert (out / name).is_file(), name
    # The files hold the library's figures for the same seed (no separate maths).
    direct = run_psa(load_model(model_file), 250, seed=9, wtp_range=(0.0, 50000.0))
    summary = json.loads((out / "summary.json").read_text())
    assert summary["evpi"] == pytest.approx(direct.evpi()["evpi"], rel=1e-12)
    curves = pd.read_csv(out / "acceptability_curves.csv")
    np.testing.assert_allclose(curves["wtp"].unique(), np.linspace(0, 50000, 41))
    bands = pd.read_csv(out / "acceptability_by_age_band.csv")
    np.testing.assert_allclose(bands.groupby(["state", "age_from"])["share"].sum(), 1.0)


def test_a_strategy_table_beside_the_model_joins_the_candidates(model_file, tmp_path):
    table = model_file.with_name("small.strategies.csv")
    table.write_text("strategy,state,action\nalways treat when sick,sick,treat\n")
    try:
        result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "20",
                                     "--out", str(tmp_path)])
    finally:
        table.unlink()
    assert result.exit_code == 0, result.output
    assert "Candidates include the strategies of" in result.stderr
    candidates = pd.read_csv(tmp_path / "candidates.csv")
    names = set(candidates["candidate"]) | set(candidates["also"].dropna().str.split("; ").sum())
    assert "always treat when sick" in names


def test_quiet_prints_no_caution(model_file):
    result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "20", "--quiet"])
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    assert "EVPPI not computed" in result.stdout


def test_refuses_workers_and_scheduler_together(model_file):
    result = runner.invoke(app, ["uncertainty", str(model_file), "--workers", "2",
                                 "--scheduler", "tcp://127.0.0.1:8786"])
    assert result.exit_code == 2
    assert "--workers or --scheduler, not both" in result.stderr


def test_refuses_a_bad_wtp_range(model_file):
    result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "10",
                                 "--wtp-range", "100", "10"])
    assert result.exit_code == 2
    assert "wtp_range: (100.0, 10.0); expected 0 <= LOW < HIGH" in result.stderr


def test_refuses_zero_draws(model_file):
    result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "0"])
    assert result.exit_code == 2
    assert "--draws" in result.output
