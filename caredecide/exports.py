"""Result tables as reproducible CSV files and one XLSX workbook for reviewers.

Byte-identical output for identical results: columns keep the order given, rows keep
the (deterministic) order of the analysis, floats are written with
:data:`FLOAT_FORMAT` (``-0`` written as ``0``), missing values as an empty field, line
endings are ``\\n`` and the encoding UTF-8. The workbook fixes its document dates and
the time stamps of its zip members, so it is byte-identical too.
"""

from __future__ import annotations

import datetime as _dt
import io
import re
import zipfile
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from caredecide.cautions import CAUTION_LONG, CAUTION_SHORT

FLOAT_FORMAT = "%.12g"
"""Twelve significant digits: well above the precision of any model input."""
FIXED_DATE = _dt.datetime(2000, 1, 1)
"""Document date written into workbooks (the run date lives in the run record)."""
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)
_SHEET_NAME_MAX = 31
_NAME = re.compile(r"^[A-Za-z0-9_.-]+$")


def normalise_table(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy with ``-0.0`` turned into ``0.0`` and a plain index (order kept)."""
    frame = frame.reset_index(drop=True).copy()
    for column in frame.columns:
        if pd.api.types.is_float_dtype(frame[column]):
            frame[column] = frame[column] + 0.0
    return frame


def table_to_csv(frame: pd.DataFrame) -> bytes:
    """The CSV bytes of one result table (see the module docstring for the rules)."""
    text = normalise_table(frame).to_csv(
        index=False, float_format=FLOAT_FORMAT, lineterminator="\n", na_rep=""
    )
    return text.encode("utf-8")


def _check_name(name: str) -> None:
    if not _NAME.match(name):
        raise ValueError(
            f"table name {name!r} is not allowed; expected letters, digits, "
            "'_', '.' or '-' (it becomes a file name)"
        )


def export_tables(results: Mapping[str, pd.DataFrame], out_dir: Path | str) -> dict[str, Path]:
    """Write every result table as ``<name>.csv`` in ``out_dir``.

    Parameters
    ----------
    results : mapping of str to DataFrame
        Table name -> table (names become file names).
    out_dir : path
        Created when missing.

    Returns
    -------
    dict of str to Path
        Table name -> written file.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for name, frame in results.items():
        _check_name(name)
        path = out_dir / f"{name}.csv"
        path.write_bytes(table_to_csv(frame))
        written[name] = path
    return written


CAUTION_FILE = "CAUTION.txt"
"""The caution's file in every zip of tables (first member, so it is seen first)."""


def tables_zip_bytes(results: Mapping[str, pd.DataFrame], *, caution: str | None = None) -> bytes:
    """Every table as ``<name>.csv`` in one zip (fixed time stamps: byte-reproducible),
    with the caution as :data:`CAUTION_FILE` (default: the research-use caution)."""
    text = caution or f"{CAUTION_SHORT}\n\n{CAUTION_LONG}"
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr(_zip_info(CAUTION_FILE), text + "\n")
        for name, frame in results.items():
            _check_name(name)
            archive.writestr(_zip_info(f"{name}.csv"), table_to_csv(frame))
    return out.getvalue()


def _zip_info(name: str) -> zipfile.ZipInfo:
    info = zipfile.ZipInfo(name, date_time=_ZIP_DATE)
    info.compress_type = zipfile.ZIP_DEFLATED
    return info


def _sheet_title(prefix: str, name: str, used: set[str]) -> str:
    title = f"{prefix}{name}"[:_SHEET_NAME_MAX]
    base, k = title, 2
    while title in used:
        suffix = f"~{k}"
        title = base[: _SHEET_NAME_MAX - len(suffix)] + suffix
        k += 1
    used.add(title)
    return title


def _cell(value: object) -> object:
    """A value openpyxl can write: numpy scalars to Python, NaN to empty."""
    if value is None:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None if np.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, bool | int | float | str):
        return value
    return str(value)


def workbook_bytes(
    inputs: Mapping[str, pd.DataFrame],
    results: Mapping[str, pd.DataFrame],
    *,
    about: Mapping[str, str] | None = None,
    caution: str = CAUTION_LONG,
) -> bytes:
    """One XLSX workbook: an ``about`` sheet, inputs (``in_*``) and results (``out_*``).

    Parameters
    ----------
    inputs, results : mapping of str to DataFrame
        Sheets of model inputs and of results; each table on its own sheet.
    about : mapping of str to str, optional
        Extra lines for the first sheet (model, run date, versions...).

    Returns
    -------
    bytes
        The workbook, byte-identical for identical tables.
    """
    from openpyxl import Workbook

    workbook = Workbook()
    sheet = workbook.active
    sheet.title = "about"
    sheet.append(["caution", caution])
    for key, value in (about or {}).items():
        sheet.append([str(key), str(value)])
    sheet.append(["sheets", "in_*: model inputs; out_*: results (one table per sheet)"])
    used = {"about"}
    for prefix, tables in (("in_", inputs), ("out_", results)):
        for name, frame in tables.items():
            ws = workbook.create_sheet(_sheet_title(prefix, name, used))
            frame = normalise_table(frame)
            ws.append([str(c) for c in frame.columns])
            for row in frame.itertuples(index=False, name=None):
                ws.append([_cell(v) for v in row])
    workbook.properties.created = FIXED_DATE
    workbook.properties.modified = FIXED_DATE
    workbook.properties.creator = "caredecide"
    raw = io.BytesIO()
    workbook.save(raw)
    return _fixed_zip(raw.getvalue())


def _fixed_zip(data: bytes) -> bytes:
    """Rewrite a zip with fixed member time stamps and a fixed document date.

    openpyxl stamps ``dcterms:modified`` with the clock when saving, so the date in
    ``docProps/core.xml`` is replaced by :data:`FIXED_DATE`.
    """
    fixed_date = FIXED_DATE.strftime("%Y-%m-%dT%H:%M:%SZ").encode()
    out = io.BytesIO()
    with (
        zipfile.ZipFile(io.BytesIO(data)) as source,
        zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as target,
    ):
        for info in source.infolist():
            fixed = _zip_info(info.filename)
            fixed.external_attr = info.external_attr
            content = source.read(info.filename)
            if info.filename == "docProps/core.xml":
                content = re.sub(
                    rb"(<dcterms:modified[^>]*>)[^<]*(<)",
                    rb"\g<1>" + fixed_date + rb"\g<2>",
                    content,
                )
            target.writestr(fixed, content)
    return out.getvalue()


def export_workbook(
    inputs: Mapping[str, pd.DataFrame],
    results: Mapping[str, pd.DataFrame],
    path: Path | str,
    *,
    about: Mapping[str, str] | None = None,
) -> Path:
    """Write :func:`workbook_bytes` to ``path`` and return it."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(workbook_bytes(inputs, results, about=about))
    return path
