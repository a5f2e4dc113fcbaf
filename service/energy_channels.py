"""Which channels the bursts fill: what the CLI prints about channels.

``tune``, ``submit`` and ``make demo`` all end with the filterbank JSON and burst windows at hand
(tune has its corpus; submit and the demo read a small sample of their own files again), so the
choice is made from the filterbank's image of those windows, not from the channel order: the
lowest channels of a wide band often hold almost nothing of a burst.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np

LISTED = 6  # at most this many are printed, strongest first
SAMPLE_WINDOWS = 32  # windows submit and the demo read back to weigh the channels
EDGE = 0.1  # share of the window left out at each end


def _offsets(corpus) -> list:
    """Per-window trigger offsets (s) of a corpus-like object, or Nones."""
    meta = getattr(corpus, "window_meta", None) or []
    return [m.get("trigger_offset_s") if isinstance(m, Mapping) else None for m in meta]


def burst_contrast(filterbank_json: Mapping, windows, trigger_offset_s=None) -> np.ndarray:
    """(C,) how far the bursts rise above each channel's background: the mean over windows of
    (burst level − background) / background, burst level and background as mean image |S|.

    ``windows`` (M, N) at the filterbank's rate; ``trigger_offset_s`` (M,) seconds from each
    window's start to its trigger onset, or None. Where the trigger is known the background is
    the channel's level before it and the burst level its level after it (the noise window
    before a pick, as STA/LTA compares: common practice); elsewhere the background is the
    channel's median over the window and the burst level its upper tenth. A ratio, not an
    energy: a loud steady tone (hum, fans) has a large level but rises by a small share of it,
    so it ranks low, while the band the bursts fill ranks high. The outer tenths of the window
    are left out (a cut-off tone rings there)."""
    from burstlens.search import Filterbank, transform  # heavy: only when a summary is asked for

    windows = np.asarray(windows, dtype=float)
    if windows.ndim != 2 or windows.shape[0] == 0:
        raise ValueError(f"windows: expected a (M, N) array of windows, got shape {windows.shape}")
    fs = float(filterbank_json["sampling_rate_hz"])
    image = np.abs(transform(windows, Filterbank.from_json(filterbank_json))).astype(float)
    n = image.shape[2]
    edge = int(EDGE * n)
    offsets = list(trigger_offset_s) if trigger_offset_s is not None else [None] * len(image)
    contrast = np.empty(image.shape[:2])
    tiny = np.finfo(float).tiny
    for i, (rows, onset) in enumerate(zip(image, offsets, strict=True)):
        start = None if onset is None else int(round(float(onset) * fs))
        if start is not None and 2 * edge <= start < n - 2 * edge:
            background = rows[:, edge:start].mean(axis=1)
            burst = rows[:, start:n - edge].mean(axis=1)
        else:
            inner = rows[:, edge:n - edge]
            background = np.median(inner, axis=1)
            burst = np.quantile(inner, 0.9, axis=1)
        contrast[i] = (burst - background) / np.maximum(background, tiny)
    return contrast.mean(axis=0)


def main_channels(filterbank_json: Mapping, windows, trigger_offset_s=None
                  ) -> list[tuple[int, float]]:
    """The ``LISTED`` channels where the bursts rise most above the background, as
    (index, contrast), highest first (``burst_contrast``)."""
    contrast = burst_contrast(filterbank_json, windows, trigger_offset_s)
    order = np.argsort(contrast, kind="stable")[::-1]
    return [(int(c), float(contrast[c])) for c in order[:LISTED]]


def summary_lines(filterbank_json: Mapping, windows, trigger_offset_s=None) -> list[str]:
    """A heading line and one line per channel: centre, contrast in dB, familiar reading."""
    picked = main_channels(filterbank_json, windows, trigger_offset_s)
    against = "before the trigger" if trigger_offset_s is not None else "the window's median"
    lines = [f"channels where the bursts stand out most (burst level over the level {against}, "
             f"{len(windows)} windows):"]
    for index, rise in picked:
        channel = filterbank_json["channels"][index]
        reading = (channel.get("equivalent") or {}).get("text", "")
        level = 10 * np.log10(1.0 + max(rise, 0.0))
        lines.append(f"  ch {index:>3}  {channel['center_hz']:8.1f} Hz  +{level:4.1f} dB  {reading}")
    return lines


def sample_windows(paths, filterbank_json: Mapping):
    """A corpus of up to ``SAMPLE_WINDOWS`` burst windows read from ``paths`` at the filterbank's
    rate and window length (the corpus reader's own defaults otherwise); None when they cannot
    be read."""
    from burstlens.search.corpus import CorpusError, read_corpus

    fs = float(filterbank_json["sampling_rate_hz"])
    try:
        corpus = read_corpus([str(p) for p in paths], max_windows=SAMPLE_WINDOWS, seed=0,
                             sampling_rate_hz=fs,
                             window_s=int(filterbank_json["window_samples"]) / fs)
    except (CorpusError, OSError, ValueError):
        return None
    return corpus


def lines_or_note(filterbank_json: Mapping, corpus) -> list[str]:
    """``summary_lines`` for a corpus (``windows`` and ``window_meta``, as ``read_corpus``
    returns), or one line saying why there is none (no windows could be read)."""
    if corpus is None:
        return ["channels where the bursts stand out: not weighed (the files could not be read "
                "back here); see the channel table of report.html"]
    try:
        offsets = _offsets(corpus)
        known = offsets and all(o is not None for o in offsets)
        return summary_lines(filterbank_json, corpus.windows, offsets if known else None)
    except ValueError as exc:
        return [f"channels where the bursts stand out: not weighed ({exc})"]
