"""Model view: open, upload or start a model, edit its tables, see problems, download.

Every edit replaces the working model text and is autosaved, valid or not; problems are
shown beside the table they concern (by the table path of each problem).
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import streamlit as st

from caredecide.compiled import WITHIN_CYCLE_METHODS
from caredecide.errors import ModelError
from caredecide.model import OBJECTIVES, PARAMETER_KINDS
from caredecide.modelfile import dumps_model
from caredecide.modelfile.roundtrip import updated_model_text
from synthetic_cohort import MODELS_DIR
from ui import diagram_panel, drafts, working_model
from ui.tables import locate, model_to_tables, model_with_table, with_header_comments
from ui.templates import TEMPLATES


def _bundled_models() -> dict[str, Path]:
    return {p.name: p for p in sorted(MODELS_DIR.glob("*.toml"))}


# -- callbacks (state changes happen here) -----------------------------------------------
def _open_bundled() -> None:
    path = _bundled_models()[st.session_state["open_bundled_choice"]]
    working_model.open_model(str(path.resolve()), working_model.read_model_file(path))


def _open_template() -> None:
    name = st.session_state["open_template_choice"]
    working_model.open_model(f"template:{name}", TEMPLATES[name])


def _open_upload() -> None:
    upload = st.session_state.get("open_upload_file")
    if upload is None:
        return
    try:
        text = working_model.decode_upload(upload.name, upload.getvalue())
    except ModelError as error:
        st.session_state["cd_upload_error"] = str(error)
        return
    st.session_state.pop("cd_upload_error", None)
    working_model.open_model(f"upload:{upload.name}", text)


def _open_draft() -> None:
    source = st.session_state["open_draft_choice"]
    draft = drafts.load_draft(source)
    if draft is not None:
        working_model.open_model(source, draft.text)


def _discard_draft() -> None:
    source = working_model.working_source()
    drafts.discard_draft(source)
    kind = source.partition(":")[0]
    if kind == "template":
        text = TEMPLATES.get(source.partition(":")[2], "")
    elif kind == "upload":
        text = working_model.working_text()  # the uploaded bytes are gone; keep what is shown
    else:
        try:
            text = working_model.read_model_file(Path(source))
        except (OSError, ModelError) as error:  # the file is gone: keep what is shown
            st.session_state["cd_startup_error"] = f"{source}: {error}"
            text = working_model.working_text()
    working_model.open_model(source, text)


# -- opening -----------------------------------------------------------------------------
def _open_panel() -> None:
    with st.expander("Open another model", expanded=False):
        bundled, upload, template, recovered = st.columns(4)
        with bundled:
            st.selectbox(
                "Bundled synthetic model", list(_bundled_models()), key="open_bundled_choice"
            )
            st.button("Open", key="open_bundled_button", on_click=_open_bundled)
        with upload:
            st.file_uploader(
                "Upload a model file (TOML, at most 1 MB)",
                type=["toml"],
                key="open_upload_file",
                on_change=_open_upload,
                max_upload_size=1,
            )
            if error := st.session_state.get("cd_upload_error"):
                st.error(error)
        with template:
            st.selectbox("Start from a template", list(TEMPLATES), key="open_template_choice")
            st.button("Start", key="open_template_button", on_click=_open_template)
        with recovered:
            others = [d for d in drafts.list_drafts() if d.source != working_model.working_source()]
            labels = {
                d.source: f"{working_model.source_label(d.source)} ({d.saved_at})" for d in others
            }
            if labels:
                st.selectbox(
                    "Recovered drafts",
                    list(labels),
                    format_func=labels.get,
                    key="open_draft_choice",
                )
                st.button("Open draft", key="open_draft_button", on_click=_open_draft)
            else:
                st.caption("No other autosaved drafts.")


# -- editing -----------------------------------------------------------------------------
COLUMN_CONFIG = {
    "settings": {
        "objective": st.column_config.SelectboxColumn(options=list(OBJECTIVES)),
        "within_cycle": st.column_config.SelectboxColumn(options=list(WITHIN_CYCLE_METHODS)),
        "horizon_cycles": st.column_config.NumberColumn(step=1),
        "start": st.column_config.TextColumn(help="A state id, or shares: a = 0.6, b = 0.4"),
        "severity_order": st.column_config.TextColumn(help="State ids, mildest first"),
    },
    "parameters": {
        "kind": st.column_config.SelectboxColumn(options=list(PARAMETER_KINDS)),
        "distribution": st.column_config.TextColumn(
            help='An inline table, e.g. { type = "beta", mean = 0.1, se = 0.02 }'
        ),
        "source": st.column_config.TextColumn(help="Where the estimate comes from (required)"),
        # Text cells: a mistyped number stays visible beside its error, not lost as None.
        **{
            column: st.column_config.TextColumn(help="A number")
            for column in ("value", "per_years", "low", "high")
        },
    },
}


def _edited(key: str) -> bool:
    state = st.session_state.get(key)
    return isinstance(state, dict) and any(
        state.get(part) for part in ("edited_rows", "added_rows", "deleted_rows")
    )


def _table_editor(model, name: str, frame, problems) -> None:
    """One keyed data editor; an edit is written to the working text at once."""
    key = working_model.widget_key(f"table_{name}")
    dynamic = name in ("states", "actions", "parameters")
    edited = st.data_editor(
        frame,
        key=key,
        num_rows="dynamic" if dynamic else "fixed",
        hide_index=not name.startswith(("transitions.", "rates.")),
        column_config=COLUMN_CONFIG.get(name),
        width="stretch",
    )
    working_model.show_problems(
        working_model.problems_under(problems, name),
        locate=lambda where: locate(name, frame, where),
    )
    if _edited(key):
        try:
            new_model = model_with_table(model, name, edited)
        except ModelError as error:  # cannot be written at all: keep it in the editor
            working_model.show_problems(error.problems)
            return
        working_model.edit_model_text(_written_back(working_model.working_text(), new_model))
        st.rerun()


def _written_back(text: str, new_model) -> str:
    """The working text with one table's edit: comments, order and layout kept
    (caredecide.modelfile.roundtrip); a text the round trip cannot read (it parsed
    moments ago, so only in odd cases) is written afresh with its header comments."""
    try:
        return updated_model_text(text, new_model, file=working_model.file_label())
    except (ModelError, ValueError):
        return with_header_comments(text, dumps_model(new_model))


def _write_model(new_model) -> None:
    """Make ``new_model`` the working model (an edit made outside the tables)."""
    working_model.edit_model_text(_written_back(working_model.working_text(), new_model))


def _text_editor(problems) -> None:
    key = working_model.widget_key("model_text")
    text = st.text_area(
        "Model file (TOML)", value=working_model.working_text(), key=key, height=500
    )
    working_model.show_problems([p for p in problems if p.line is not None])  # TOML syntax
    if text != working_model.working_text():
        working_model.edit_model_text(text)
        st.rerun()


# -- the page -----------------------------------------------------------------------------
st.title("Model")
if error := st.session_state.pop("cd_startup_error", None):
    st.error(f"Could not open the startup model: {error}")
if notice := st.session_state.get(working_model.NOTICE_KEY):
    left, right = st.columns([3, 2])  # room for the whole button label
    left.info(notice, icon=":material/history:")
    right.button(
        "Discard draft, reopen the original", key="discard_draft_button", on_click=_discard_draft
    )
if error := st.session_state.get("cd_autosave_error"):
    st.error(f"Autosave failed: {error}")

_open_panel()
text = working_model.working_text()
st.download_button(
    "Download the model file",
    data=text.encode("utf-8"),
    key="download_model",
    file_name=Path(working_model.source_label(working_model.working_source()).split(" ")[0]).stem
    + ".toml",
    mime="application/toml",
)
checked = working_model.current_check()
problems = checked.problems
TAB_OF_TABLE = {
    "settings": "Settings",
    "states": "States",
    "actions": "Actions",
    "parameters": "Parameters",
    "transitions": "Transitions",
    "rates": "Transitions",
}
if problems:
    # Name the tabs to open: a user on another tab would not see the errors beside a table.
    # A syntax error (it has a line) is fixed in the text: the Model file tab, where it
    # is shown; the table tabs cannot show an unreadable file.
    tabs_with = Counter(
        "Model file"
        if p.line is not None
        else TAB_OF_TABLE.get(p.where.split(".")[0].split("[")[0], "general, listed below")
        for p in problems
    )
    where = ", ".join(f"{tab} ({count})" for tab, count in tabs_with.items())
    st.error(
        f"{len(problems)} problem(s) in {working_model.file_label()}, in the tab(s): {where}. Each "
        "is shown beside its table. Your edits are kept and autosaved.",
        icon=":material/error:",
    )
else:
    st.success(
        f"{working_model.file_label()} is valid (autosaved).", icon=":material/check_circle:"
    )
# One element whether or not there are warnings, so the tabs below keep the open tab.
working_model.show_warnings(checked.warnings if not problems else ())
TABLE_PREFIXES = ("settings", "states", "actions", "parameters", "transitions", "rates")
working_model.show_problems(
    [p for p in problems if p.line is None and not p.where.startswith(TABLE_PREFIXES)]
)

readable = working_model.read_model(text, working_model.file_label(), working_model.base_folder())
tables = model_to_tables(readable.model) if readable.model is not None else {}
matrices = [n for n in tables if n.startswith(("transitions.", "rates."))]
tabs = st.tabs(["Settings", "States", "Actions", "Parameters", "Transitions", "Model file"])
if readable.model is None:
    for tab in tabs[:5]:
        with tab:
            st.warning(
                "The model file text cannot be read into tables; fix the problems shown "
                "in the Model file tab (the last tab)."
            )
            # Problems the text editor does not show (no line: the file's structure).
            working_model.show_problems([p for p in readable.problems if p.line is None])
else:
    model = readable.model
    for tab, name in zip(tabs[:4], ("settings", "states", "actions", "parameters"), strict=True):
        with tab:
            _table_editor(model, name, tables[name], problems)
    with tabs[4]:
        st.caption(
            "Rows: from-state; columns: to-state. A cell holds a probability per cycle "
            "(transitions) or a rate per year (rates): a number, an expression, or "
            "'rest' for the remainder. Empty = no transition."
        )
        for name in matrices:
            st.subheader(name)
            _table_editor(model, name, tables[name], problems)
            diagram_panel.show_cells_in_full(tables[name], name)
        # Rows of an action that is not in the model: no matrix shows them.
        working_model.show_problems(
            [
                p
                for p in working_model.problems_under(problems, "transitions", "rates")
                if not working_model.problems_under((p,), *matrices)
            ]
        )
        if not problems:
            diagram_panel.show_diagram(
                text,
                working_model.file_label(),
                working_model.base_folder(),
                {a.id: a.label or a.id for a in model.actions},
                write_model=_write_model,
            )
with tabs[5]:
    _text_editor(problems)
