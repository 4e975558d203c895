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
from caredecide.uncertainty.psa import analyse_uncertainty
from tests.test_psa import uncertain_model_dict

runner = CliRunner()


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("psa") / "small.toml"
    path.write_text(tomli_w.dumps(uncertain_model_dict()))
    return path


def test_writes_tables_charts_and_summary(model_file, tmp_path):
    out = tmp_path / "psa"
    result = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "250",
            "--seed",
            "9",
            "--chunk-size",
            "100",
            "--wtp-range",
            "0",
            "50000",
            "--out",
            str(out),
        ],
    )
    assert result.exit_code == 0, result.output
    assert CAUTION_SHORT in result.stderr
    assert "EVPI of the timing decision" in result.stdout
    assert "upper bound" in result.stdout
    for name in (
        "acceptability_by_age_band.csv",
        "acceptability_curves.csv",
        "evppi.csv",
        "expected_loss.csv",
        "draws.csv",
        "convergence.csv",
        "summary.json",
        "acceptability_by_state.svg",
        "acceptability_curves.png",
        "evppi.svg",
    ):
        assert (out / name).is_file(), name
    # The files hold the library's figures for the same seed (no separate maths).
    direct = analyse_uncertainty(load_model(model_file), 250, seed=9, wtp_range=(0.0, 50000.0))
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
        result = runner.invoke(
            app, ["uncertainty", str(model_file), "--draws", "20", "--out", str(tmp_path)]
        )
    finally:
        table.unlink()
    assert result.exit_code == 0, result.output
    assert "Candidates include the strategies of" in result.stderr
    candidates = pd.read_csv(tmp_path / "candidates.csv")
    names = set(candidates["candidate"]) | set(candidates["also"].dropna().str.split("; ").sum())
    assert "always treat when sick" in names


def test_quiet_prints_the_caution_and_nothing_else(model_file, tmp_path):
    # The caution is always shown (as by solve, compare and check); --quiet drops the notes.
    result = runner.invoke(
        app, ["uncertainty", str(model_file), "--draws", "20", "--quiet", "--out", str(tmp_path)]
    )
    assert result.exit_code == 0, result.output
    # The model's warnings (its unused parameter, ...) are shown whatever --quiet says.
    kept = [line for line in result.stderr.splitlines() if not line.startswith("warning:")]
    assert " ".join(" ".join(kept).split()) == " ".join(CAUTION_SHORT.split())
    assert "EVPPI not computed" in result.stdout
    assert json.loads((tmp_path / "summary.json").read_text())["caution"] == CAUTION_SHORT


def test_refuses_workers_and_scheduler_together(model_file):
    result = runner.invoke(
        app,
        ["uncertainty", str(model_file), "--workers", "2", "--scheduler", "tcp://127.0.0.1:8786"],
    )
    assert result.exit_code == 2
    assert "--workers or --scheduler, not both" in result.stderr


def test_refuses_a_bad_wtp_range(model_file):
    result = runner.invoke(
        app, ["uncertainty", str(model_file), "--draws", "10", "--wtp-range", "100", "10"]
    )
    assert result.exit_code == 2
    assert "wtp_range: (100.0, 10.0); expected 0 <= LOW < HIGH" in result.stderr


def test_refuses_zero_draws(model_file):
    result = runner.invoke(app, ["uncertainty", str(model_file), "--draws", "0"])
    assert result.exit_code == 2
    assert "--draws" in result.output


def test_acceptability_table_has_one_row_per_age_band(model_file, tmp_path):
    # Bands run down the rows (a lifetime horizon must not squeeze the headers); each
    # cell is the band's share from acceptability_by_age_band.csv.
    result = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "60",
            "--seed",
            "4",
            "--band-years",
            "2",
            "--quiet",
            "--out",
            str(tmp_path),
        ],
    )
    assert result.exit_code == 0, result.output
    bands = pd.read_csv(tmp_path / "acceptability_by_age_band.csv")
    treat = bands[(bands["action"] == "treat") & (bands["state"] == "sick")]
    lines = result.stdout.splitlines()
    for row in treat.itertuples():
        label = f"{row.age_from:g}-{row.age_to:g}"
        line = next(x for x in lines if x.strip("│┃ ").startswith(label + " "))
        assert line.split()[-2 if line.endswith("│") else -1] == f"{row.share:.0%}"


def test_refuses_an_out_path_that_is_a_file(model_file, tmp_path):
    target = tmp_path / "taken"
    target.write_text("")
    result = runner.invoke(
        app, ["uncertainty", str(model_file), "--draws", "10", "--out", str(target)]
    )
    assert result.exit_code == 2
    assert "Invalid value for '--out'" in result.output


