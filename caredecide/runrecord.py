"""Run records: what a reviewer needs to re-run an analysis exactly.

A run record is a small JSON file: the command and its arguments, the model file path
and its SHA-256, the SHA-256 of the other input files the model reads (a life table, a
strategy table beside the model), the seed, the package and dependency versions, the date, and the
SHA-256 of every result table written. ``caredecide rerun RECORD`` re-executes the
command and compares the new hashes with the recorded ones (see
:mod:`caredecide.cli.rerun`). Result tables are written byte for byte reproducibly by
:mod:`caredecide.exports`, so equal inputs give equal hashes.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import platform
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path

from caredecide.cautions import CAUTION_SHORT
from caredecide.errors import CaredecideError, ModelError
from caredecide.guarded import check_nesting, read_limited_text, sha256_limited
from caredecide.limits import MAX_HASHED_BYTES, MAX_RUN_RECORD_BYTES

RECORD_FORMAT = 1
MAX_RECORD_BYTES = MAX_RUN_RECORD_BYTES
DEPENDENCIES = ("numpy", "scipy", "pandas", "openpyxl", "altair", "vl-convert-python")


class RunRecordError(CaredecideError, ValueError):
    """A run record cannot be read or does not describe a run we can repeat."""


@dataclass
class RunRecord:
    """One recorded run.

    Attributes
    ----------
    command : str
        Sub-command that produced the outputs (e.g. ``"report"``).
    arguments : dict
        Its options (JSON values), enough to repeat it.
    model_path : str
        The model file as given (resolved against the record's folder when relative).
    model_sha256 : str
    seed : int or None
    versions : dict of str to str
        caredecide, Python and the numerical dependencies.
    date : str
        ISO 8601 UTC time of the run (not part of any hashed output).
    outputs : dict of str to str
        Output file (relative to ``output_dir``) -> SHA-256 of its bytes.
    output_dir : str
        Folder of the hashed outputs (relative to the record's folder when relative).
    input_files : dict of str to str
        Input files other than the model file (life table, strategy table), by path
        (relative to the model file's folder when relative) -> SHA-256 of their bytes.
    """

    command: str
    arguments: dict
    model_path: str
    model_sha256: str
    seed: int | None
    versions: dict[str, str]
    date: str
    outputs: dict[str, str] = field(default_factory=dict)
    output_dir: str = ""
    input_files: dict[str, str] = field(default_factory=dict)
    caution: str = CAUTION_SHORT
    format: int = RECORD_FORMAT

    def to_json(self) -> str:
        """Stable JSON text (sorted keys, two-space indent, trailing newline)."""
        return json.dumps(asdict(self), indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def sha256_bytes(data: bytes) -> str:
    """Hex SHA-256 of ``data``."""
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path | str) -> str:
    """Hex SHA-256 of a file's bytes (a regular file of at most ``MAX_HASHED_BYTES``,
    through the guarded reader: a record may name any path)."""
    return sha256_limited(path, MAX_HASHED_BYTES, what="an input or output file")


def package_versions() -> dict[str, str]:
    """Versions of caredecide, Python and :data:`DEPENDENCIES` (``"absent"`` if missing)."""
    from caredecide import __version__

    versions = {"caredecide": __version__, "python": platform.python_version()}
    for name in DEPENDENCIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "absent"
    return versions


def utc_now() -> str:
    """The current UTC time, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()


def hash_outputs(output_dir: Path, names: list[str] | None = None) -> dict[str, str]:
    """SHA-256 of each file in ``output_dir`` (or of ``names`` in it), sorted by name."""
    output_dir = Path(output_dir)
    if names is None:
        names = [p.name for p in output_dir.iterdir() if p.is_file()]
    return {name: sha256_file(output_dir / name) for name in sorted(names)}


def write_record(record: RunRecord, path: Path | str) -> Path:
    """Write ``record`` as JSON (UTF-8, ``\\n`` line endings)."""
    path = Path(path)
    path.write_bytes(record.to_json().encode("utf-8"))
    return path


def read_record(path: Path | str) -> RunRecord:
    """Read a run record, refusing oversized, malformed or incomplete files.

    Raises
    ------
    RunRecordError
        Naming the file, the field and the offending value.
    """
    path = Path(path)
    try:
        text = read_limited_text(path, MAX_RUN_RECORD_BYTES, what="a JSON run record")
        check_nesting(text, file=str(path), kind="json")
    except ModelError as error:
        raise RunRecordError(str(error)) from None
    try:
        data = json.loads(text)
    except (json.JSONDecodeError, ValueError, RecursionError) as error:
        raise RunRecordError(f"{path}: not a JSON run record ({error})") from None
    if not isinstance(data, dict):
        raise RunRecordError(f"{path}: expected a JSON object, got {type(data).__name__}")
    if data.get("format") != RECORD_FORMAT:
        raise RunRecordError(
            f"{path}: format = {data.get('format')!r} is not supported; expected {RECORD_FORMAT}"
        )
    expected = {
        "command": str,
        "arguments": dict,
        "model_path": str,
        "model_sha256": str,
        "versions": dict,
        "date": str,
        "outputs": dict,
        "output_dir": str,
    }
    for key, kind in expected.items():
        if not isinstance(data.get(key), kind):
            raise RunRecordError(
                f"{path}: field {key!r} = {data.get(key)!r} is missing or not a {kind.__name__}"
            )
    seed = data.get("seed")
    if seed is not None and (not isinstance(seed, int) or isinstance(seed, bool) or seed < 0):
        raise RunRecordError(f"{path}: field 'seed' = {seed!r}; expected null or an integer >= 0")
    draws = data["arguments"].get("draws")
    if draws is not None and (not isinstance(draws, int) or isinstance(draws, bool) or draws < 1):
        raise RunRecordError(
            f"{path}: field 'arguments.draws' = {draws!r}; expected null or an integer >= 1"
        )
    for key in ("outputs", "versions"):
        bad = {k: v for k, v in data[key].items() if not isinstance(v, str)}
        if bad:
            name, value = next(iter(bad.items()))
            raise RunRecordError(f"{path}: field '{key}.{name}' = {value!r}; expected text")
    inputs = data.get("input_files", {})
    if not isinstance(inputs, dict) or not all(
        isinstance(k, str) and isinstance(v, str) for k, v in inputs.items()
    ):
        raise RunRecordError(
            f"{path}: field 'input_files' = {inputs!r}; expected an object "
            "of file path -> SHA-256 text"
        )
    known = set(RunRecord.__dataclass_fields__)
    return RunRecord(**{k: v for k, v in data.items() if k in known})


def resolve(record_path: Path | str, relative: str) -> Path:
    """A path stored in a record, resolved against the record's folder when relative."""
    p = Path(relative)
    return p if p.is_absolute() else Path(record_path).resolve().parent / p


@dataclass(frozen=True)
class Difference:
    """One way a re-run differs from its record."""

    what: str
    recorded: str
    now: str

    def __str__(self) -> str:
        return f"{self.what}: recorded {self.recorded}, now {self.now}"


def compare_hashes(
    recorded: dict[str, str], now: dict[str, str], *, kind: str = "output"
) -> list[Difference]:
    """Differences between two ``{file: sha256}`` maps (missing, extra, changed).

    ``kind`` names the files in the messages (``"output"``, ``"input file"``).
    """
    differences = []
    for name in sorted(set(recorded) | set(now)):
        before, after = recorded.get(name, "absent"), now.get(name, "absent")
        if before != after:
            differences.append(Difference(f"{kind} {name}", before, after))
    return differences


def compare_versions(recorded: dict[str, str], now: dict[str, str]) -> list[Difference]:
    """Version differences (a reason results may differ; reported, not an error)."""
    return [
        Difference(f"version of {k}", recorded.get(k, "absent"), now.get(k, "absent"))
        for k in sorted(set(recorded) | set(now))
        if recorded.get(k) != now.get(k)
    ]
