"""Which channels the bursts fill: what the CLI prints about channels.

``tune``, ``submit`` and ``make demo`` all end with the filterbank JSON and burst windows at hand
(tune has its corpus; submit and the demo read a small sample of their own files again), so the
choice is made from the filterbank's image of those windows, not from the channel order: the
lowest channels of a wide band often hold almost nothing of a burst.

The image is formed ``CHUNK_WINDOWS`` windows at a time and reduced to one contrast per window
and channel before the next chunk, so memory holds a (CHUNK_WINDOWS, C, N) image and the
(M, C) contrasts, never the (M, C, N) image of the whole corpus.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from burstlens.search.filterbank import Filterbank

LISTED = 6  # at most this many are printed, strongest first
SAMPLE_WINDOWS = 32  # windows submit and the demo read back to weigh the channels
EDGE = 0.1  # share of the window left out at each end
# Windows transformed at once: the float64 image held is CHUNK_WINDOWS × C × N × 8 bytes
# (25 MB for C = 96, N = 2048) whatever the number of windows.
CHUNK_WINDOWS = 16


def _filterbank(filterbank) -> Filterbank:
    """``filterbank`` itself if a :class:`Filterbank`, else read as filterbank JSON
    (``Filterbank.from_json``, which names the faulty field)."""
    return filterbank if isinstance(filterbank, Filterbank) else Filterbank.from_json(filterbank)


def _offsets(corpus) -> list:
    """Per-window trigger offsets (s) of a corpus-like object, or Nones."""
    meta = getattr(corpus, "window_meta", None) or []
    return [m.get("trigger_offset_s") if isinstance(m, Mapping) else None for m in meta]


def _window_contrast(rows: np.ndarray, onset_sample: int | None) -> np.ndarray:
    """(C,) (burst level − background) / background of one window's image ``rows`` (C, N) |S|.

    ``onset_sample``: the trigger onset's sample index, or None. The outer ``EDGE`` of the
    window is left out at each end; with an onset at least twice that far from both ends the
    background is the mean level before it and the burst level the mean after it, otherwise
    the median and the 0.9 quantile (``numpy.quantile``, linear interpolation) over the rest."""
    n = rows.shape[1]
    edge = int(EDGE * n)
    if onset_sample is not None and 2 * edge <= onset_sample < n - 2 * edge:
        background = rows[:, edge:onset_sample].mean(axis=1)
        burst = rows[:, onset_sample:n - edge].mean(axis=1)
    else:
        inner = rows[:, edge:n - edge]
        background = np.median(inner, axis=1)
        burst = np.quantile(inner, 0.9, axis=1)
    return (burst - background) / np.maximum(background, np.finfo(float).tiny)


def burst_contrast(filterbank, windows, trigger_offset_s=None) -> np.ndarray:
    """(C,) how far the bursts rise above each channel's background: the mean over windows of
    (burst level − background) / background, burst level and background as mean image |S|.

    ``filterbank``: filterbank JSON (``Filterbank.to_json``) or a :class:`Filterbank`.
    ``windows`` (M, N) at the filterbank's rate; ``trigger_offset_s`` (M,) seconds from each
    window's start to its trigger onset, or None. Where the trigger is known the background is
    the channel's level before it and the burst level its level after it (the noise window
    before a pick, as STA/LTA compares: common practice); elsewhere the background is the
    channel's median over the window and the burst level its upper tenth. A ratio, not an
    energy: a loud steady tone (hum, fans) has a large level but rises by a small share of it,
    so it ranks low, while the band the bursts fill ranks high. The outer tenths of the window
    are left out (a cut-off tone rings there). Each window's contrast needs only its own
    image, so the image is formed ``CHUNK_WINDOWS`` windows at a time; memory holds one
    chunk's (CHUNK_WINDOWS, C, N) float64 image and the (M, C) contrasts."""
    # scipy.fft and scipy.sparse take about a second to load: only when a summary is asked for
    # (submit imports this module before it checks its arguments)
    from burstlens.search.tfd import transform

    bank = _filterbank(filterbank)
    windows = np.asarray(windows, dtype=float)
    if windows.ndim != 2 or windows.shape[0] == 0:
        raise ValueError(f"windows: expected a (M, N) array of windows, got shape {windows.shape}")
    n_windows = windows.shape[0]
    offsets = list(trigger_offset_s) if trigger_offset_s is not None else [None] * n_windows
    if len(offsets) != n_windows:
        raise ValueError(f"trigger_offset_s: {len(offsets)} offsets for {n_windows} windows")
    fs = bank.sampling_rate_hz
    starts = [None if onset is None else int(round(float(onset) * fs)) for onset in offsets]
    contrast = np.empty((n_windows, len(bank)))
    for first in range(0, n_windows, CHUNK_WINDOWS):
        # |S| is exact in float64 from transform's float32 rows
        image = np.abs(transform(windows[first:first + CHUNK_WINDOWS], bank), dtype=np.float64)
        for index, rows in enumerate(image, first):
            contrast[index] = _window_contrast(rows, starts[index])
    return contrast.mean(axis=0)


