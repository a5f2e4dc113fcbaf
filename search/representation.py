"""A time–frequency representation as the scorecard sees it: windows in, energy images out.

The scorecard (``search.scorecard``) judges any representation the same way — a filterbank, the
best plain spectrogram, the spectrogram a user runs today (``search.compare``) or the raw
envelope — so each is wrapped as a :class:`Representation`: a function from windows to images
plus the grid the images are sampled on.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

ROWS = ("sharpness", "onset", "detection")


@dataclass(frozen=True)
class Representation:
    """One representation of burst windows.

    Attributes
    ----------
    name : str
        Its key in the scorecard (``result``, ``spectrogram``, ``yours``, ``envelope``).
    images : callable
        ``images(windows) -> (M, C, T)`` float64 energy densities of ``windows`` (M, N) float64
        (real samples at the corpus rate); T time steps of ``time_step_s`` each.
    time_step_s : float
        Seconds between image columns.
    cell_size : ndarray, shape (C, 1)
        Area of each image cell, s·Hz (time step × the row's frequency extent).
    first_time_s : float
        Time of column 0, s from the window's first sample.
    rows : tuple of str
        The scorecard rows this representation takes part in (a subset of ``ROWS``); the raw
        envelope has one channel and no frequency axis, so it has no sharpness.
    description : dict
        What it is, for the record (JSON-ready): kind, window, hop, FFT points, ...
    """

    name: str
    images: Callable[[np.ndarray], np.ndarray]
    time_step_s: float
    cell_size: np.ndarray
    first_time_s: float = 0.0
    rows: tuple = ROWS
    description: dict = field(default_factory=dict)
