"""Figures of kinkfit.

Every ``plot_*`` function returns a :class:`matplotlib.figure.Figure`, accepts
an optional ``fig``, never calls ``show``; matplotlib is imported lazily inside
the functions (the Agg canvas is used, no pyplot state).  ``save_*`` helpers
read a file, draw and write a PNG, returning its path.
"""

from __future__ import annotations

from .channels import plot_channel_montage, save_channel_montage

__all__ = ["plot_channel_montage", "save_channel_montage"]
