"""The one look of every plot of the workbench: dark axes and labels on white, a light grid,
no pyqtgraph context menu."""

from __future__ import annotations

import pyqtgraph as pg

__all__ = ["style_plot"]

_FOREGROUND = (40, 40, 40)


def style_plot(plot: pg.PlotItem, *, si_prefix: bool = False) -> None:
    """Give ``plot`` the workbench's axes, grid and menu settings.

    Parameters
    ----------
    plot : pyqtgraph.PlotItem
    si_prefix : bool, optional
        Keep pyqtgraph's automatic SI prefix on the axes ("(x0.001)"). Off by default: weights
        and scores are plain numbers, and a short plot clips the longer axis title.
    """
    fg = pg.mkColor(*_FOREGROUND)
    plot.showGrid(x=True, y=True, alpha=0.25)
    for ax in ("left", "bottom"):
        axis = plot.getAxis(ax)
        axis.setTextPen(fg)
        axis.setPen(fg)
        if not si_prefix:
            axis.enableAutoSIPrefix(False)
    plot.setMenuEnabled(False)
