"""Chart files laid out by a second process while the command computes.

The chart renderer (vl-convert) holds the interpreter lock and needs about 0.3 s to start
its JavaScript engine, so threads cannot overlap it with other work. When a core is idle
(:func:`caredecide.chunks.idle_cores`), :class:`ChartRenderer` starts this file as a
plain script at the beginning of a command, once per idle core (at most
:data:`PROCESSES`); each starts its engine while the command imports, compiles and
solves. Each chart then goes to it as its Vega-Lite specification in JSON (data only:
nothing is pickled) and comes back as SVG text, which the command rasterises into the
PNG (no engine needed, and the command has usually finished its own work by then) while
the process lays out the next chart; the command writes the files itself (in its staging
folder). The command lays out itself every chart when no core is idle, and any chart a
second process fails on: the bytes are the same either way (:func:`layout_svg` and
:func:`rasterise` are the one layout).

A chart can also go as a :class:`ChartJob`: the name of one of the chart functions in
:data:`CHART_MAKERS` and its tables (plain JSON columns, their dtypes kept), so that the
second process, which imports the chart functions while the command computes, builds the
chart itself and the command never imports Altair. The function is looked up in that
fixed table only; a table whose columns cannot go as JSON is built by the command.

The renderer numbers the gradients of an SVG (``gradient_0`` ...) over everything its
engine has laid out, so a chart's bytes depend on the charts laid out before it in the
same engine. Hence the fixed split: the first chart alone in one process (the scatter of
the draws, no numbered element), the others in their order in the other, as a fresh
command lays them out serially.
"""

from __future__ import annotations

import importlib
import json
import subprocess
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

PNG_SCALE = 2
"""Pixel density of the PNG files (twice the SVG's size)."""

CHART_MAKERS: dict[str, tuple[str, str]] = {
    "draws_plane": ("caredecide.decision_charts", "make_draws_plane_chart"),
    "policy_acceptability": ("caredecide.charts", "make_policy_acceptability_chart"),
    "acceptability_curves": ("caredecide.charts", "make_acceptability_curves_chart"),
    "psa_convergence": ("caredecide.charts", "make_psa_convergence_chart"),
    "evppi": ("caredecide.charts", "make_evppi_chart"),
}
"""The chart functions a :class:`ChartJob` may name: name -> (module, function)."""

_COLUMN_KINDS = "fiubO"
"""dtype kinds a table column may have to go as JSON (float, integer, bool, object)."""


@dataclass(frozen=True)
class ChartJob:
    """One chart file to build: ``CHART_MAKERS[maker](**tables, **options)`` saved as
    ``stem``.

    Attributes
    ----------
    stem : str
        File stem (``stem.svg`` and ``stem.png``).
    maker : str
        A key of :data:`CHART_MAKERS`.
    tables : dict of str to DataFrame or None
        The chart function's table arguments, by parameter name.
    options : dict
        Its other keyword arguments (JSON values: str, numbers, None, lists of them).
    """

    stem: str
    maker: str
    tables: dict[str, Any] = field(default_factory=dict)
    options: dict[str, Any] = field(default_factory=dict)


def build_chart(job: ChartJob) -> Any:
    """The Altair chart a job names (the function looked up in :data:`CHART_MAKERS`)."""
    if job.maker not in CHART_MAKERS:
        raise ValueError(f"unknown chart {job.maker!r}; expected one of {sorted(CHART_MAKERS)}")
    module, function = CHART_MAKERS[job.maker]
    make = getattr(importlib.import_module(module), function)
    return make(**job.tables, **job.options)


def table_payload(frame: Any) -> dict[str, Any]:
    """A table as plain JSON: its columns' names, dtypes and values, in order.

    Floats go through ``json`` as their shortest repr (read back bit for bit; NaN too).
    Raises ``TypeError`` for a table that cannot go so (an index other than 0..n-1, a
    column name that is not text, a column of another dtype kind than
    :data:`_COLUMN_KINDS`).
    """
    import pandas as pd

    if not frame.index.equals(pd.RangeIndex(len(frame))):
        raise TypeError("the table's index is not 0..n-1")
    columns = list(frame.columns)
    if not all(isinstance(name, str) for name in columns) or len(set(columns)) < len(columns):
        raise TypeError("the table's column names are not distinct text")
    dtypes = [str(dtype) for dtype in frame.dtypes]
    if any(dtype.kind not in _COLUMN_KINDS for dtype in frame.dtypes):
        raise TypeError(f"a column's dtype cannot go as JSON: {dtypes}")
    return {"columns": columns, "dtypes": dtypes, "values": [frame[c].tolist() for c in columns]}


