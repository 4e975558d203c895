"""Report view: the HTML report, the XLSX workbook and every table as CSV for the working
model, built by caredecide.report (the same code as ``caredecide report``)."""

from __future__ import annotations

import streamlit as st

from caredecide.errors import CaredecideError
from caredecide.report import Downloads, downloads
from ui import working_model


@st.cache_data(max_entries=4, show_spinner=False)
def prepare(text: str, file: str, base_dir: str, draws: int, seed: int) -> Downloads:
    """Every analysis of the model text, as downloadable bytes (cached on the inputs)."""
    return downloads(
        text,
        file=file,
        base_dir=base_dir,
        draws=draws or None,
        seed=seed if draws else None,
        command_line="caredecide app: Report view",
    )


def _ask() -> None:
    st.session_state["report_requested"] = True


model = working_model.valid_model_or_stop()
st.session_state.setdefault("report_requested", False)
st.title("Report and downloads")
st.markdown(
    "One self-contained HTML file (opens offline in any browser) with the cautions, the "
    "model's structure and evidence, the best policy, the comparison with fixed strategies, "
    "sensitivity and thresholds, probabilistic results when asked for, and the verification "
    "checks; plus every result table as CSV and one XLSX workbook for spreadsheet review."
)
left, right, _ = st.columns([1, 1, 2])
draws = left.number_input(
    "Parameter draws (0 = no probabilistic analysis)",
    min_value=0,
    max_value=100_000,
    value=0,
    step=100,
    key="report_draws",
)
seed = right.number_input("Seed", min_value=0, value=1, step=1, key="report_seed")
st.button("Prepare the report", on_click=_ask, type="primary", key="report_prepare")

if st.session_state["report_requested"]:
    try:
        with st.spinner("Running every analysis..."):
            ready = prepare(
                working_model.working_text(),
                working_model.file_label(),
                working_model.base_folder(),
                int(draws),
                int(seed),
            )
    except CaredecideError as error:
        st.error(str(error), icon=":material/error:")
        st.stop()
    stem = (model.source_path.stem if model.source_path else "model") or "model"
    cols = st.columns(3)
    cols[0].download_button(
        "Report (HTML)",
        ready.report_html,
        file_name=f"{stem}_report.html",
        mime="text/html",
        key="report_download_html",
    )
    cols[1].download_button(
        "Workbook (XLSX)",
        ready.workbook,
        file_name=f"{stem}_results.xlsx",
        mime="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet",
        key="report_download_xlsx",
    )
    cols[2].download_button(
        "Tables (CSV, zip)",
        ready.tables_zip,
        file_name=f"{stem}_tables.zip",
        mime="application/zip",
        key="report_download_zip",
    )
    if ready.verification is not None:
        st.subheader("Verification checks")
        failed = int((ready.verification["status"] == "fail").sum())
        if failed:
            st.error(
                f"{failed} verification check(s) failed: read the figures below.",
                icon=":material/error:",
            )
        else:
            st.success("Every verification check passed or does not apply.")
        st.dataframe(
            ready.verification[["title", "status", "figures", "source"]],
            hide_index=True,
            key="report_verification",
        )
