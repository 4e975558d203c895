"""What every view shares: the cautions, the working model in session state, cached calls.

The working model is its model-file *text* (``st.session_state[TEXT_KEY]``): every edit,
valid or not, replaces the text and is autosaved (:mod:`ui.drafts`), so an invalid edit
is kept and shown with its errors instead of being dropped. Parsing, compiling and
solving go through :mod:`caredecide` (one core) in functions cached on the text.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import streamlit as st

from caredecide.cautions import caution_long, caution_short
from caredecide.errors import CaredecideError, ModelError, ModelWarningRecord, Problem
from caredecide.guarded import decode_text, read_limited_text
from caredecide.limits import MAX_MODEL_BYTES, MAX_STRATEGY_TABLE_BYTES, MODEL_ENV
from caredecide.model import Model
from caredecide.modelfile import loads_model, validate_model
from caredecide.objective import Objective
from caredecide.solvers import PolicyResult
from caredecide.structure import PolicyStructure
from synthetic_cohort import demo_model_path
from ui import drafts

TEXT_KEY = "cd_model_text"
"""Session key of the working model-file text."""
SOURCE_KEY = "cd_model_source"
"""Session key of where the working model came from (path, ``upload:`` or ``template:``)."""
REVISION_KEY = "cd_revision"
"""Bumped whenever the working text changes; editor keys carry it, so they start afresh."""
NOTICE_KEY = "cd_notice"
"""A message about the last open (e.g. a restored draft), shown on the model view."""


# -- cautions --------------------------------------------------------------------------
def show_cautions() -> None:
    """The research-use caution: prominent, at the top, not dismissible (every view)."""
    source = st.session_state.get(SOURCE_KEY)
    st.warning(f"**{caution_short(source)}**", icon=":material/warning:")
    st.caption(caution_long(source))


# -- the working model ------------------------------------------------------------------
def startup_path() -> Path:
    """Model file given to ``caredecide app`` (``$CAREDECIDE_MODEL``), else the demo model."""
    given = os.environ.get(MODEL_ENV)
    if given:
        return Path(given)
    return Path(demo_model_path())


def source_label(source: str) -> str:
    """Short name of a source for headings: the file name, upload name or template name."""
    kind, _, rest = source.partition(":")
    if kind in ("upload", "template") and rest:
        return f"{rest} ({kind})"
    return Path(source).name


def read_model_file(path: Path) -> str:
    """Text of a model file through the guarded reader (regular file, size cap, UTF-8);
    ModelError naming the file otherwise."""
    return read_limited_text(path, MAX_MODEL_BYTES, what="a model file (.toml)")


def beside_table() -> tuple[str, str] | None:
    """(file, CSV text) of the strategy table beside the working model's file, when one
    exists and reads (the library's rule, :func:`caredecide.analysis.candidate_table`;
    an upload or a template has no folder, so no table)."""
    from caredecide.strategies import sibling_table

    source = working_source()
    if source.partition(":")[0] in ("upload", "template"):
        return None
    path = sibling_table(source)
    text = read_beside_table(path)
    return (str(path), text) if path is not None and text is not None else None


def read_beside_table(path: Path | None) -> str | None:
    """Text of the strategy table beside the model (None when there is none); a table
    the guarded reader refuses is reported on the page and left out."""
    if path is None:
        return None
    try:
        return read_limited_text(path, MAX_STRATEGY_TABLE_BYTES, what="a strategy table (CSV)")
    except ModelError as error:
        st.warning(f"Strategy table left out: {error}", icon=":material/warning:")
        return None


def decode_upload(name: str, data: bytes) -> str:
    """Text of an uploaded model file: size-limited UTF-8 data, never executed or unpickled."""
    if len(data) > MAX_MODEL_BYTES:
        raise ModelError(
            f"the uploaded file is {len(data)} bytes; expected at most {MAX_MODEL_BYTES} bytes",
            file=name,
        )
    return decode_text(data, file=name, what="a TOML model file")


def open_model(source: str, text: str) -> None:
    """Make ``text`` from ``source`` the working model; an autosaved draft of it wins.

    Nothing is lost: when a draft of the same source exists and differs from ``text``,
    the draft is restored and a notice offers to discard it.
    """
    draft = drafts.load_draft(source)
    notice = None
    if draft is not None and draft.text != text:
        text = draft.text
        notice = (
            f"Restored your autosaved draft of {source_label(source)} (saved {draft.saved_at} UTC)."
        )
    st.session_state[SOURCE_KEY] = source
    st.session_state[TEXT_KEY] = text
    st.session_state[NOTICE_KEY] = notice
    _bump_revision()


def _bump_revision() -> None:
    st.session_state[REVISION_KEY] = st.session_state.get(REVISION_KEY, 0) + 1


def ensure_working_model() -> None:
    """Open the startup model (or its autosaved draft) once per browser session."""
    if TEXT_KEY in st.session_state:
        return
    path = startup_path()
    try:
        text = read_model_file(path)
    except (OSError, ModelError) as error:
        text = ""
        st.session_state["cd_startup_error"] = f"{path}: {error}"
    open_model(str(path.resolve()), text)


def edit_model_text(text: str) -> None:
    """Replace the working text after an edit and autosave it (valid or not)."""
    st.session_state[TEXT_KEY] = text
    _bump_revision()
    try:
        saved = drafts.save_draft(st.session_state[SOURCE_KEY], text)
    except (OSError, ValueError) as error:
        st.session_state["cd_autosave_error"] = str(error)
    else:
        st.session_state.pop("cd_autosave_error", None)
        if st.session_state.get(NOTICE_KEY):  # the restored draft moved on: say when
            st.session_state[NOTICE_KEY] = (
                f"Working on your autosaved draft of {source_label(saved.source)} "
                f"(last saved {saved.saved_at} UTC)."
            )


def working_text() -> str:
    return st.session_state[TEXT_KEY]


def working_source() -> str:
    return st.session_state[SOURCE_KEY]


def revision() -> int:
    """Counter of changes to the working text (part of every editor's key)."""
    return int(st.session_state.get(REVISION_KEY, 0))


def widget_key(name: str) -> str:
    """Key of an editor showing the working text: fresh whenever the text changes."""
    return f"{name}_{revision()}"


def file_label() -> str:
    """File name used in error messages for the working model."""
    return source_label(working_source())


def base_folder() -> str:
    """Folder that relative paths in the working model resolve against.

    The model file's own folder; for an upload or a template, the drafts folder (so a
    relative life table is looked for there, not in an arbitrary working directory).
    """
    source = working_source()
    if source.partition(":")[0] in ("upload", "template"):
        return str(drafts.drafts_folder())
    return str(Path(source).parent)


# -- cached calls into caredecide --------------------------------------------------------
@dataclass(frozen=True)
class Checked:
    """A parsed and validated model, or the problems found (model is None then)."""

    model: Model | None
    problems: tuple[Problem, ...]
    warnings: tuple[ModelWarningRecord, ...] = ()
    """The valid model's warnings (suspicious but allowed values), shown on every view."""


@st.cache_data(max_entries=64, show_spinner=False)
def check_model(text: str, file: str, base_dir: str) -> Checked:
    """Parse and validate model text (cached on the text): the model or every problem."""
    try:
        model = loads_model(text, file=file, base_dir=base_dir, validate=False)
        warnings = validate_model(model)
    except ModelError as error:
        return Checked(None, tuple(error.problems))
    except CaredecideError as error:
        return Checked(None, (Problem(where="", message=str(error), file=file),))
    return Checked(model, (), tuple(warnings))


def show_warnings(warnings: tuple[ModelWarningRecord, ...]) -> None:
    """The model's warnings, each with its table path, in one warning box.

    Always one element on the page, empty without warnings: widgets below it (the Model
    view's tabs) keep their place, and so their state, when warnings come and go.
    """
    box = st.container()
    if not warnings:
        return
    lines = "\n".join(f"- `{w.where}`: {w.message}" for w in warnings)
    box.warning(
        f"The model has {len(warnings)} warning(s); check them before using the results:\n{lines}",
        icon=":material/report:",
    )


def problems_under(problems: tuple[Problem, ...], *prefixes: str) -> list[Problem]:
    """Problems whose table path starts with one of ``prefixes`` (``""`` = every problem)."""

    def under(where: str, prefix: str) -> bool:
        return not prefix or where == prefix or where.startswith((f"{prefix}.", f"{prefix}["))

    return [p for p in problems if any(under(p.where, x) for x in prefixes)]


def show_problems(problems: list[Problem], *, locate=None) -> None:
    """Each problem as an error box: where it is, what is wrong, what was expected.

    ``locate(where) -> str`` may name the table row and column the problem points to.
    """
    for problem in problems:
        place = locate(problem.where) if locate is not None and problem.where else ""
        where = f"`{problem.where}`: " if problem.where else ""
        cell = f"**{place}** - " if place else ""
        line = f" (line {problem.line})" if problem.line else ""
        st.error(f"{cell}{where}{problem.message}{line}", icon=":material/error:")


@st.cache_data(max_entries=64, show_spinner=False)
def read_model(text: str, file: str, base_dir: str) -> Checked:
    """Read model text into a Model *without* validating it (for the table editors)."""
    try:
        model = loads_model(text, file=file, base_dir=base_dir, validate=False)
    except ModelError as error:
        return Checked(None, tuple(error.problems))
    return Checked(model, ())


@dataclass(frozen=True)
class Solved:
    """A solved model: the policy result and its evaluation under the same objective."""

    result: PolicyResult
    trace: pd.DataFrame
    totals: pd.DataFrame
    groups: pd.DataFrame | None = None
    """One row per flat state with its declared state, attribute values and tunnel steps
    (:func:`caredecide.grouping.state_group_frame`)."""


@st.cache_data(max_entries=16, show_spinner=False)
def solve_model(
    text: str,
    file: str,
    base_dir: str,
    kind: str,
    willingness_to_pay: float,
    method: str = "auto",
    record_history: bool = False,
    max_iterations: int = 100_000,
    _model: Model | None = None,
) -> Solved:
    """Compile the base case, solve it and evaluate the policy (cached on text and settings).

    ``_model`` may pass the validated model of exactly this ``text``, ``file`` and
    ``base_dir`` (from :func:`check_model`) so the text is not parsed a second time; the
    leading underscore keeps it out of the cache key, which the text already determines.

    Raises
    ------
    CaredecideError
        When the model is invalid or cannot be solved as asked.
    """
    from caredecide.analysis.base_case import analyse_base_case
    from caredecide.grouping import state_group_frame

    model = _model if _model is not None else loads_model(text, file=file, base_dir=base_dir)
    base = analyse_base_case(
        model,
        objective=Objective(kind, float(willingness_to_pay)),
        method=method,
        record_history=record_history,
        max_iterations=max_iterations,
    )
    return Solved(
        base.solution,
        base.trace_frame(),
        base.outcome.totals_frame(),
        state_group_frame(base.compiled),
    )


@st.cache_data(max_entries=16, show_spinner=False)
def policy_structure(
    text: str,
    file: str,
    base_dir: str,
    kind: str,
    willingness_to_pay: float,
) -> PolicyStructure:
    """Plain-language structure of the solved policy (cached: widgets rerun the view often)."""
    return solve_model(text, file, base_dir, kind, willingness_to_pay).result.structure()


def current_check() -> Checked:
    """Validation of the working model (cached on its text)."""
    return check_model(working_text(), file_label(), base_folder())


def valid_model_or_stop() -> Model:
    """The validated working model; otherwise say where to fix it and stop the view."""
    checked = current_check()
    if checked.model is None:
        st.error(
            f"The working model ({file_label()}) has {len(checked.problems)} problem(s); "
            "fix them in the Model view first. Your edits are kept.",
            icon=":material/error:",
        )
        st.page_link("views/model.py", label="Go to the Model view", icon=":material/edit_note:")
        show_problems(list(checked.problems[:5]))
        st.stop()
    show_warnings(checked.warnings)
    return checked.model
