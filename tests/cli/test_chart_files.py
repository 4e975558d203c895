"""``caredecide.cli.console.save_chart``: one layout, the SVG and PNG of every chart command."""

from __future__ import annotations

import altair as alt
import pandas as pd

from caredecide.cli.console import save_chart


def test_png_is_the_svg_rasterised_and_equals_altairs_own_export(tmp_path):
    # Altair's PNG export lays the chart out again and rasterises the SVG with the same
    # renderer; save_chart rasterises the SVG it wrote: the bytes must be the same.
    frame = pd.DataFrame({"wtp": [0.0, 10_000.0, 20_000.0], "share": [0.1, 0.5, 0.8]})
    chart = alt.Chart(frame).mark_line(point=True).encode(x="wtp:Q", y="share:Q")
    paths = save_chart(chart, tmp_path, "curve")
    assert [p.name for p in paths] == ["curve.svg", "curve.png"]
    chart.save(str(tmp_path / "own.svg"))
    chart.save(str(tmp_path / "own.png"), scale_factor=2)
    assert paths[0].read_text() == (tmp_path / "own.svg").read_text()
    assert paths[1].read_bytes() == (tmp_path / "own.png").read_bytes()
    assert paths[1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
