"""The report's "What would change the recommendation" section and the committee tables:
the figures are those of the library analyses."""

from __future__ import annotations

import html
import re

import pytest

from caredecide.modelfile import load_model
from caredecide.report import build_report
from caredecide.sensitivity.recommendation import flip_sentence, what_would_change
from synthetic_cohort import demo_model_path


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    out = tmp_path_factory.mktemp("report") / "report.html"
    build_report(demo_model_path(), out, draws=30, seed=4, command_line="caredecide report")
    return out.read_text(encoding="utf-8"), out


def _section(text: str, sid: str) -> str:
    start = text.index(f'<section id="{sid}">')
    return text[start : text.index("</section>", start)]


def test_changes_section_holds_every_flip_sentence(page):
    text, _ = page
    section = html.unescape(_section(text, "changes"))
    expected = what_would_change(load_model(demo_model_path()))
    for flip in expected.flips.itertuples():
        assert flip_sentence(flip) in section
    for row in expected.recommendations.itertuples():
        assert f"Recommended: {row.recommended}." in section
    assert re.search(r"of 30 probabilistic draws recommend something else here", section)


def test_committee_tables_are_exported(page):
    _, out = page
    folder = out.parent / "report_tables"
    for name in ("decision_tornado", "thresholds_context", "what_would_change_flips",
                 "psa_strategy_means", "wtp_frontier_runs", "wtp_state_switches"):  # fmt: skip
        assert (folder / f"{name}.csv").exists(), name


def test_sensitivity_section_shows_the_decision_tornado_first(page):
    text, _ = page
    section = _section(text, "sensitivity")
    assert section.index("Decision tornado") < section.index("Value-level tornado")
