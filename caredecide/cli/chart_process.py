"""Chart files laid out by a second process while the command computes.

The chart renderer (vl-convert) holds the interpreter lock and needs about 0.3 s to start
its JavaScript engine, so threads cannot overlap it with other work. When a core is idle
(:func:`caredecide.chunks.idle_cores`), :class:`ChartRenderer` starts this file as a
plain script (standard library and ``vl_convert`` only), twice, at the beginning of a
command; each starts its engine while the command imports, compiles and solves. Each chart then goes
to it as its Vega-Lite specification in JSON (data only: nothing is pickled), and comes
back as the SVG text and PNG bytes; the command writes the files itself (in its staging
folder). The command lays out itself every chart when no core is idle, and any chart a
second process fails on: the bytes are the same either way
(:func:`render_chart` is the one layout).

The renderer numbers the gradients of an SVG (``gradient_0`` ...) over everything its
engine has laid out, so a chart's bytes depend on the charts laid out before it in the
same engine. Hence the fixed split: the first chart alone in one process (the scatter of
the draws, no numbered element), the others in their order in the other, as a fresh
command lays them out serially.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from pathlib import Path
from typing import IO, Any

PNG_SCALE = 2
"""Pixel density of the PNG files (twice the SVG's size)."""

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
    import vl_convert

    svg = vl_convert.vegalite_to_svg(
        spec, vl_version=vl_version, format_locale=None, time_format_locale=None
    )
    return svg, vl_convert.svg_to_png(svg, scale=PNG_SCALE)


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


def _serve(source: IO[bytes], sink: IO[bytes]) -> None:
    """The second process: one JSON line per chart in, a JSON header line then the SVG and
    PNG bytes out (an ``error`` header when the chart fails)."""
    import vl_convert

    vl_convert.vegalite_to_svg(_WARM_UP)  # starts the engine before the first chart arrives
    for line in source:
        try:
            request = json.loads(line)
            svg, png = render_chart(request["spec"], request["vl_version"])
            text = svg.encode("utf-8")
            sink.write(json.dumps({"svg": len(text), "png": len(png)}).encode() + b"\n")
            sink.write(text + png)
        except Exception as error:  # reported to the command, which lays the chart out
            sink.write(json.dumps({"error": str(error)[:500]}).encode() + b"\n")
        sink.flush()


PROCESSES = 2
"""Second processes at most: the longest layout (the scatter of the draws) in one, the
other charts in the other, while the command itself waits."""


class ChartRenderer:
    """Lays out the charts of one command, in second processes when cores are idle.

    Use: ``ChartRenderer(enabled)`` at the start of the command (the idle-core check and
    the process starts run on a thread), :meth:`submit` once the charts are built,
    :meth:`results` when everything else is written, :meth:`close` on every exit path.
    The command lays out itself whatever the second processes could not.
    """

    def __init__(self, enabled: bool = True) -> None:
        self._processes: list[subprocess.Popen[bytes]] = []
        self._lock = threading.Lock()
        self._left: list[tuple[str, dict[str, Any], str]] = []
        self._done: dict[str, tuple[str, bytes]] = {}
        self._order: list[str] = []
        self._calls = 0
        self._feeders: list[threading.Thread] = []
        self._starter: threading.Thread | None = None
        self.laid_out_here = 0
        """Charts this process laid out itself (none when the second processes did all)."""
        if enabled:
            self._starter = threading.Thread(target=self._start, daemon=True)
            self._starter.start()

    def _start(self) -> None:
        from caredecide.chunks import idle_cores

        # Watched while this process works on (unlike chunks.usable_threads, which sleeps
        # meanwhile): what is idle is beside it.
        if round(idle_cores()) < 1:  # no idle core beside this process: lay out here
            return
        env = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1"}
        for _ in range(PROCESSES):
            try:  # -P: the script's folder stays off the import path
                process = subprocess.Popen(
                    [sys.executable, "-P", str(Path(__file__).resolve())],
                    stdin=subprocess.PIPE,
                    stdout=subprocess.PIPE,
                    stderr=subprocess.DEVNULL,
                    env=env,
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

    def submit(self, charts: dict[str, Any]) -> None:
        """Queue Altair charts by file stem, to be laid out in this order. With two
        second processes, the first call's charts go to one (give it the longest layout,
        as soon as it can be built) and every later call's to the other."""
        items = [(stem, *chart_spec(chart)) for stem, chart in charts.items()]
        self._order += list(charts)
        if not self.processes:
            self._left += items
            return
        process = self._processes[min(self._calls, len(self._processes) - 1)]
        self._calls += 1
        before = self._feeders[-1] if self._feeders and len(self._processes) == 1 else None
        feeder = threading.Thread(target=self._feed, args=(process, items, before), daemon=True)
        feeder.start()
        self._feeders.append(feeder)

    def _feed(
        self, process: subprocess.Popen[bytes], items: list[Any], before: threading.Thread | None
    ) -> None:
        assert process.stdin is not None and process.stdout is not None
        if before is not None:  # one process: its charts one call after the other
            before.join()
        for number, item in enumerate(items):
            stem, spec, vl_version = item
            try:
                request = {"spec": spec, "vl_version": vl_version}
                process.stdin.write(json.dumps(request).encode("utf-8") + b"\n")
                process.stdin.flush()
                header = json.loads(process.stdout.readline() or b"{}")
                svg = _read_exactly(process.stdout, int(header["svg"])).decode("utf-8")
                png = _read_exactly(process.stdout, int(header["png"]))
            except (OSError, ValueError, KeyError, EOFError):
                with self._lock:  # laid out by the command instead
                    self._left += items[number:]
                return
            with self._lock:
                self._done[stem] = (svg, png)

    def results(self, out: Path) -> list[Path]:
        """Wait for the second processes, lay out here what they could not, and write
        every chart's SVG and PNG into ``out`` in the order submitted; returns the paths."""
        for feeder in self._feeders:
            feeder.join()
        self._feeders = []
        left = sorted(self._left, key=lambda item: self._order.index(item[0]))
        self._left = []
        for stem, spec, vl_version in left:
            self._done[stem] = render_chart(spec, vl_version)
            self.laid_out_here += 1
        return [path for stem in self._order for path in write_chart(*self._done[stem], out, stem)]

    def close(self) -> None:
        """Stop the second processes (if any)."""
        if self._starter is not None:
            self._starter.join()
        processes, self._processes = self._processes, []
        for process in processes:
            try:
                if process.stdin is not None:
                    process.stdin.close()
                process.wait(timeout=5)
            except (OSError, subprocess.TimeoutExpired):
                process.kill()
                process.wait()


if __name__ == "__main__":
    _serve(sys.stdin.buffer, sys.stdout.buffer)
