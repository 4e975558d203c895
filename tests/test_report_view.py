"""The app's Report view (AppTest): it offers the same report, workbook and CSV tables as
``caredecide report`` and shows the library's verification table."""

from __future__ import annotations

import io
import zipfile

import pytest
import streamlit as st
from streamlit.testing.v1 import AppTest

from caredecide.modelfile import load_model
from caredecide.verify import verify_model
from synthetic_cohort import demo_model_path
from tests.ui.conftest import APP


@pytest.fixture(autouse=True)
def private_app_state(tmp_path, monkeypatch):
    monkeypatch.setenv("CAREDECIDE_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("CAREDECIDE_MODEL", str(demo_model_path()))
    st.cache_data.clear()
    yield
    st.cache_data.clear()


def test_report_view_prepares_the_downloads():
    at = AppTest.from_file(APP, default_timeout=300).run()
    at.switch_page("views/report.py").run()
    assert not at.exception, at.exception
    assert at.title[0].value == "Report and downloads"
    at.button(key="report_prepare").click().run()
    assert not at.exception, at.exception
    buttons = at.get("download_button")
    assert len(buttons) == 3
    assert at.success[0].value == "Every verification check passed or does not apply."
    shown = at.dataframe[0].value
    expected = verify_model(load_model(demo_model_path())).to_frame()
    assert list(shown["status"]) == list(expected["status"])
    assert list(shown["figures"]) == list(expected["figures"])


def test_downloads_are_the_report_workbook_and_tables():
    from caredecide.report import downloads

    path = demo_model_path()
    ready = downloads(path.read_text(encoding="utf-8"), file=path.name, base_dir=path.parent)
    assert ready.report_html.startswith(b"<!DOCTYPE html>")
    assert b"RESEARCH USE ONLY" in ready.report_html
    names = zipfile.ZipFile(io.BytesIO(ready.tables_zip)).namelist()
    assert {"policy.csv", "input_evidence.csv", "verification.csv"} <= set(names)
    assert ready.workbook[:2] == b"PK"  # an XLSX (zip) file


def test_app_tables_are_the_command_line_tables_byte_for_byte(tmp_path):
    # The app's zip and the files 'caredecide report' writes come from the same analyses:
    # the strategy table beside the demo model joins both, whatever the working directory.
    from caredecide.cautions import caution_short
    from caredecide.report import build_report, downloads, tables_dir_for

    path = demo_model_path()
    ready = downloads(path.read_text(encoding="utf-8"), file=path.name, base_dir=path.parent)
    out = tmp_path / "report.html"
    build_report(path, out)
    archive = zipfile.ZipFile(io.BytesIO(ready.tables_zip))
    written = sorted(p.name for p in tables_dir_for(out).glob("*.csv"))
    assert sorted(set(archive.namelist()) - {"CAUTION.txt"}) == written
    # The zip carries the caution, with the demo-data note (a bundled model).
    assert archive.read("CAUTION.txt").decode().startswith(caution_short(path))
    assert "Demo data are synthetic" in archive.read("CAUTION.txt").decode()
    for name in written:
        assert archive.read(name) == (tables_dir_for(out) / name).read_bytes(), name
    assert b"treat stage 2-3 before 80" in archive.read("strategies.csv")
