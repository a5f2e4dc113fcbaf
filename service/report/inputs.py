"""Reading the report's inputs: the filterbank's channels, its criterion, counts and windows.

Checks what the report draws on and raises ``ValueError`` naming the bad value; what else a
document may lack becomes a note on the page (figures, sections), never an error. The
diagnostics arrive typed (``search.diagnostics_doc.Diagnostics``), their gaps already filled.
"""
from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from burstlens.search.diagnostics_doc import Diagnostics, WindowCounts
from burstlens.search.documents import FilterbankDocument

CHANNEL_FIELDS = ("center_hz", "time_spread_s", "cell_area", "chirp_hz_per_s")


def channel_rows(filterbank_json: Mapping) -> list[dict]:
    """The filterbank's channels as dicts, checked to carry the four fields the report draws."""
    channels = filterbank_json.get("channels") if isinstance(filterbank_json, Mapping) else None
    if not isinstance(channels, list) or not channels:
        raise ValueError("filterbank_json['channels']: expected a non-empty list of channels")
    for index, channel in enumerate(channels):
        for field in CHANNEL_FIELDS:
            value = channel.get(field) if isinstance(channel, Mapping) else None
            if not isinstance(value, (int, float)) or not math.isfinite(value):
                raise ValueError(f"filterbank_json['channels'][{index}]['{field}']: expected a "
                                 f"finite number, got {value!r}")
    return channels


def channel_column(channels: list[dict], field: str) -> np.ndarray:
    """One field of every channel as a (C,) float array, in channel order."""
    return np.array([float(c[field]) for c in channels])


def criterion_of(filterbank_json: Mapping, diagnostics: Diagnostics) -> dict:
    """The criterion as a dict with at least ``name``: the filterbank's, else the run settings',
    else Rényi."""
    criterion = filterbank_json.get("criterion")
    if criterion is None:
        criterion = diagnostics.settings.criterion
    if isinstance(criterion, str):
        return {"name": criterion}
    return dict(criterion) if isinstance(criterion, Mapping) else {"name": "renyi"}


def check_windows(filterbank_json: Mapping, windows, sampling_rate_hz) -> None:
    """Windows must be (M, N) with M ≥ 1, at the filterbank's sampling rate when one is given."""
    if windows is None:
        return
    shape = np.shape(windows)
    if len(shape) != 2 or shape[0] == 0 or shape[1] == 0:
        raise ValueError(f"windows: expected a (M, N) array of windows, got shape {shape}")
    fs = FilterbankDocument(filterbank_json).sampling_rate_hz
    if sampling_rate_hz is not None and fs is not None \
            and not math.isclose(float(sampling_rate_hz), fs, rel_tol=1e-9):
        raise ValueError(f"sampling_rate_hz: the windows are at {float(sampling_rate_hz):g} Hz but "
                         f"the filterbank at {fs:g} Hz")


def window_counts(windows: WindowCounts) -> dict:
    """``used`` / ``rejected`` (and any other scalar the file records) as counts, in the
    file's order; lists count their items."""
    return {k: len(v) if isinstance(v, list) else v for k, v in windows.to_json().items()
            if k != "rejected_by_reason" and not isinstance(v, Mapping)}
