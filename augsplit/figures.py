"""Figures for reports without pyplot: a `matplotlib.figure.Figure` on its own Agg canvas.

pyplot keeps global state (the current figure, the backend, the open-figure registry), and
switching the backend would take a notebook user's away. A Figure with a FigureCanvasAgg
draws and saves the same pixels and leaves every global alone; it is freed like any object.
"""

from __future__ import annotations

import base64
import io


def figure(**kwargs):
    """A new Figure (Figure's keyword arguments, e.g. figsize) with an Agg canvas attached."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(**kwargs)
    FigureCanvasAgg(fig)
    return fig


def subplots(nrows: int = 1, ncols: int = 1, *, figsize=None, **kwargs):
    """(figure, axes) as pyplot.subplots returns them, without pyplot."""
    fig = figure(figsize=figsize)
    return fig, fig.subplots(nrows, ncols, **kwargs)


def png(fig, **kwargs) -> bytes:
    """The figure as PNG bytes (savefig's keyword arguments, e.g. dpi, bbox_inches)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", **kwargs)
    return buf.getvalue()


def img_tag(fig, **kwargs) -> str:
    """An <img> holding the figure as an embedded PNG (`png`), for a self-contained page."""
    return '<img alt="plot" src="data:image/png;base64,' + base64.b64encode(png(fig, **kwargs)).decode("ascii") + '">'
