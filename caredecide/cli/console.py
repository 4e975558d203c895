"""Helpers shared by the sub-commands: consoles, the caution line, error display."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape

from caredecide.cautions import caution_short
from caredecide.errors import CaredecideError

QuietOption = Annotated[
    bool, typer.Option("--quiet", help="No progress on stderr (the caution stays).")
]
"""The ``--quiet`` option of the analysis commands (progress only; the caution stays)."""

stdout = Console(soft_wrap=True, highlight=False)
stderr = Console(stderr=True, soft_wrap=True, highlight=False)


def plain(text: object) -> str:
    """``text`` escaped so rich prints it literally (labels, sources and messages may
    contain square brackets)."""
    return escape(str(text))


class OutputError(CaredecideError):
    """The results cannot be written where the user asked (``--out``)."""


def _unwritable(out: Path, error: OSError) -> OutputError:
    return OutputError(
        f"--out {out}: cannot write the results ({error.strerror or error}); "
        "expected a folder that can be created and written"
    )


def prepare_output_folder(out: Path) -> None:
    """Create the ``--out`` folder, or raise an OutputError naming the option."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is a file; expected a folder for the results")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise _unwritable(out, error) from None


@contextmanager
def writing_to(out: Path) -> Iterator[Path]:
    """A staging folder beside ``out`` for one output set (:mod:`caredecide.outputs`):
    the files move into ``out`` only when the whole block succeeded, and the staging
    folder is removed on every exit path. Any failure to write becomes an OutputError."""
    from caredecide.outputs import staged_folder

    prepare_output_folder(out)
    try:
        with staged_folder(out) as folder:
            yield folder
    except OSError as error:
        raise _unwritable(out, error) from None


def save_chart(chart, out: Path, stem: str) -> list[Path]:
    """Save an Altair chart as ``stem.svg`` and ``stem.png`` (twice the pixel density).

    The chart is laid out once: the PNG is the SVG rasterised (``vl_convert.svg_to_png``,
    the same renderer Altair's own PNG export ends in; the bytes are the same), so the
    Vega layout is not run a second time (:mod:`caredecide.cli.chart_process`).
    """
    from caredecide.cli.chart_process import chart_spec, render_chart, write_chart

    return write_chart(*render_chart(*chart_spec(chart)), out, stem)


def print_caution(model: object = None) -> None:
    """Print the research-use caution on stderr; every command does, whatever ``--quiet``
    says (``--quiet`` drops progress and notes only)."""
    stderr.print(f"[bold yellow]{plain(caution_short(model))}[/]")


@contextmanager
def user_errors() -> Iterator[None]:
    """Turn caredecide's own errors into a clear message on stderr and exit code 2."""
    try:
        yield
    except CaredecideError as error:
        # Messages quote table paths such as [transitions.wait.stage_1]: print them as
        # text, never as rich markup (which would swallow the brackets).
        stderr.print(f"[bold red]error:[/] {plain(error)}")
        raise typer.Exit(code=2) from None
    except FileNotFoundError as error:
        stderr.print(f"[bold red]error:[/] file not found: {plain(error.filename)}")
        raise typer.Exit(code=2) from None
    except IsADirectoryError as error:
        stderr.print(f"[bold red]error:[/] {plain(error.filename)} is a folder; expected a file")
        raise typer.Exit(code=2) from None
    except PermissionError as error:
        stderr.print(
            f"[bold red]error:[/] {plain(error.filename)} cannot be read: permission denied"
        )
        raise typer.Exit(code=2) from None
    except OSError as error:  # a disk full or failing while outputs are written
        place = plain(error.filename) if error.filename else "the output files"
        stderr.print(
            f"[bold red]error:[/] {place}: {plain(error.strerror or error)}; nothing was "
            "written (expected a folder that can be written)"
        )
        raise typer.Exit(code=2) from None


def progress(description: str, total: int, quiet: bool = False):
    """A rich progress bar on stderr, hidden when ``quiet`` or stderr is not a terminal."""
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(
        TextColumn(description),
        BarColumn(),
        TextColumn("{task.completed}/{task.total}"),
        TimeRemainingColumn(),
        console=stderr,
        disable=quiet or not sys.stderr.isatty(),
    )
