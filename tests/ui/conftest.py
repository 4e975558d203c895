"""AppTest fixtures: a private drafts folder, the demo model, and no cache between tests."""

from __future__ import annotations

from pathlib import Path

import pytest
import streamlit as st
from streamlit.testing.v1 import AppTest

from synthetic_cohort import demo_model_path

APP = str(Path(__file__).resolve().parents[2] / "ui" / "app.py")


@pytest.fixture(autouse=True)
def private_app_state(tmp_path, monkeypatch):
    """Drafts go to a temporary folder; cached solves never leak from one test to the next."""
    monkeypatch.setenv("CAREDECIDE_HOME", str(tmp_path / "home"))
    monkeypatch.setenv("CAREDECIDE_MODEL", str(demo_model_path()))
    st.cache_data.clear()
    yield tmp_path / "home"
    st.cache_data.clear()


@pytest.fixture
def app() -> AppTest:
    """The app, run once (the model view is the default page)."""
    at = AppTest.from_file(APP, default_timeout=120)
    at.run()
    assert not at.exception, at.exception
    return at