def table_from_payload(payload: dict[str, Any]) -> Any:
    """The table :func:`table_payload` describes."""
    import pandas as pd

    columns, dtypes, values = payload["columns"], payload["dtypes"], payload["values"]
    series = {
        name: pd.Series(column, dtype=dtype)
        for name, dtype, column in zip(columns, dtypes, values, strict=True)
    }
    return pd.DataFrame(series, columns=columns)


def job_payload(job: ChartJob) -> dict[str, Any]:
    """A job as plain JSON (``TypeError`` when one of its tables cannot go so)."""
    return {
        "stem": job.stem,
        "maker": job.maker,
        "tables": {
            name: None if frame is None else table_payload(frame)
            for name, frame in job.tables.items()
        },
        "options": job.options,
    }


def job_from_payload(payload: dict[str, Any]) -> ChartJob:
    """The job :func:`job_payload` describes."""
    tables = {
        name: None if table is None else table_from_payload(table)
        for name, table in payload["tables"].items()
    }
    return ChartJob(payload["stem"], payload["maker"], tables, dict(payload["options"]))


_WARM_UP = {
    "data": {"values": [{"x": 1}]},
    "mark": "point",
    "encoding": {"x": {"field": "x", "type": "quantitative"}},
}


def chart_spec(chart: Any) -> tuple[dict[str, Any], str]:
    """The Vega-Lite specification of an Altair chart, as Altair's own ``save`` builds it
    (all data inline, no row limit), and the Vega-Lite version to lay it out with."""
    import altair as alt
    from altair.utils._importers import vl_version_for_vl_convert

    with alt.data_transformers.enable("default"), alt.data_transformers.disable_max_rows():
        spec = chart.to_dict(context={"pre_transform": False})
    return spec, vl_version_for_vl_convert()


def render_chart(spec: dict[str, Any], vl_version: str) -> tuple[str, bytes]:
    """(SVG text, PNG bytes) of one specification: laid out once, the PNG being the SVG
    rasterised at :data:`PNG_SCALE` (the same renderer Altair's PNG export ends in)."""
    svg = layout_svg(spec, vl_version)
    return svg, rasterise(svg)


def layout_svg(spec: dict[str, Any], vl_version: str) -> str:
    """The SVG text of one specification (the renderer's JavaScript engine lays it out)."""
    import vl_convert

    return vl_convert.vegalite_to_svg(
        spec, vl_version=vl_version, format_locale=None, time_format_locale=None
    )


def rasterise(svg: str) -> bytes:
    """The PNG bytes of an SVG at :data:`PNG_SCALE` (no JavaScript engine needed)."""
    import vl_convert

    return vl_convert.svg_to_png(svg, scale=PNG_SCALE)


def write_chart(svg: str, png: bytes, out: Path, stem: str) -> list[Path]:
    """Write ``stem.svg`` (UTF-8) and ``stem.png`` in ``out``; returns both paths."""
    paths = [out / f"{stem}.svg", out / f"{stem}.png"]
    with paths[0].open("w", encoding="utf-8") as file:
        file.write(svg)
    paths[1].write_bytes(png)
    return paths


def _read_exactly(stream: IO[bytes], size: int) -> bytes:
    data = stream.read(size)
    if len(data) != size:
        raise EOFError("the chart process stopped")
    return data


def _svg_of(request: dict[str, Any]) -> str:
    """The SVG of one request: a Vega-Lite ``spec`` or a chart ``job`` payload."""
    if "job" in request:
        return layout_svg(*chart_spec(build_chart(job_from_payload(request["job"]))))
    return layout_svg(request["spec"], request["vl_version"])


