"""Autosave of the working model text, so an edit survives a page reload or a restart.

Drafts are plain model-file text kept in a local working folder
(``$CAREDECIDE_HOME/drafts``, default ``~/.caredecide/drafts``), one draft per source
model (the bundled file, an uploaded file name or a template), each with a small JSON
record of where it came from and when it was saved. Writes are atomic (write a
temporary file, then rename) so a crash never leaves half a draft. This module has no
Streamlit import: it is plain file handling, tested on its own.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import tempfile
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from caredecide.guarded import read_limited_bytes
from caredecide.limits import MAX_DRAFT_BYTES

_SAFE = re.compile(r"[^A-Za-z0-9_-]+")


@dataclass(frozen=True)
class Draft:
    """An autosaved working model.

    Attributes
    ----------
    source : str
        Where the working model came from (a file path, ``upload:<name>`` or
        ``template:<name>``); drafts are kept one per source.
    text : str
        The model-file text as last edited (possibly invalid: edits are never dropped).
    saved_at : str
        ISO 8601 time of the save, UTC.
    path : pathlib.Path
        The draft's text file.
    """

    source: str
    text: str
    saved_at: str
    path: Path


def drafts_folder() -> Path:
    """The working folder for drafts: ``$CAREDECIDE_HOME/drafts`` or ``~/.caredecide/drafts``."""
    home = os.environ.get("CAREDECIDE_HOME")
    base = Path(home).expanduser() if home else Path.home() / ".caredecide"
    return base / "drafts"


def slot_name(source: str) -> str:
    """File stem of the draft for ``source``: a readable part plus a short hash (unique)."""
    readable = _SAFE.sub("_", Path(source.split(":", 1)[-1]).stem)[:40] or "model"
    digest = hashlib.sha256(source.encode("utf-8")).hexdigest()[:10]
    return f"{readable}-{digest}"


def _atomic_write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def save_draft(source: str, text: str, folder: Path | None = None) -> Draft:
    """Autosave ``text`` as the draft of ``source`` (replaces the previous draft).

    Raises
    ------
    ValueError
        If ``text`` is larger than :data:`MAX_DRAFT_BYTES` once encoded.
    """
    folder = drafts_folder() if folder is None else folder
    size = len(text.encode("utf-8"))
    if size > MAX_DRAFT_BYTES:
        raise ValueError(
            f"draft of {source!r} is {size} bytes; expected at most {MAX_DRAFT_BYTES} bytes"
        )
    stem = slot_name(source)
    saved_at = datetime.now(UTC).isoformat(timespec="seconds")
    path = folder / f"{stem}.toml"
    _atomic_write(path, text)
    _atomic_write(folder / f"{stem}.json", json.dumps({"source": source, "saved_at": saved_at}))
    return Draft(source=source, text=text, saved_at=saved_at, path=path)


def _read(stem: str, folder: Path) -> Draft | None:
    path = folder / f"{stem}.toml"
    meta_path = folder / f"{stem}.json"
    try:
        # Bytes decoded as they are, so "\r" stays as written; a draft is never larger
        # than we write, and never anything but a regular file.
        text = read_limited_bytes(path, MAX_DRAFT_BYTES).decode("utf-8")
        meta = json.loads(read_limited_bytes(meta_path, MAX_DRAFT_BYTES).decode("utf-8"))
    except (OSError, ValueError, RecursionError):  # missing, unreadable or corrupt: no draft
        return None
    if not isinstance(meta, dict) or not isinstance(meta.get("source"), str):
        return None
    return Draft(
        source=meta["source"], text=text, saved_at=str(meta.get("saved_at", "")), path=path
    )


def load_draft(source: str, folder: Path | None = None) -> Draft | None:
    """The autosaved draft of ``source``, or None when there is none (or it is unreadable)."""
    folder = drafts_folder() if folder is None else folder
    return _read(slot_name(source), folder)


def list_drafts(folder: Path | None = None) -> list[Draft]:
    """Every readable draft in the working folder, newest first."""
    folder = drafts_folder() if folder is None else folder
    if not folder.is_dir():
        return []
    drafts = [d for p in folder.glob("*.toml") if (d := _read(p.stem, folder)) is not None]
    return sorted(drafts, key=lambda d: d.saved_at, reverse=True)


def discard_draft(source: str, folder: Path | None = None) -> None:
    """Delete the draft of ``source`` (no error when there is none)."""
    folder = drafts_folder() if folder is None else folder
    stem = slot_name(source)
    for suffix in (".toml", ".json"):
        (folder / f"{stem}{suffix}").unlink(missing_ok=True)