def test_refuses_an_out_folder_that_cannot_be_made(model_file, tmp_path):
    # A folder below a file cannot be created: refused before the run, naming --out.
    (tmp_path / "taken").write_text("")
    result = runner.invoke(
        app,
        ["uncertainty", str(model_file), "--draws", "10", "--out", str(tmp_path / "taken" / "psa")],
    )
    assert result.exit_code == 2
    assert "--out" in result.stderr and "cannot write the results" in " ".join(
        result.stderr.split()
    )
    assert "EVPI" not in result.stdout


def test_worker_threads_give_the_serial_results(model_file, tmp_path, monkeypatch):
    # --workers runs the chunks on threads of this process (as many as there are idle
    # cores; the rule is bypassed here so that two threads run on a busy machine too).
    from caredecide.uncertainty import psa

    monkeypatch.setattr(psa, "usable_threads", lambda requested, watch=None: requested)
    serial = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "1150",
            "--seed",
            "5",
            "--chunk-size",
            "100",
            "--quiet",
            "--out",
            str(tmp_path / "serial"),
        ],
    )
    threads = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "1150",
            "--seed",
            "5",
            "--chunk-size",
            "70",
            "--workers",
            "2",
            "--quiet",
            "--out",
            str(tmp_path / "threads"),
        ],
    )
    assert serial.exit_code == 0, serial.output
    assert threads.exit_code == 0, threads.output
    for name in ("draws.csv", "expected_loss.csv", "acceptability_by_cycle.csv", "evppi.csv"):
        pd.testing.assert_frame_equal(
            pd.read_csv(tmp_path / "threads" / name),
            pd.read_csv(tmp_path / "serial" / name),
            obj=name,
        )
    summary = json.loads((tmp_path / "threads" / "summary.json").read_text())
    assert summary["evpi"] == json.loads((tmp_path / "serial" / "summary.json").read_text())["evpi"]
    assert summary["chunk_size"] == 70


def test_workers_on_a_busy_machine_run_serially_and_say_so(model_file, monkeypatch):
    from caredecide.uncertainty import psa

    monkeypatch.setattr(psa, "usable_threads", lambda requested, watch=None: 1)
    command = ["uncertainty", str(model_file), "--draws", "20", "--workers", "2"]
    result = runner.invoke(app, [*command, "--chunk-size", "5"])  # several chunks: counted
    assert result.exit_code == 0, result.output
    assert "Ran on 1 of the 2 workers asked for: the other cores were busy" in " ".join(
        result.stderr.split()
    )
    result = runner.invoke(app, command)  # 20 draws make one chunk: nothing to share
    assert result.exit_code == 0, result.output
    assert "Ran on 1 of the 2 workers asked for: each step had one chunk of 20 draws" in (
        " ".join(result.stderr.split())
    )


@pytest.mark.parametrize(
    ("timeout", "message"),
    [
        ("1s", "could not reach the Dask scheduler at 'tcp://127.0.0.1:1'"),
        ("soon", "connect timeout 'soon'; expected a positive duration"),
    ],
)
def test_names_an_unreachable_scheduler_and_a_bad_timeout(model_file, timeout, message):
    pytest.importorskip("distributed")
    result = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "10",
            "--quiet",
            "--scheduler",
            "tcp://127.0.0.1:1",
            "--connect-timeout",
            timeout,
        ],
    )
    assert result.exit_code == 2
    assert message in result.stderr


def test_rank_correlation_reaches_the_draws(model_file, tmp_path):
    # Iman & Conover 1982 (Commun Stat Simul Comput 11(3):311-334): a normal-score
    # correlation of 0.8 gives a Spearman correlation near (6/pi) asin(0.4) = 0.79.
    result = runner.invoke(
        app,
        [
            "uncertainty",
            str(model_file),
            "--draws",
            "300",
            "--quiet",
            "--rank-correlation",
            "u_sick,c_drug=0.8",
            "--out",
            str(tmp_path),
        ],
    )
    assert result.exit_code == 0, result.output
    draws = pd.read_csv(tmp_path / "draws.csv")
    assert draws["u_sick"].rank().corr(draws["c_drug"].rank()) > 0.7


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("u_sick-c_drug=0.8", "--rank-correlation: 'u_sick-c_drug=0.8'; expected NAME,NAME=R"),
        ("u_sick,c_drug=high", "--rank-correlation: 'u_sick,c_drug=high'; expected"),
        ("u_sick,nowhere=0.5", "unknown parameter 'nowhere'"),
        ("u_sick,c_drug=1.5", "correlation 1.5; expected a number in (-1, 1)"),
    ],
)
def test_refuses_a_bad_rank_correlation(model_file, text, message):
    result = runner.invoke(
        app,
        ["uncertainty", str(model_file), "--draws", "10", "--quiet", "--rank-correlation", text],
    )
    assert result.exit_code == 2
    assert message in " ".join(result.stderr.split())
