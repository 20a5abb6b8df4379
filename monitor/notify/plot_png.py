"""The e-mail's PNG of a ``plot.Plot``, drawn with matplotlib (imported on first use, so a pass
that writes pages only never loads it).

E-mail clients do not show inline SVG reliably, and rasterising text and antialiased lines is
what a drawing library is for, so PNGs stay with matplotlib: the Agg canvas, a ``Figure`` made
directly (no pyplot, so no global figure registry), settings inside ``matplotlib.rc_context``,
the figure cleared once saved. The marks, limits and ticks are the ``Plot``'s, laid out by
``plot.layout`` as in the SVG, so both forms show the same thing; the canvas is ``WIDTH`` ×
``HEIGHT`` pixels at ``PNG_DPI``, and sizes convert from canvas units to points by 72 / dpi.
"""

from __future__ import annotations

import io
from typing import Any

from monitor.notify.plot import (
    AXIS,
    FONT_SIZE,
    HEIGHT,
    INK,
    LEGEND_FONT_SIZE,
    MUTED,
    PAPER,
    WIDTH,
    Band,
    Line,
    Marker,
    Plot,
    Points,
    Ranges,
    Rule,
    Span,
    layout,
)

PNG_DPI = 100
PT = 72 / PNG_DPI  # points per canvas unit
_SHAPES = {"circle": "o", "cross": "X", "diamond": "D", "dash": "_"}
_SETTINGS: dict[str, Any] = {
    "text.parse_math": False,
    "font.size": FONT_SIZE * PT,
    "axes.labelsize": FONT_SIZE * PT,
    "axes.edgecolor": AXIS,
    "axes.labelcolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "legend.frameon": False,
    "legend.fontsize": LEGEND_FONT_SIZE * PT,
    "savefig.facecolor": PAPER,
    "figure.facecolor": PAPER,
}


def _marker(marker: Marker) -> dict[str, Any]:
    # matplotlib's "X" and "D" fill a box smaller than their nominal size; the SVG's sizes are
    # the full width, so the nominal size is scaled to match.
    scale = {"cross": 1.0, "diamond": 1.25}.get(marker.shape, 1.0)
    return {
        "marker": _SHAPES[marker.shape],
        "markersize": marker.size * PT * scale,
        "color": marker.colour,
        "markerfacecolor": PAPER if marker.hollow else marker.colour,
    }


def _draw_marks(axes: Any, plot: Plot) -> None:
    for mark in plot.marks:
        if isinstance(mark, Band):
            axes.fill_between(mark.x, mark.lower, mark.upper, color=mark.colour,
                              alpha=mark.opacity, linewidth=0, label=mark.label)
        elif isinstance(mark, Span):
            axes.axhspan(mark.lower, mark.upper, color=mark.colour, alpha=mark.opacity,
                         linewidth=0, label=mark.label)
        elif isinstance(mark, Rule):
            axes.axhline(mark.y, color=mark.colour, linewidth=mark.width * PT,
                         linestyle="dashed" if mark.dashed else "solid", label=mark.label)
        elif isinstance(mark, Line):
            extra = {} if mark.marker is None else _marker(mark.marker)
            axes.plot(mark.x, mark.y, **{**extra, "color": mark.colour},
                      linewidth=mark.width * PT, linestyle="dashed" if mark.dashed else "solid",
                      label=mark.label)
        elif isinstance(mark, Points):
            axes.plot(mark.x, mark.y, linestyle="none", label=mark.label, **_marker(mark.marker))
        elif isinstance(mark, Ranges):
            axes.vlines(mark.x, mark.lower, mark.upper, color=mark.colour,
                        linewidth=mark.width * PT,
                        linestyles="dashed" if mark.dashed else "solid", label=mark.label)
            if mark.cap > 0:
                for ends in (mark.lower, mark.upper):
                    axes.plot(mark.x, ends, linestyle="none", marker="_", color=mark.colour,
                              markersize=2 * mark.cap * PT)
            if mark.marker is not None and mark.y is not None:
                axes.plot(mark.x, mark.y, linestyle="none", **_marker(mark.marker))


def to_png(plot: Plot) -> bytes:
    """The plot as PNG bytes, ``WIDTH`` × ``HEIGHT`` pixels."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    lay = layout(plot)
    with matplotlib.rc_context(_SETTINGS):  # type: ignore[arg-type]
        figure = Figure(figsize=(WIDTH / PNG_DPI, HEIGHT / PNG_DPI), dpi=PNG_DPI)
        # The SVG's plot area, in figure fractions (matplotlib counts from the bottom).
        figure.subplots_adjust(left=lay.left / WIDTH, right=lay.x.end / WIDTH,
                               bottom=lay.bottom / HEIGHT, top=1 - lay.top / HEIGHT)
        try:
            axes = figure.add_subplot()
            _draw_marks(axes, plot)
            axes.set_xlim(lay.x.low, lay.x.high)
            axes.set_ylim(lay.y.low, lay.y.high)
            axes.set_xticks([v for v, _ in lay.x_ticks], [t for _, t in lay.x_ticks])
            axes.set_yticks([v for v, _ in lay.y_ticks], [t for _, t in lay.y_ticks])
            if plot.x.label:
                axes.set_xlabel(plot.x.label)
            if plot.y.label:
                axes.set_ylabel(plot.y.label)
            if any(getattr(mark, "label", None) for mark in plot.marks):
                axes.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=4,
                            borderaxespad=0.3, handlelength=1.6, columnspacing=1.2)
            buffer = io.BytesIO()
            figure.savefig(buffer, format="png", dpi=PNG_DPI, metadata={"Software": None})
        finally:
            figure.clear()
    return buffer.getvalue()


__all__ = ["PNG_DPI", "to_png"]
