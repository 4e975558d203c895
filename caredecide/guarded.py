"""The one guarded reader every user file goes through.

Model files, uploads, run records, strategy tables, records for estimation and life
tables are data from outside: each is read here, and only here, so that the same
rules hold everywhere:

* regular files only (a folder, a device such as ``/dev/zero``, a pipe or a socket is
  refused, also behind a symlink) — checked on the opened file, not on the name;
* at most ``limit`` bytes are read, whatever ``stat`` says (a file growing while it is
  read, or a special file reporting size 0, cannot get past the cap);
* text must be UTF-8;
* nested brackets and braces (TOML arrays and inline tables, JSON) are counted before a
  recursive parser sees them, so a file nested thousands deep gets a message, not a
  ``RecursionError`` (:func:`check_nesting`), and parsed data are walked without
  recursion (:func:`check_data_depth`).

Every refusal is a :class:`caredecide.errors.ModelError` naming the file, the offending
value and what was expected.
"""

from __future__ import annotations

import hashlib
import os
import re
import stat
from collections.abc import Iterator, Mapping
from pathlib import Path

from caredecide.errors import ModelError, Problem
from caredecide.limits import MAX_NESTING

_TOML_TOKENS = re.compile(
    r'"""(?:[^\\]|\\.)*?"""'  # multi-line basic string
    r"|'''.*?'''"  # multi-line literal string
    r'|"(?:[^"\\\n]|\\.)*"'  # basic string
    r"|'[^'\n]*'"  # literal string
    r"|#[^\n]*"  # comment
    r"|[\[\]{}]",
    re.S,
)
_JSON_TOKENS = re.compile(r'"(?:[^"\\]|\\.)*"|[\[\]{}]', re.S)


def _open_error(path: Path, error: OSError, what: str) -> ModelError:
    if isinstance(error, FileNotFoundError):
        message = f"file not found; expected {what}"
    elif isinstance(error, IsADirectoryError):
        message = f"is a folder; expected {what}"
    elif isinstance(error, PermissionError):
        message = f"cannot be read (permission denied); expected {what} you may read"
    else:
        message = f"cannot be read ({error.strerror or error}); expected {what}"
    return ModelError(message, file=str(path))


def _open_regular(path: Path, what: str) -> int:
    """A read-only descriptor of ``path``, refused unless it is a regular file."""
    try:
        # O_NONBLOCK: opening a named pipe must not wait for a writer.
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as error:
        raise _open_error(path, error, what) from None
    mode = os.fstat(fd).st_mode
    if not stat.S_ISREG(mode):
        os.close(fd)
        kind = "a folder" if stat.S_ISDIR(mode) else "not a regular file (a device, pipe or socket)"
        raise ModelError(f"is {kind}; expected {what}", file=str(path))
    return fd


def _chunks(path: Path, limit: int, what: str) -> Iterator[bytes]:
    """The bytes of a regular file in pieces, refused once more than ``limit`` came."""
    fd = _open_regular(path, what)
    size = 0
    try:
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                return
            size += len(chunk)
            if size > limit:
                raise ModelError(
                    f"the file is larger than the limit of {limit:,} bytes; expected {what}",
                    file=str(path),
                )
            yield chunk
    except OSError as error:
        raise _open_error(path, error, what) from None
    finally:
        os.close(fd)


def read_limited_bytes(path: Path | str, limit: int, *, what: str = "a data file") -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes.

    Parameters
    ----------
    path : path
        The file; a symlink is followed, but its target must be a regular file.
    limit : int
        Largest accepted size in bytes; reading stops as soon as it is passed.
    what : str
        What the file should be, for messages ("a model file (.toml)").

    Raises
    ------
    ModelError
        Missing, a folder, not a regular file, unreadable, or larger than ``limit``.
    """
    return b"".join(_chunks(Path(path), limit, what))


def sha256_limited(path: Path | str, limit: int, *, what: str = "a data file") -> str:
    """Hex SHA-256 of a regular file of at most ``limit`` bytes, read in pieces."""
    digest = hashlib.sha256()
    for chunk in _chunks(Path(path), limit, what):
        digest.update(chunk)
    return digest.hexdigest()


def decode_text(data: bytes, *, file: str, what: str = "a text file") -> str:
    """UTF-8 text of ``data`` (a leading byte-order mark dropped); ModelError naming the
    first bad byte otherwise. NUL bytes are refused too (a binary file)."""
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise ModelError(
            f"byte {error.start} is not UTF-8 text; expected {what} saved as UTF-8", file=file
        ) from None
    nul = text.find("\x00")
    if nul >= 0:
        raise ModelError(
            f"character {nul} is a NUL byte (a binary file?); expected {what}", file=file
        )
    return text


def read_limited_text(path: Path | str, limit: int, *, what: str = "a text file") -> str:
    """UTF-8 text of a regular file of at most ``limit`` bytes (see
    :func:`read_limited_bytes` and :func:`decode_text`)."""
    return decode_text(read_limited_bytes(path, limit, what=what), file=str(path), what=what)


def check_text_size(text: str, limit: int, *, file: str, what: str = "a text file") -> None:
    """Refuse text (an upload, an editor's content) longer than ``limit`` bytes in UTF-8."""
    size = len(text.encode("utf-8", errors="replace"))
    if size > limit:
        raise ModelError(
            f"the text is {size:,} bytes, larger than the limit of {limit:,} bytes; "
            f"expected {what}",
            file=file,
        )


def _line_of(text: str, position: int) -> int:
    return text.count("\n", 0, position) + 1


def check_nesting(text: str, *, file: str, kind: str = "toml", limit: int = MAX_NESTING) -> None:
    """Refuse text whose brackets/braces nest deeper than ``limit``.

    Strings and (for TOML) comments are skipped, so brackets inside them do not count.
    Only the depth is checked; unbalanced brackets are left to the parser's message.

    Raises
    ------
    ModelError
        Naming the file and the line where the limit is passed.
    """
    tokens = _TOML_TOKENS if kind == "toml" else _JSON_TOKENS
    depth = 0
    for match in tokens.finditer(text):
        token = match.group()
        if token in "[{":
            depth += 1
            if depth > limit:
                raise ModelError(
                    Problem(
                        "",
                        f"brackets are nested more than {limit} levels deep; expected a "
                        f"{kind.upper()} file with at most {limit} levels",
                        line=_line_of(text, match.start()),
                    ),
                    file=file,
                )
        elif token in "]}":
            depth = max(0, depth - 1)


def check_data_depth(data: object, *, file: str, limit: int = MAX_NESTING) -> None:
    """Refuse parsed data (dicts and lists) nested deeper than ``limit`` (dotted keys
    such as ``a.b.c...`` nest without brackets). Walks without recursion."""
    stack: list[tuple[object, int, str]] = [(data, 0, "")]
    while stack:
        value, depth, where = stack.pop()
        if depth > limit:
            raise ModelError(
                Problem(
                    where[:200],
                    f"tables are nested more than {limit} levels deep; expected at most {limit}",
                ),
                file=file,
            )
        if isinstance(value, Mapping):
            for key, item in value.items():
                if isinstance(item, Mapping | list):
                    stack.append((item, depth + 1, f"{where}.{key}" if where else str(key)))
        elif isinstance(value, list):
            for i, item in enumerate(value):
                if isinstance(item, Mapping | list):
                    stack.append((item, depth + 1, f"{where}[{i}]"))
