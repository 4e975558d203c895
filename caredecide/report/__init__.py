"""The HTML report, its result tables and its run record, built in one call.

:func:`build_report` runs every analysis (:mod:`caredecide.report.analyses`), writes the
result tables as CSV plus one XLSX workbook (:mod:`caredecide.exports`), hashes them into
a run record (:mod:`caredecide.runrecord`) and writes the self-contained HTML report
(:mod:`caredecide.report.html`). :func:`rerun` repeats a recorded run and compares the
hashes. Layout of ``--out report.html``::

    report.html             the report (cautions first)
    report_tables/*.csv     every result table, byte-reproducible
    report_tables/results.xlsx
    report.run.json         the run record
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

from caredecide.outputs import staged_folder
from caredecide.report.analyses import ReportData, result_tables, run_analyses

WORKBOOK_NAME = "results.xlsx"

__all__ = [
    "Downloads",
    "ReportData",
    "RerunOutcome",
    "build_report",
    "downloads",
    "input_files",
    "record_path_for",
    "rerun",
    "run_analyses",
    "tables_dir_for",
    "write_outputs",
]


def tables_dir_for(report_path: Path) -> Path:
    """``report.html`` -> ``report_tables/`` beside it."""
    return report_path.with_name(f"{report_path.stem}_tables")


def record_path_for(report_path: Path) -> Path:
    """``report.html`` -> ``report.run.json`` beside it."""
    return report_path.with_name(f"{report_path.stem}.run.json")


def input_files(model, model_path: Path) -> list[Path]:
    """Files other than the model file that the analyses read, when they exist.

    The model's life table (``[mortality] table``, relative to the model file) and the
    strategy table ``<model>.strategies.csv`` beside it (read by the strategy comparison
    and the probabilistic analysis).
    """
    from caredecide.strategies import sibling_table

    found = []
    mortality = getattr(model, "mortality", None)
    if mortality is not None and mortality.table:
        table = Path(mortality.table)
        found.append(table if table.is_absolute() else Path(model_path).parent / table)
    strategies = sibling_table(model_path)
    if strategies is not None:
        found.append(strategies)
    return [p for p in found if p.is_file()]


def _hash_inputs(model, model_path: Path) -> dict[str, str]:
    """``{path relative to the model file's folder: SHA-256}`` of :func:`input_files`.

    Relative to the model (as the model file itself names its life table), so the record
    still matches when the model and its files are moved together.
    """
    from caredecide.runrecord import sha256_file

    return {
        Path(_relative(p, Path(model_path).parent)).as_posix(): sha256_file(p)
        for p in sorted(input_files(model, model_path))
    }


def _about(data: ReportData) -> dict[str, str]:
    return {
        "model": data.model.title,
        "model file sha256": data.model_sha256,
        "draws": str(data.draws or 0),
        "seed": str(data.seed),
    }


def write_outputs(data: ReportData, tables_dir: Path) -> dict[str, str]:
    """Write every table (CSV) and the workbook to ``tables_dir``; return their SHA-256."""
    from caredecide.exports import export_tables, export_workbook
    from caredecide.runrecord import hash_outputs

    written = export_tables(result_tables(data), tables_dir)
    export_workbook(data.inputs, data.results, tables_dir / WORKBOOK_NAME, about=_about(data))
    return hash_outputs(tables_dir, [p.name for p in written.values()] + [WORKBOOK_NAME])


def _relative(path: Path, start: Path) -> str:
    try:
        return os.path.relpath(path.resolve(), start.resolve())
    except ValueError:  # another drive (Windows): keep it absolute
        return str(path.resolve())


def build_report(
    model_path: Path | str,
    out: Path | str,
    *,
    draws: int | None = None,
    seed: int | None = None,
    command_line: str = "",
    progress: Callable[[int, int, str], None] | None = None,
    overrides: dict | None = None,
):
    """Run every analysis, write the report, the tables and the run record.

    Parameters
    ----------
    model_path : path
        Model file (TOML).
    out : path
        The HTML report to write; tables and the record go beside it (module docstring).
    draws, seed : int, optional
        Probabilistic analysis (left out without ``draws``).
    command_line : str
        The command as typed, for the record.
    progress : callable(done, total, step), optional

    Returns
    -------
    caredecide.runrecord.RunRecord
        The record written to :func:`record_path_for` ``(out)``.
    """
    from caredecide.report.html import write_report
    from caredecide.runrecord import RunRecord, package_versions, utc_now, write_record

    model_path, out = Path(model_path), Path(out)
    data = run_analyses(model_path, draws=draws, seed=seed, progress=progress, overrides=overrides)
    record_path = record_path_for(out)
    tables_dir = tables_dir_for(out)
    record = RunRecord(
        command="report",
        arguments={
            "draws": draws,
            "seed": seed,
            "report": out.name,
            "command_line": command_line,
            **({"set": dict(overrides)} if overrides else {}),
        },
        model_path=_relative(model_path, record_path.parent),
        model_sha256=data.model_sha256,
        seed=seed,
        versions=package_versions(),
        date=utc_now(),
        outputs={},
        output_dir=_relative(tables_dir, record_path.parent),
        input_files=_hash_inputs(data.model, model_path),
    )
    # Report, tables and record are one output set: staged beside the report and moved
    # into place only when all three were written (caredecide.outputs).
    with staged_folder(out.parent) as staging:
        record.outputs = write_outputs(data, staging / tables_dir.name)
        write_report(data, {**asdict(record), "command_line": command_line}, staging / out.name)
        write_record(record, staging / record_path.name)
    return record


@dataclass(frozen=True)
class Downloads:
    """The report and its tables as bytes (for the app's download buttons)."""

    report_html: bytes
    workbook: bytes
    tables_zip: bytes
    verification: object
    """The verification table (DataFrame), or None when it could not run."""


def downloads(
    model_text: str,
    *,
    file: str,
    base_dir: str | Path,
    draws: int | None = None,
    seed: int | None = None,
    command_line: str = "",
) -> Downloads:
    """Report, workbook and zipped CSV tables of a model given as text (no files written).

    Parameters
    ----------
    model_text : str
        The model file's text; its SHA-256 identifies the model in the report.
    file : str
        Name for messages and the report (e.g. the uploaded file's name).
    base_dir : path
        Folder that relative paths in the model (life tables) resolve against.
    draws, seed : int, optional
        Probabilistic analysis (left out without ``draws``).
    command_line : str
        Shown in the report's run record.
    """
    from caredecide.cautions import caution_long, caution_short
    from caredecide.exports import tables_zip_bytes, workbook_bytes
    from caredecide.modelfile import loads_model
    from caredecide.report.html import render_report
    from caredecide.runrecord import package_versions, sha256_bytes, utc_now

    model = loads_model(model_text, file=file, base_dir=Path(base_dir))
    # The file beside its folder, so a strategy table next to it is found (as on the
    # command line) whatever the app's working directory.
    located = Path(base_dir) / Path(file).name
    if located.is_file():
        model = replace(model, source_path=located)
    data = run_analyses(
        model.source_path or Path(file),
        draws=draws,
        seed=seed,
        model=model,
        model_sha256=sha256_bytes(model_text.encode("utf-8")),
    )
    record = {
        "command_line": command_line,
        "seed": seed,
        "date": utc_now(),
        "versions": package_versions(),
    }
    return Downloads(
        report_html=render_report(data, record).encode("utf-8"),
        workbook=workbook_bytes(
            data.inputs, data.results, about=_about(data), caution=caution_long(data.model_path)
        ),
        tables_zip=tables_zip_bytes(
            result_tables(data),
            caution=f"{caution_short(data.model_path)}\n\n{caution_long(data.model_path)}",
        ),
        verification=data.results.get("verification"),
    )


@dataclass
class RerunOutcome:
    """What :func:`rerun` found.

    Attributes
    ----------
    differences : list of Difference
        Model file, other input file and output differences (empty: reproduced exactly).
    version_differences : list of Difference
        Package versions that differ from the record (a likely reason for differences).
    output_dir : Path
        Where the re-run wrote its tables.
    model_changed : bool
    inputs_changed : bool
        An input file other than the model (life table, strategy table) differs, is
        missing or is new.
    """

    differences: list = field(default_factory=list)
    version_differences: list = field(default_factory=list)
    output_dir: Path | None = None
    model_changed: bool = False
    inputs_changed: bool = False

    @property
    def reproduced(self) -> bool:
        return not self.differences


def rerun(
    record_path: Path | str,
    *,
    model: Path | str | None = None,
    out_dir: Path | str | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> RerunOutcome:
    """Repeat a recorded run and compare the hashes of its outputs with the record.

    Parameters
    ----------
    record_path : path
        A run record written by :func:`build_report`.
    model : path, optional
        The model file to use instead of the recorded path (e.g. a record and model sent
        together); its hash is still compared with the record's.
    out_dir : path, optional
        Where to write the re-run's tables (default: a new temporary folder).
    progress : callable(done, total, step), optional

    Returns
    -------
    RerunOutcome

    Raises
    ------
    caredecide.runrecord.RunRecordError
        When the record cannot be read or names a command we cannot repeat.
    """
    from caredecide.runrecord import (
        Difference,
        RunRecordError,
        compare_hashes,
        compare_versions,
        package_versions,
        read_record,
        resolve,
        sha256_file,
    )

    record_path = Path(record_path)
    record = read_record(record_path)
    if record.command != "report":
        raise RunRecordError(
            f"{record_path}: command {record.command!r} cannot be re-run; expected 'report'"
        )
    model_path = resolve(record_path, record.model_path) if model is None else Path(model)
    if not model_path.is_file():
        given = f"model_path = {record.model_path!r}" if model is None else "given with --model"
        raise RunRecordError(
            f"{record_path}: model file {model_path} ({given}) does not exist; "
            "expected the model file of the recorded run"
        )
    outcome = RerunOutcome(
        version_differences=compare_versions(record.versions, package_versions())
    )
    now = sha256_file(model_path)
    if now != record.model_sha256:
        outcome.model_changed = True
        outcome.differences.append(Difference(f"model file {model_path}", record.model_sha256, now))
    draws = record.arguments.get("draws")
    data = run_analyses(
        model_path,
        draws=draws,
        seed=record.seed,
        progress=progress,
        overrides=record.arguments.get("set"),
    )
    changed_inputs = compare_hashes(
        record.input_files, _hash_inputs(data.model, model_path), kind="input file"
    )
    outcome.inputs_changed = bool(changed_inputs)
    outcome.differences += changed_inputs
    if out_dir is None:  # compared, then removed: no temporary folder is left behind
        with tempfile.TemporaryDirectory(prefix="rerun-") as scratch:
            written = write_outputs(data, Path(scratch))
    else:
        outcome.output_dir = Path(out_dir)
        with staged_folder(outcome.output_dir) as staging:
            written = write_outputs(data, staging)
    outcome.differences += compare_hashes(record.outputs, written)
    return outcome