def _lay_out(request: dict[str, Any]) -> tuple[str, bytes]:
    """(SVG, PNG) of one request, laid out in this process."""
    svg = _svg_of(request)
    return svg, rasterise(svg)


def _serve(source: IO[bytes], sink: IO[bytes]) -> None:
    """The second process: one JSON line per chart in, a JSON header line then the SVG
    bytes (and the PNG's when the request asks ``png``) out (an ``error`` header when the
    chart fails)."""
    import vl_convert

    vl_convert.vegalite_to_svg(_WARM_UP)  # starts the engine before the first chart arrives
    for module in sorted({module for module, _ in CHART_MAKERS.values()}):
        try:  # imported while the command computes (a failure shows on the first job)
            importlib.import_module(module)
        except Exception:
            continue
    for line in source:
        try:
            request = json.loads(line)
            svg = _svg_of(request)
            text = svg.encode("utf-8")
            png = rasterise(svg) if request.get("png") else b""
            sink.write(json.dumps({"svg": len(text), "png": len(png)}).encode() + b"\n")
            sink.write(text + png)
        except Exception as error:  # reported to the command, which lays the chart out
            sink.write(json.dumps({"error": str(error)[:500]}).encode() + b"\n")
        sink.flush()


PROCESSES = 2
"""Second processes at most, one per idle core (two lanes: the command balances its charts
between them; with one process, both lanes go to it in the order submitted)."""


