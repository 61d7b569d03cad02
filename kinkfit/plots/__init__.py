"""Figures of kinkfit.

Every ``plot_*`` function returns a :class:`matplotlib.figure.Figure`, accepts
an optional ``fig``, never calls ``show``; matplotlib is imported lazily inside
the functions (the Agg canvas is used, no pyplot state).  ``save_*`` helpers
read a file, draw and write a PNG, returning its path.
"""

from __future__ import annotations

from .channels import plot_channel_montage, save_channel_montage


def __getattr__(name):
    # lazy re-exports: the modules import heavy optional pieces on use
    lazy = {"plot_wake_maps": ".wake", "corner_figure": ".posterior",
            "trace_figure": ".posterior", "displacement_figure": ".posterior",
            "channel_gallery": ".gallery", "deviation_map": ".gallery"}
    if name in lazy:
        import importlib
        return getattr(importlib.import_module(lazy[name], __name__), name)
    raise AttributeError(name)


__all__ = ["plot_channel_montage", "save_channel_montage", "plot_wake_maps",
           "corner_figure", "trace_figure", "displacement_figure",
           "channel_gallery", "deviation_map"]
