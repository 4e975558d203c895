"""The HTML report: every section, cautions first, escaped model text, notes for missing
analyses, byte-identical result tables, and re-runs that reproduce or detect a change."""

from __future__ import annotations

import re
import shutil
import sys
from pathlib import Path

import pandas as pd
import pytest

from caredecide.report import build_report, record_path_for, rerun, tables_dir_for
from caredecide.report.analyses import run_analyses
from caredecide.report.sections import SECTION_TITLES
from caredecide.runrecord import read_record, sha256_file

BASE = Path(__file__).parent / "data" / "broken_models" / "base_small.toml"
HOSTILE = '<script>alert("x")</script> & <img src=http://example.invalid/x.png>'


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A report of a copy of the base test model whose texts hold HTML."""
    folder = tmp_path_factory.mktemp("report")
    model = folder / "model.toml"
    text = BASE.read_text(encoding="utf-8")
    text = text.replace('title = "Synthetic verification base model"', f"title = '{HOSTILE}'")
    text = text.replace(
        'source = "Synthetic: test"\n\n[parameters.p_die_sick]',
        f"source = '{HOSTILE}'\n\n[parameters.p_die_sick]",
    )
    model.write_text(text, encoding="utf-8")
    out = folder / "report.html"
    record = build_report(model, out, draws=40, seed=5, command_line="caredecide report")
    return model, out, record


def test_report_has_every_section_with_the_cautions_first(built):
    _, out, _ = built
    page = out.read_text(encoding="utf-8")
    positions = [page.index(f'<section id="{sid}">') for sid in SECTION_TITLES]
    assert positions == sorted(positions)
    assert page.index("RESEARCH USE ONLY") < positions[1]
    assert "not a substitute for clinical judgment" in page
    # Probabilistic results were asked for, so their section holds results, not a note.
    at = list(SECTION_TITLES).index("uncertainty")
    uncertainty = page[positions[at] : positions[at + 1]]
    assert "40 parameter draws, seed 5" in uncertainty


def test_report_escapes_model_text_and_loads_nothing(built):
    _, out, _ = built
    page = out.read_text(encoding="utf-8")
    assert "<script" not in page
    assert "<img" not in page
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &lt;img" in page
    assert "default-src 'none'" in page  # Content-Security-Policy
    # The only URLs are XML namespaces of the inline SVG charts (and the escaped hostile text).
    urls = set(re.findall(r"https?://[^\s\"'<>&]+", page))
    assert urls <= {
        "http://www.w3.org/2000/svg",
        "http://www.w3.org/1999/xlink",
        "http://example.invalid/x.png",
    }
    assert page.count("<svg") >= 3  # policy map, cohort trace, tornado (+ CE plane)


def test_run_record_names_model_hash_seed_and_outputs(built):
    model, out, record = built
    stored = read_record(record_path_for(out))
    assert stored == record
    assert stored.model_sha256 == sha256_file(model)
    assert stored.seed == 5 and stored.arguments["draws"] == 40
    tables = tables_dir_for(out)
    assert {
        "policy.csv",
        "trace.csv",
        "input_evidence.csv",
        "verification.csv",
        "results.xlsx",
    } <= set(stored.outputs)
    for name, digest in stored.outputs.items():
        assert sha256_file(tables / name) == digest
    page = out.read_text(encoding="utf-8")
    assert stored.model_sha256 in page


def test_evidence_table_lists_every_parameter_with_its_source(built):
    _, out, _ = built
    evidence = pd.read_csv(tables_dir_for(out) / "input_evidence.csv")
    assert list(evidence["parameter"]) == ["p_sick", "p_die_sick", "rr_treat", "u_sick", "c_drug"]
    assert evidence.loc[0, "source"] == HOSTILE
    assert evidence.loc[1, ["value", "low", "high"]].tolist() == [0.2, 0.1, 0.3]


def test_rerun_reproduces_the_recorded_tables_byte_for_byte(built, tmp_path):
    _, out, _ = built
    outcome = rerun(record_path_for(out), out_dir=tmp_path)
    assert outcome.reproduced, [str(d) for d in outcome.differences]
    assert not outcome.model_changed


def test_rerun_detects_a_changed_model(built, tmp_path):
    model, out, _ = built
    folder = tmp_path / "copy"
    shutil.copytree(out.parent, folder)
    changed = folder / model.name
    changed.write_text(
        changed.read_text(encoding="utf-8").replace("value = 0.1\n", "value = 0.12\n", 1),
        encoding="utf-8",
    )
    outcome = rerun(record_path_for(folder / out.name), out_dir=tmp_path / "tables")
    assert outcome.model_changed
    assert not outcome.reproduced
    changed_outputs = {d.what for d in outcome.differences}
    assert f"model file {changed}" in changed_outputs
    assert "output policy.csv" in changed_outputs  # p_sick moves every value


def test_missing_analysis_module_leaves_a_note(monkeypatch):
    monkeypatch.setitem(sys.modules, "caredecide.compare", None)
    data = run_analyses(BASE)
    assert "strategies" not in data.results
    assert data.notes["strategies"] == (
        "left out: module caredecide.compare is not available in this install"
    )
    assert data.notes["uncertainty"].startswith("not run: give --draws N")
    from caredecide.report.html import render_report

    page = render_report(data, {})
    section = page[page.index('<section id="strategies">') : page.index('<section id="sens')]
    assert "module caredecide.compare is not available" in section


def test_probabilistic_section_has_its_charts_and_tables(built):
    _, out, record = built
    page = out.read_text(encoding="utf-8")
    section = page[
        page.index('<section id="uncertainty">') : page.index('<section id="verification">')
    ]
    # The plane of the draws, the heat map of the treatment's share, the acceptability
    # curves and the map of the best schedule over the draws, drawn inline.
    assert section.count("<svg") == 4
    assert "The best schedule given what is not known" in section
    assert "Cost-effectiveness plane of the probabilistic draws" in section
    assert "How often 'treat' is optimal across the parameter draws" in section
    assert "Acceptability curves" in section
    # 40 draws are too few for EVPPI (MIN_EVPPI_DRAWS = 200): the section says so.
    assert "EVPPI not computed: it needs at least 200 draws" in section
    assert {
        "psa_acceptability_curves.csv",
        "psa_acceptability_frontier.csv",
        "psa_evppi.csv",
        "psa_convergence.csv",
        "psa_evpi.csv",
        "best_schedule.csv",
        "best_schedule_starts.csv",
    } <= set(record.outputs)


def test_best_schedule_in_the_report_equals_the_library(built):
    # Common practice: the report displays the analysis layer's figures unchanged.
    from caredecide.analysis import analyse_best_schedule
    from caredecide.modelfile import load_model

    model, out, _ = built
    page = out.read_text(encoding="utf-8")
    best = analyse_best_schedule(load_model(model), 40, 5)
    assert f"Value of the stochastic solution: {best.value_of_stochastic_solution:,.2f}" in page


STRATEGY_TABLE = (
    "strategy,state,age_from,age_to,action,note\n"
    "treat sick before 65,sick,,65,treat,Synthetic test strategy (invented)\n"
)


def test_strategy_table_beside_the_model_is_hashed_and_a_change_is_detected(tmp_path):
    model = tmp_path / "model.toml"
    shutil.copy(BASE, model)
    table = tmp_path / "model.strategies.csv"
    table.write_text(STRATEGY_TABLE, encoding="utf-8")
    out = tmp_path / "report.html"
    record = build_report(model, out, draws=20, seed=4)
    assert record.input_files == {"model.strategies.csv": sha256_file(table)}
    # The table's strategy joins the comparison and the probabilistic candidates.
    tables = tables_dir_for(out)
    assert "treat sick before 65" in set(pd.read_csv(tables / "strategies.csv")["strategy"])
    assert "treat sick before 65" in set(pd.read_csv(tables / "psa_expected_loss.csv")["candidate"])
    assert "input file: model.strategies.csv" in out.read_text(encoding="utf-8")

    assert rerun(record_path_for(out), out_dir=tmp_path / "same").reproduced
    table.write_text(STRATEGY_TABLE.replace(",65,", ",70,"), encoding="utf-8")
    outcome = rerun(record_path_for(out), out_dir=tmp_path / "changed")
    assert outcome.inputs_changed and not outcome.model_changed
    what = {d.what for d in outcome.differences}
    assert {"input file model.strategies.csv", "output strategies.csv"} <= what
    table.unlink()
    outcome = rerun(record_path_for(out), out_dir=tmp_path / "gone")
    gone = next(d for d in outcome.differences if d.what == "input file model.strategies.csv")
    assert gone.now == "absent"


def test_life_table_is_among_the_input_files(tmp_path):
    from caredecide.modelfile import load_model
    from caredecide.report import input_files
    from synthetic_cohort import MODELS_DIR

    model_path = MODELS_DIR / "demo_counts_table.toml"
    found = input_files(load_model(model_path), model_path)
    assert found == [MODELS_DIR / "demo_life_table.csv"]


def test_a_model_without_parameters_gets_a_report_with_a_note(tmp_path):
    model = BASE.with_name("one_action_no_parameters.toml")
    out = tmp_path / "report.html"
    build_report(model, out, draws=20, seed=1)
    page = out.read_text(encoding="utf-8")
    section = page[
        page.index('<section id="sensitivity">') : page.index('<section id="uncertainty">')
    ]
    assert "not run: the model has no parameters to vary" in section
    evidence = pd.read_csv(tables_dir_for(out) / "input_evidence.csv")
    assert len(evidence) == 0 and "parameter" in evidence.columns


def test_the_report_lists_the_model_warnings(tmp_path):
    # A QALY weight of 75 per year is a slip (full health is 1; common practice).
    model = tmp_path / "slip.toml"
    text = BASE.read_text(encoding="utf-8")
    text, count = re.subn(r"(?m)^qaly_weight = 0\.9$", "qaly_weight = 75.0", text, count=1)
    assert count == 1
    model.write_text(text, encoding="utf-8")
    out = tmp_path / "report.html"
    build_report(model, out)
    page = out.read_text(encoding="utf-8")
    job = page[page.index('<section id="job">') :]
    assert "The model has" in job and "QALY weight 75 is above 1" in job
