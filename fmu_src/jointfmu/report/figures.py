"""Figures for the pages: Matplotlib's object-oriented API on the Agg canvas, so drawing a page
touches no global pyplot state (a script or notebook that uses pyplot keeps its own backend)."""
from __future__ import annotations

__all__ = ["new_figure", "DPI"]

#: Resolution of every PNG on the pages [dots per inch].
DPI = 100


def new_figure(figsize, nrows: int = 1, ncols: int = 1, *, layout=None, **subplots_kw):
    """A figure of ``figsize`` (width, height) [in] at :data:`DPI`, and its axes.

    ``layout`` is Matplotlib's (``"constrained"`` or None); ``subplots_kw`` go to
    ``Figure.subplots`` (``squeeze``, ``sharex``...).  Returns (Figure, axes).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, dpi=DPI, layout=layout)
    FigureCanvasAgg(fig)
    return fig, fig.subplots(nrows, ncols, **subplots_kw)
