"""CSV and XLSX exports: exact bytes, fixed formatting, byte-identical repeats."""

from __future__ import annotations

import io
import zipfile

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from caredecide.exports import (
    export_tables,
    export_workbook,
    table_to_csv,
    workbook_bytes,
)


def test_csv_bytes_are_fixed():
    frame = pd.DataFrame(
        {
            "state": ["well", "sick"],
            "value": [1 / 3, -0.0],
            "gap": [np.nan, 1e-20],
            "n": [1, 2],
            "tie": [True, False],
        }
    )
    # Twelve significant digits, -0 written as 0, NaN as an empty field, "\n" line ends.
    assert table_to_csv(frame) == (
        b"state,value,gap,n,tie\nwell,0.333333333333,,1,True\nsick,0,1e-20,2,False\n"
    )


def test_column_order_and_row_order_are_kept():
    frame = pd.DataFrame({"b": [2.0, 1.0], "a": ["y", "x"]}, index=[5, 3])
    assert table_to_csv(frame) == b"b,a\n2,y\n1,x\n"


@settings(max_examples=25, deadline=None)
@given(
    values=arrays(np.float64, st.integers(1, 20), elements=st.floats(-1e12, 1e12, allow_nan=False))
)
def test_csv_round_trips_to_twelve_digits_and_repeats_byte_for_byte(values):
    frame = pd.DataFrame({"x": values})
    data = table_to_csv(frame)
    assert data == table_to_csv(frame.copy())
    back = pd.read_csv(io.BytesIO(data))["x"].to_numpy()
    np.testing.assert_allclose(back, values, rtol=1e-11, atol=1e-300)


def test_export_tables_writes_one_file_per_table(tmp_path):
    written = export_tables(
        {"policy": pd.DataFrame({"a": [1]}), "trace": pd.DataFrame({"b": [0.5]})}, tmp_path / "out"
    )
    assert sorted(p.name for p in written.values()) == ["policy.csv", "trace.csv"]
    assert (tmp_path / "out" / "trace.csv").read_bytes() == b"b\n0.5\n"


def test_a_table_name_that_is_not_a_plain_file_name_is_refused(tmp_path):
    with pytest.raises(ValueError, match=r"table name '\.\./escape' is not allowed"):
        export_tables({"../escape": pd.DataFrame({"a": [1]})}, tmp_path)


def test_workbook_has_inputs_and_results_on_separate_sheets(tmp_path):
    from openpyxl import load_workbook

    inputs = {"evidence": pd.DataFrame({"parameter": ["p"], "value": [0.1]})}
    results = {"totals": pd.DataFrame({"qalys": [12.5], "costs": [np.nan]})}
    path = export_workbook(inputs, results, tmp_path / "r.xlsx", about={"model": "<m>"})
    book = load_workbook(path)
    assert book.sheetnames == ["about", "in_evidence", "out_totals"]
    assert [c.value for c in book["out_totals"][2]] == [12.5, None]
    assert book["about"]["A1"].value == "caution"
    assert "research-use-only" in book["about"]["B1"].value
    assert [c.value for c in book["about"][2]] == ["model", "<m>"]


def test_workbook_bytes_carry_no_clock(monkeypatch):
    tables = {"t": pd.DataFrame({"a": [1.5, 2.5]})}
    first = workbook_bytes(tables, tables)
    archive = zipfile.ZipFile(io.BytesIO(first))
    assert {info.date_time for info in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}
    core = archive.read("docProps/core.xml").decode()
    assert core.count("2000-01-01T00:00:00Z") == 2  # created and modified
    assert workbook_bytes(tables, tables) == first


def test_tables_zip_holds_the_same_csv_bytes_with_fixed_stamps():
    from caredecide.cautions import CAUTION_SHORT
    from caredecide.exports import tables_zip_bytes

    tables = {"policy": pd.DataFrame({"a": [0.25]}), "trace": pd.DataFrame({"b": ["x"]})}
    data = tables_zip_bytes(tables)
    archive = zipfile.ZipFile(io.BytesIO(data))
    assert archive.namelist() == ["CAUTION.txt", "policy.csv", "trace.csv"]
    assert archive.read("CAUTION.txt").decode().startswith(CAUTION_SHORT)
    assert archive.read("policy.csv") == table_to_csv(tables["policy"])
    assert {i.date_time for i in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}
    assert tables_zip_bytes(tables) == data
