"""Run records: hashes, versions, JSON round trip and one error test per reading rule."""

from __future__ import annotations

import json

import pytest

from caredecide.runrecord import (
    MAX_RECORD_BYTES,
    RunRecord,
    RunRecordError,
    compare_hashes,
    hash_outputs,
    package_versions,
    read_record,
    sha256_bytes,
    write_record,
)


def _record(**changes) -> RunRecord:
    fields = dict(
        command="report",
        arguments={"draws": None},
        model_path="m.toml",
        model_sha256="0" * 64,
        seed=None,
        versions={"caredecide": "0"},
        date="2026-01-01T00:00:00+00:00",
        outputs={"a.csv": "1" * 64},
        output_dir="m_tables",
    )
    fields.update(changes)
    return RunRecord(**fields)


def test_sha256_of_abc():
    # Source: FIPS 180-2, Appendix B.1 (SHA-256 of "abc").
    assert sha256_bytes(b"abc") == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )


def test_versions_name_the_package_python_and_numerical_libraries():
    versions = package_versions()
    assert {"caredecide", "python", "numpy", "scipy", "pandas"} <= set(versions)


def test_record_round_trips_and_its_json_is_stable(tmp_path):
    record = _record(seed=7)
    path = write_record(record, tmp_path / "r.json")
    assert read_record(path) == record
    assert path.read_bytes() == record.to_json().encode()
    assert list(json.loads(path.read_text())) == sorted(json.loads(path.read_text()))


def test_hash_outputs_sorted_by_name(tmp_path):
    (tmp_path / "b.csv").write_bytes(b"abc")
    (tmp_path / "a.csv").write_bytes(b"")
    hashes = hash_outputs(tmp_path)
    assert list(hashes) == ["a.csv", "b.csv"]
    assert hashes["b.csv"] == sha256_bytes(b"abc")


def test_compare_hashes_reports_changed_missing_and_new():
    found = compare_hashes({"a": "1", "b": "2", "c": "3"}, {"a": "1", "b": "9", "d": "4"})
    assert [str(d) for d in found] == [
        "output b: recorded 2, now 9",
        "output c: recorded 3, now absent",
        "output d: recorded absent, now 4",
    ]


def _write(tmp_path, content: str):
    path = tmp_path / "r.json"
    path.write_text(content, encoding="utf-8")
    return path


def test_oversized_record_is_refused(tmp_path):
    path = _write(tmp_path, " " * (MAX_RECORD_BYTES + 1))
    with pytest.raises(
        RunRecordError, match=r"r\.json: the file is larger than the limit of 1,000,000 bytes"
    ):
        read_record(path)


def test_record_that_is_not_json_is_refused(tmp_path):
    with pytest.raises(RunRecordError, match=r"r\.json: not a JSON run record"):
        read_record(_write(tmp_path, "{not json"))


def test_record_that_is_not_an_object_is_refused(tmp_path):
    with pytest.raises(RunRecordError, match=r"expected a JSON object, got list"):
        read_record(_write(tmp_path, "[1, 2]"))


def test_unknown_record_format_is_refused(tmp_path):
    data = json.loads(_record().to_json()) | {"format": 99}
    with pytest.raises(RunRecordError, match=r"format = 99 is not supported; expected 1"):
        read_record(_write(tmp_path, json.dumps(data)))


def test_missing_field_is_named(tmp_path):
    data = json.loads(_record().to_json())
    del data["model_sha256"]
    with pytest.raises(RunRecordError, match=r"field 'model_sha256' = None is missing"):
        read_record(_write(tmp_path, json.dumps(data)))


def test_negative_seed_is_refused(tmp_path):
    data = json.loads(_record().to_json()) | {"seed": -3}
    with pytest.raises(RunRecordError, match=r"field 'seed' = -3; expected null or an integer"):
        read_record(_write(tmp_path, json.dumps(data)))


def test_bad_draws_argument_is_refused(tmp_path):
    data = json.loads(_record().to_json())
    data["arguments"]["draws"] = "many"
    with pytest.raises(
        RunRecordError, match=r"field 'arguments.draws' = 'many'; expected null or an integer"
    ):
        read_record(_write(tmp_path, json.dumps(data)))


def test_output_hash_that_is_not_text_is_refused(tmp_path):
    data = json.loads(_record().to_json())
    data["outputs"]["a.csv"] = 12
    with pytest.raises(RunRecordError, match=r"field 'outputs.a.csv' = 12; expected text"):
        read_record(_write(tmp_path, json.dumps(data)))


def test_input_files_that_are_not_a_path_to_hash_map_are_refused(tmp_path):
    data = json.loads(_record().to_json()) | {"input_files": ["life.csv"]}
    with pytest.raises(
        RunRecordError,
        match=r"field 'input_files' = \['life.csv'\]; expected an "
        "object of file path -> SHA-256 text",
    ):
        read_record(_write(tmp_path, json.dumps(data)))


def test_input_files_round_trip_and_differences_name_them():
    record = _record(input_files={"life.csv": "2" * 64})
    assert RunRecord(**json.loads(record.to_json())) == record
    found = compare_hashes(record.input_files, {"life.csv": "3" * 64}, kind="input file")
    assert [str(d) for d in found] == [f"input file life.csv: recorded {'2' * 64}, now {'3' * 64}"]
