"""Assemble the self-contained HTML report: inline CSS, inline SVG, no scripts, no links out.

A Content-Security-Policy meta tag forbids loading anything from elsewhere, so the file
renders the same offline and cannot call out even if a model text tried to.
"""

from __future__ import annotations

from pathlib import Path

from caredecide.cautions import caution_short
from caredecide.report.analyses import ReportData
from caredecide.report.sections import (
    SECTION_BUILDERS,
    SECTION_TITLES,
    esc,
    note,
    run_record_section,
)

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; color: #1b1b1b; margin: 0; background: #fafaf7; }
main { max-width: 1180px; margin: 0 auto; padding: 1rem 1.5rem 4rem; }
header.top { background: #243b53; color: #fff; padding: 0.8rem 1.5rem; }
header.top h1 { font-size: 1.35rem; margin: 0; }
header.top p { margin: 0.2rem 0 0; font-size: 0.9rem; }
nav.contents { font-size: 0.9rem; margin: 0.8rem 0; }
nav.contents a { margin-right: 0.9rem; color: #243b53; }
section { background: #fff; border: 1px solid #dedbd2; border-radius: 6px;
          padding: 0.4rem 1.2rem 1rem; margin: 1rem 0; }
h2 { font-size: 1.2rem; border-bottom: 2px solid #c9a227; padding-bottom: 0.2rem; }
h3 { font-size: 1rem; margin-top: 1.2rem; }
.caution { background: #fff4d6; border: 2px solid #b7791f; padding: 0.6rem 1rem;
           border-radius: 6px; }
.headline { font-weight: 600; }
.note { color: #6b4e16; font-style: italic; }
.cut { font-size: 0.85rem; color: #555; }
.scroll { overflow-x: auto; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.4rem 0; }
th, td { border: 1px solid #e2e0d8; padding: 0.2rem 0.45rem; text-align: left;
         vertical-align: top; }
th { background: #f1efe8; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
table.checks tr.pass td:nth-child(2) { color: #1e6b3a; }
table.checks tr.fail td { background: #fde8e8; }
table.checks tr.fail td:nth-child(2) { color: #9b1c1c; }
figure.chart { margin: 0.6rem 0; overflow-x: auto; }
footer { font-size: 0.85rem; color: #444; margin-top: 2rem; }
"""

STEP_OF_SECTION = {
    "policy": "policy",
    "changes": "sensitivity",
    "strategies": "strategies",
    "sensitivity": "sensitivity",
    "uncertainty": "uncertainty",
    "verification": "verification",
}


def _section_body(section: str, data: ReportData, record: dict) -> str:
    if section == "run-record":
        return run_record_section(data, record)
    step = STEP_OF_SECTION.get(section)
    body = ""
    try:
        body = SECTION_BUILDERS[section](data)
    except KeyError:  # the analysis did not produce its tables
        pass
    if step in data.notes:
        body += note(data.notes[step])
    return body or note("No results for this section.")


def render_report(data: ReportData, record: dict) -> str:
    """The report as one HTML document.

    Parameters
    ----------
    data : ReportData
        From :func:`caredecide.report.analyses.run_analyses`.
    record : dict
        Run record fields shown at the end (``command_line``, ``seed``, ``date``,
        ``versions``).

    Returns
    -------
    str
        HTML5 text (UTF-8 when written).
    """
    title = f"caredecide report: {data.model.title}"
    caution = caution_short(data.model_path)
    contents = "".join(f'<a href="#{sid}">{esc(name)}</a>' for sid, name in SECTION_TITLES.items())
    sections = "".join(
        f'<section id="{sid}"><h2>{esc(name)}</h2>{_section_body(sid, data, record)}</section>'
        for sid, name in SECTION_TITLES.items()
    )
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(title)} - research use only</title><style>{STYLE}</style></head><body>"
        f'<header class="top"><h1>{esc(title)}</h1><p>{esc(caution)}</p></header>'
        f'<main><nav class="contents">{contents}</nav>{sections}'
        f"<footer>{esc(caution)} Produced by caredecide "
        f"{esc(record.get('versions', {}).get('caredecide', ''))}.</footer></main>"
        "</body></html>\n"
    )


def write_report(data: ReportData, record: dict, path: Path | str) -> Path:
    """Write :func:`render_report` to ``path`` (UTF-8, ``\\n`` line endings)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(render_report(data, record).encode("utf-8"))
    return path
