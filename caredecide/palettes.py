"""Colours with one meaning each: one palette per kind of meaning, never shared.

* :data:`ACTION_PALETTE` - actions, in the model's action order: an action keeps its
  colour on every chart (policy map, two-way map, policy regions, switch points);
* :data:`STATE_PALETTE` - health states (cohort trace, values per state);
* :data:`LOW_HIGH_PALETTE` - the low and the high end of an estimate's range (tornado
  diagrams), and ramps over an estimate's value from low to high;
* :data:`SERIES_PALETTE` - strategies and other named series (CE plane, acceptability
  curves, convergence lines), always with a second channel (shape or dash) as well.

No colour appears in two palettes (tests/test_palettes.py), so a colour read on one
chart never means something else on another. Our own choice of hues, with lightness
steps inside each palette so that neighbours stay apart in greyscale print.
"""

from __future__ import annotations

from collections.abc import Sequence

ACTION_PALETTE: tuple[str, ...] = (
    "#1D5A8C",  # deep blue
    "#EBA83A",  # amber
    "#5FB3A1",  # teal
    "#7A3B63",  # plum
    "#9BB8D9",  # light blue
    "#F4D58D",  # light amber
)
"""Actions, in the model's action order."""

STATE_PALETTE: tuple[str, ...] = (
    "#D9EBC0",  # pale green
    "#7BA640",  # green
    "#3B5E1F",  # dark green
    "#E8DDB5",  # sand
    "#B89B4A",  # ochre
    "#6B5424",  # brown
    "#F6D6C8",  # peach
    "#D98C6A",  # terracotta
    "#C9C9C9",  # light grey
    "#7A7A7A",  # grey
)
"""Health states, in the model's state order (light/mid/dark steps)."""

LOW_HIGH_PALETTE: tuple[str, str] = ("#F1A7B5", "#A3223F")
"""The low end (pale rose) and the high end (crimson) of an estimate's range."""

SERIES_PALETTE: tuple[str, ...] = ("#111111", "#4F6D7A", "#8E8E3A", "#9C6ADE", "#C46A9A")
"""Strategies and other named series (black, slate, olive, violet, orchid)."""

DARK_FILLS = frozenset({"#1D5A8C", "#7A3B63"})
"""Action fills on which text is written in white."""


def cycle(palette: Sequence[str], n: int) -> list[str]:
    """``n`` colours from ``palette``, repeated when there are more items than colours."""
    return [palette[i % len(palette)] for i in range(n)]


def action_colours(labels: Sequence[str]) -> dict[str, str]:
    """Colour of each action label, by its position in the model's action order.

    Pass every action of the model (not only those a chart shows) so that an action has
    the same colour on every chart.
    """
    return dict(zip(labels, cycle(ACTION_PALETTE, len(labels)), strict=True))