def main_channels(filterbank, windows, trigger_offset_s=None) -> list[tuple[int, float]]:
    """The ``LISTED`` channels where the bursts rise most above the background, as
    (index, contrast), highest first (``burst_contrast``)."""
    contrast = burst_contrast(filterbank, windows, trigger_offset_s)
    order = np.argsort(contrast, kind="stable")[::-1]
    return [(int(c), float(contrast[c])) for c in order[:LISTED]]


def summary_lines(filterbank, windows, trigger_offset_s=None) -> list[str]:
    """A heading line and one line per channel: centre, contrast in dB, familiar reading.
    ``filterbank``: filterbank JSON or a :class:`Filterbank`."""
    bank = _filterbank(filterbank)
    picked = main_channels(bank, windows, trigger_offset_s)
    against = "before the trigger" if trigger_offset_s is not None else "the window's median"
    lines = [f"channels where the bursts stand out most (burst level over the level {against}, "
             f"{len(windows)} windows):"]
    for index, rise in picked:
        channel = bank[index]
        level = 10 * np.log10(1.0 + max(rise, 0.0))
        lines.append(f"  ch {index:>3}  {channel.center_hz:8.1f} Hz  +{level:4.1f} dB  "
                     f"{channel.equivalent()['text']}")
    return lines


def sample_windows(paths, filterbank):
    """A corpus of up to ``SAMPLE_WINDOWS`` burst windows read from ``paths`` at the filterbank's
    rate and window length (the corpus reader's own defaults otherwise); None when they cannot
    be read. ``filterbank``: filterbank JSON or a :class:`Filterbank`; either must carry
    ``window_samples`` (``Filterbank.to_json`` keeps it among the provenance)."""
    # ObsPy and scipy.signal take seconds to load: only when windows are read back
    from burstlens.search.corpus import CorpusError, read_corpus

    facts = filterbank.to_json() if isinstance(filterbank, Filterbank) else filterbank
    if "window_samples" not in facts:
        raise ValueError("window_samples: the filterbank does not record its window length")
    fs = float(facts["sampling_rate_hz"])
    try:
        corpus = read_corpus([str(p) for p in paths], max_windows=SAMPLE_WINDOWS, seed=0,
                             sampling_rate_hz=fs, window_s=int(facts["window_samples"]) / fs)
    except (CorpusError, OSError, ValueError):
        return None
    return corpus


def lines_or_note(filterbank, corpus) -> list[str]:
    """``summary_lines`` for a corpus (``windows`` and ``window_meta``, as ``read_corpus``
    returns), or one line saying why there is none (no windows could be read).
    ``filterbank``: filterbank JSON or a :class:`Filterbank`."""
    if corpus is None:
        return ["channels where the bursts stand out: not weighed (the files could not be read "
                "back here); see the channel table of report.html"]
    try:
        offsets = _offsets(corpus)
        known = offsets and all(o is not None for o in offsets)
        return summary_lines(filterbank, corpus.windows, offsets if known else None)
    except ValueError as exc:
        return [f"channels where the bursts stand out: not weighed ({exc})"]
