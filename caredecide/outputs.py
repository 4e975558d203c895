"""Output sets written whole or not at all.

Every set of output files (a ``--out`` folder, a report with its tables, a re-run) is
written to a staging folder beside its target and moved into place only when every file
was written. The staging folder is removed on every exit path, success, error or
interruption, so a failed run leaves neither partial results nor temporary folders.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

STAGING_PREFIX = ".caredecide-staging-"
"""Name prefix of staging folders (beside the target, so a move never crosses devices)."""


@contextmanager
def staged_folder(target: Path | str) -> Iterator[Path]:
    """A staging folder whose content replaces the same names in ``target`` on success.

    Parameters
    ----------
    target : path
        The output folder; created when missing. Files already in it that the run does
        not write are left alone.

    Yields
    ------
    pathlib.Path
        The staging folder: write every output there.

    Raises
    ------
    OSError
        When the staging folder cannot be made or the files cannot be moved; nothing is
        moved then, unless the move itself fails part-way (one rename per entry).
    """
    target = Path(target).absolute()
    target.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=target.parent))
    try:
        yield staging
        if not target.exists():
            os.replace(staging, target)  # the whole set at once
            return
        if not target.is_dir():
            raise NotADirectoryError(20, "is a file; expected a folder", str(target))
        for entry in sorted(staging.iterdir()):
            destination = target / entry.name
            if destination.is_dir() and not destination.is_symlink():
                shutil.rmtree(destination)
            os.replace(entry, destination)
    finally:
        shutil.rmtree(staging, ignore_errors=True)


@contextmanager
def staged_file(target: Path | str) -> Iterator[Path]:
    """A staging path for one file beside ``target``, moved onto it only when the block
    succeeds (removed otherwise)."""
    target = Path(target).absolute()
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, name = tempfile.mkstemp(prefix=STAGING_PREFIX, dir=target.parent)
    os.close(handle)
    path = Path(name)
    try:
        yield path
        os.replace(path, target)
    finally:
        path.unlink(missing_ok=True)