class ChartRenderer:
    """Lays out the charts of one command, in second processes when cores are idle.

    Use: ``ChartRenderer(enabled)`` at the start of the command (the idle-core check and
    the process starts run on a thread), :meth:`submit` once the charts are built,
    :meth:`results` when everything else is written, :meth:`close` on every exit path.
    The command lays out itself whatever the second processes could not.
    """

    def __init__(self, enabled: bool = True) -> None:
        self._processes: list[subprocess.Popen[bytes]] = []
        self._lock = threading.Condition()  # guards _left and _done; notified on arrival
        self._left: list[tuple[str, dict[str, Any]]] = []
        self._done: dict[str, tuple[str, bytes | None]] = {}  # None: PNG not yet made
        self._order: list[str] = []
        self._calls = 0
        self._feeders: list[threading.Thread] = []
        self._last_feeder: dict[int, threading.Thread] = {}
        self._starter: threading.Thread | None = None
        self.laid_out_here = 0
        """Charts this process laid out itself (none when the second processes did all)."""
        if enabled:
            self._starter = threading.Thread(target=self._start, daemon=True)
            self._starter.start()

    def _start(self) -> None:
        from caredecide.chunks import idle_cores

        # Watched while this process works on (unlike chunks.usable_threads, which sleeps
        # meanwhile): what is idle is beside it. One process per idle core, at most
        # PROCESSES: one without a core of its own would only slow the command (none idle:
        # the command lays out itself).
        for _ in range(max(0, min(PROCESSES, round(idle_cores())))):
            try:  # -P: the script's folder stays off the import path
                process = subprocess.Popen(
                    [sys.executable, "-P", str(Path(__file__).resolve())],
                    stdin=subprocess.PIPE,
                    stdout=subprocess.PIPE,
                    stderr=subprocess.DEVNULL,
                )
            except OSError:
                break
            self._processes.append(process)

    @property
    def processes(self) -> int:
        """Second processes started (0: the command lays every chart out itself)."""
        if self._starter is not None:
            self._starter.join()
        return len(self._processes)

    def submit(
        self,
        charts: dict[str, Any] | list[ChartJob],
        lane: int | None = None,
        png_there: bool = False,
    ) -> None:
        """Queue charts to be laid out in this order: Altair charts by file stem, or
        :class:`ChartJob` s (built by the second process, or here if none).

        ``lane`` picks the second process (modulo their number); the charts of one lane
        are laid out one call after the other. Without ``lane``, the first call's charts
        go to one process (give it the longest layout, as soon as it can be built) and
        every later call's to the other. The second process returns the SVG and this one
        rasterises the PNG once it calls :meth:`results` (its own work done), unless
        ``png_there`` (a chart that arrives while this process is still busy: the scatter
        of the draws).
        """
        if isinstance(charts, dict):
            items = [(stem, self._spec_request(chart)) for stem, chart in charts.items()]
        else:
            items = [(job.stem, self._job_request(job)) for job in charts]
        if png_there:
            items = [(stem, {**request, "png": True}) for stem, request in items]
        repeated = [stem for stem, _ in items if stem in self._order]
        if repeated or len({stem for stem, _ in items}) < len(items):
            raise ValueError(f"chart files submitted twice: {repeated or [s for s, _ in items]}")
        self._order += [stem for stem, _ in items]
        if not self.processes:
            self._left += items
            return
        if lane is None:
            lane = min(self._calls, 1)
        self._calls += 1
        index = lane % len(self._processes)
        before = self._last_feeder.get(index)
        feeder = threading.Thread(
            target=self._feed, args=(self._processes[index], items, before), daemon=True
        )
        feeder.start()
        self._feeders.append(feeder)
        self._last_feeder[index] = feeder

    @staticmethod
    def _spec_request(chart: Any) -> dict[str, Any]:
        spec, vl_version = chart_spec(chart)
        return {"spec": spec, "vl_version": vl_version}

    def _job_request(self, job: ChartJob) -> dict[str, Any]:
        if job.maker not in CHART_MAKERS:
            raise ValueError(f"unknown chart {job.maker!r}; expected one of {sorted(CHART_MAKERS)}")
        try:
            return {"job": job_payload(job)}
        except TypeError:  # a table that cannot go as JSON: the chart is built here
            return self._spec_request(build_chart(job))

    def _feed(
        self,
        process: subprocess.Popen[bytes],
        items: list[tuple[str, dict[str, Any]]],
        before: threading.Thread | None,
    ) -> None:
        assert process.stdin is not None and process.stdout is not None
        if before is not None:  # the same process: its charts one call after the other
            before.join()
        for number, (stem, request) in enumerate(items):
            try:
                process.stdin.write(json.dumps(request).encode("utf-8") + b"\n")
                process.stdin.flush()
                header = json.loads(process.stdout.readline() or b"{}")
                svg = _read_exactly(process.stdout, int(header["svg"])).decode("utf-8")
                png = _read_exactly(process.stdout, int(header["png"]))
            except (OSError, ValueError, KeyError, EOFError):
                with self._lock:  # laid out by the command instead
                    self._left += items[number:]
                return
            with self._lock:  # without png: rasterised by results() (no engine needed)
                self._done[stem] = (svg, png if request.get("png") else None)
                self._lock.notify_all()

    def results(self, out: Path) -> list[Path]:
        """Wait for the second processes, lay out here what they could not, and write
        every chart's SVG and PNG into ``out`` in the order submitted; returns the paths."""
        # This process is free now: it rasterises each SVG as it arrives while the second
        # processes lay out the next charts.
        while True:
            with self._lock:
                waiting = [stem for stem, (_, png) in self._done.items() if png is None]
                if not waiting:
                    if not any(feeder.is_alive() for feeder in self._feeders):
                        break
                    self._lock.wait(timeout=0.05)
                    continue
            for stem in waiting:
                svg = self._done[stem][0]
                png = rasterise(svg)
                with self._lock:
                    self._done[stem] = (svg, png)
        for feeder in self._feeders:
            feeder.join()
        self._feeders = []
        self._last_feeder = {}
        left = sorted(self._left, key=lambda item: self._order.index(item[0]))
        self._left = []
        for stem, request in left:
            self._done[stem] = _lay_out(request)
            self.laid_out_here += 1
        paths = []
        for stem in self._order:
            text, image = self._done[stem]
            assert image is not None
            paths += write_chart(text, image, out, stem)
        return paths

    def close(self) -> None:
        """Stop the second processes (if any) at once: every chart they returned is kept,
        and waiting for their engines to shut down would only delay the command."""
        if self._starter is not None:
            self._starter.join()
        processes, self._processes = self._processes, []
        for process in processes:
            for stream in (process.stdin, process.stdout):
                try:
                    if stream is not None:
                        stream.close()
                except OSError:
                    pass
            process.kill()
            process.wait()


if __name__ == "__main__":
    _serve(sys.stdin.buffer, sys.stdout.buffer)
