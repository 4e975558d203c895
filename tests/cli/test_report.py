"""``caredecide report``: report, tables and run record written; caution on stderr; errors."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from caredecide.cli import app
from caredecide.runrecord import read_record

runner = CliRunner()
BASE = Path(__file__).parents[1] / "data" / "broken_models" / "base_small.toml"


def test_report_writes_html_tables_and_record(tmp_path):
    out = tmp_path / "r.html"
    run = runner.invoke(app, ["report", str(BASE), "--out", str(out), "--quiet"])
    assert run.exit_code == 0, run.output
    assert "RESEARCH USE ONLY" in run.stderr  # the caution, even with --quiet
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    record = read_record(tmp_path / "r.run.json")
    assert record.seed is None and record.arguments["draws"] is None
    assert (tmp_path / "r_tables" / "policy.csv").is_file()
    assert f"caredecide rerun {tmp_path / 'r.run.json'}" in run.stdout
    assert "verification check(s) failed" not in run.stderr


def test_report_of_a_model_failing_verification_warns_on_stderr(tmp_path):
    broken = BASE.with_name("closed_cohort.toml")  # nobody should return from death
    run = runner.invoke(app, ["report", str(broken), "--out", str(tmp_path / "r.html"), "--quiet"])
    assert run.exit_code == 0, run.output  # the report is written, with the failure in it
    assert "warning: 1 verification check(s) failed (closed_cohort)" in run.stderr
    assert "1 check(s) FAILED" in (tmp_path / "r.html").read_text(encoding="utf-8")


def test_invalid_model_is_a_clear_error(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(
        BASE.read_text(encoding="utf-8").replace("discount_costs = 0.04", "discount_costs = 1.5")
    )
    run = runner.invoke(app, ["report", str(bad), "--out", str(tmp_path / "r.html")])
    assert run.exit_code == 2
    assert "bad.toml" in run.stderr and "discount_costs" in run.stderr
    assert not (tmp_path / "r.html").exists()
