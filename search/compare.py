"""The spectrogram a user runs today, named in one short string and scored beside the result.

A seismologist asks "is this better than the spectrogram I use now?", so the scorecard takes
their own window as ``compare_to``::

    KIND:LENGTH[:OVERLAP]      e.g.  hann:256   hann:256:192   gaussian:128:96

KIND is ``hann`` or ``gaussian`` (any case); LENGTH the window length in samples at the
corpus's sampling rate (integer ≥ 4); OVERLAP the samples shared by consecutive windows
(integer, 0 ≤ OVERLAP < LENGTH; default LENGTH // 2, i.e. 50 %). Conventions (common practice),
recorded in :meth:`UserSpectrogram.to_json`:

* a Gaussian window of length L has standard deviation L/6 samples (±3σ inside the window);
* the FFT has the next power of two ≥ LENGTH points.

The image is scored like the house spectrogram (``search.spectrogram``): ``|X_z|² / (2‖h‖²)``
with ``X_z`` the two-sided ``scipy.signal.ShortTimeFFT`` of the analytic signal z, on the FFT
bins inside the search band, cell area hop/fs × fs/nfft.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import NoReturn

import numpy as np

from burstlens.search.representation import Representation
from burstlens.search.wvd import analytic_signal

KINDS = ("hann", "gaussian")
SYNTAX = "KIND:LENGTH[:OVERLAP], e.g. 'hann:256' or 'gaussian:128:96'"
MIN_LENGTH = 4
STD_PER_LENGTH = 1.0 / 6.0  # ±3σ inside the window (common practice)
# bound on the complex STFT held at once (bytes); the images are computed a block of windows at
# a time so a fine hop on many windows does not hold nfft × T × M complex values
_STFT_BYTES = 64 * 2**20

_INTEGER = re.compile(r"[+-]?[0-9]+")


def _fields_error(kind: str, length: int, overlap: int) -> str | None:
    """The cause that makes (kind, length, overlap) invalid, or None."""
    if kind not in KINDS:
        return f"unknown window {kind!r}; use hann or gaussian"
    if length < MIN_LENGTH:
        return f"window length must be an integer ≥ {MIN_LENGTH} samples"
    if overlap < 0:
        return "overlap must be an integer ≥ 0 samples"
    if overlap >= length:
        return f"overlap {overlap} must be below the window length {length}"
    return None


def _rate(sampling_rate_hz) -> float:
    fs = float(sampling_rate_hz)
    if not (math.isfinite(fs) and fs > 0):
        raise ValueError(f"sampling_rate_hz={sampling_rate_hz!r} must be a finite rate above 0 Hz")
    return fs


@dataclass(frozen=True)
class UserSpectrogram:
    """A user's spectrogram window: ``kind`` ('hann' or 'gaussian'), ``length`` and
    ``overlap`` in samples at the corpus rate.

    Derived (not passed): ``std_samples`` = length/6 for a Gaussian window (None for Hann),
    ``fft_points`` = the next power of two ≥ length.
    """

    kind: str
    length: int
    overlap: int
    std_samples: float | None = field(init=False)
    fft_points: int = field(init=False)

    def __post_init__(self):
        cause = _fields_error(self.kind, self.length, self.overlap)
        if cause is not None:
            raise ValueError(f"compare_to={self.text!r}: {cause}")
        std = self.length * STD_PER_LENGTH if self.kind == "gaussian" else None
        object.__setattr__(self, "std_samples", std)
        object.__setattr__(self, "fft_points", 1 << (self.length - 1).bit_length())

    @property
    def hop(self) -> int:
        """Samples between consecutive window centres: length − overlap."""
        return self.length - self.overlap

    @property
    def text(self) -> str:
        """Canonical ``KIND:LENGTH:OVERLAP``."""
        return f"{self.kind}:{self.length}:{self.overlap}"

    def window(self) -> np.ndarray:
        """The window h, (length,) float64: ``scipy.signal.windows.hann(L, sym=False)`` (periodic,
        peak at index L//2) or ``gaussian(L, std=L/6, sym=True)`` (peak at (L−1)/2)."""
        from scipy.signal.windows import gaussian, hann

        if self.kind == "hann":
            return hann(self.length, sym=False)
        return gaussian(self.length, std=self.std_samples, sym=True)

    def to_json(self) -> dict:
        """The setting and its derived grid, for the record (JSON-ready)."""
        return {"compare_to": self.text, "kind": self.kind, "window_samples": self.length,
                "overlap_samples": self.overlap, "hop_samples": self.hop,
                "std_samples": self.std_samples, "fft_points": self.fft_points,
                "conventions": "gaussian std = length/6 samples (±3σ inside the window); "
                               "fft_points = next power of two ≥ window_samples"}

    def describe(self, sampling_rate_hz: float) -> str:
        """In words, durations in ms at ``sampling_rate_hz`` (Hz), e.g. "Hann window of 256
        samples (64 ms at 4000 Hz), hop 128 samples, 256-point FFT"."""
        fs = _rate(sampling_rate_hz)
        ms = 1000.0 / fs
        name = "Hann" if self.kind == "hann" else "Gaussian"
        words = f"{name} window of {self.length} samples ({self.length * ms:.4g} ms at {fs:g} Hz)"
        if self.std_samples is not None:
            words += (f", standard deviation {self.std_samples:.4g} samples "
                      f"({self.std_samples * ms:.4g} ms)")
        return words + f", hop {self.hop} samples, {self.fft_points}-point FFT"

    def check(self, window_samples: int, sampling_rate_hz: float) -> None:
        """ValueError when the window is longer than the burst windows (``window_samples``
        samples at ``sampling_rate_hz`` Hz), naming both in samples and seconds."""
        fs = _rate(sampling_rate_hz)
        n = int(window_samples)
        if self.length > n:
            raise ValueError(f"compare_to={self.text!r}: the window of {self.length} samples "
                             f"({self.length / fs:g} s) is longer than the {n}-sample burst "
                             f"windows ({n / fs:g} s)")

    def frames(self, window_samples: int) -> int:
        """Number of image columns T for windows of N samples: column k is the slice centred on
        sample k·hop (ShortTimeFFT's p0 = 0 convention, zeros outside the window),
        k = 0 … ⌈(N − 1)/hop⌉, so the first column is centred on sample 0 and the last on or
        after sample N − 1."""
        return -(-(int(window_samples) - 1) // self.hop) + 1

    def representation(self, sampling_rate_hz: float, band_hz,
                       name: str = "yours") -> Representation:
        """The scorecard's view of this spectrogram.

        ``images(windows (M, N) float64) -> (M, K, T) float64``: ``|X_z[k, p]|² / (2‖h‖²)``, with
        ``X_z`` the two-sided ``scipy.signal.ShortTimeFFT`` (window h, hop = length − overlap,
        mfft = fft_points) of the analytic signal z of each window, columns p as
        :meth:`frames` (column 0 at time 0 s, step hop/fs), rows the FFT bins k·fs/fft_points
        inside ``band_hz`` [lo, hi] Hz. The 2‖h‖² makes it the house normalisation
        (``search.spectrogram``): for a real x, |Z| = 2|X| at positive frequencies, so the image
        is 2|X_x|²/‖h‖². For an even-length Gaussian window (symmetric, peak at (L−1)/2) the
        slice's peak sits half a sample before its nominal centre k·hop.
        Cell size (K, 1): (hop/fs)·(fs/fft_points) s·Hz.
        """
        from scipy.signal import ShortTimeFFT

        fs = _rate(sampling_rate_hz)
        nfft = self.fft_points
        freqs = np.arange(nfft) * fs / nfft
        lo, hi = (float(f) for f in band_hz)
        rows = np.flatnonzero((freqs >= lo) & (freqs <= hi))
        if rows.size == 0:
            raise ValueError(f"compare_to={self.text!r}: band_hz={[lo, hi]!r} holds no FFT bin "
                             f"of a {nfft}-point FFT at {fs:g} Hz (bins {fs / nfft:g} Hz apart)")
        first, last = int(rows[0]), int(rows[-1]) + 1
        h = self.window()
        stft = ShortTimeFFT(h, hop=self.hop, fs=fs, mfft=nfft, fft_mode="twosided")
        norm = 2.0 * float(np.sum(h ** 2))

        def images(windows) -> np.ndarray:
            z = analytic_signal(windows)
            if z.ndim != 2:
                raise ValueError(f"windows: expected shape (M, N), got {z.shape}")
            m, n = z.shape
            self.check(n, fs)
            t = self.frames(n)
            out = np.empty((m, last - first, t), dtype=np.float64)
            block = max(1, _STFT_BYTES // (16 * nfft * t))
            for i in range(0, m, block):
                x = stft.stft(z[i:i + block], p0=0, p1=t, axis=-1)[:, first:last]
                out[i:i + block] = (x.real ** 2 + x.imag ** 2) / norm
            return out

        description = self.to_json() | {
            "summary": self.describe(fs), "bin_hz": fs / nfft,
            "frames": "column k centred on sample k·hop, k = 0..ceil((N-1)/hop)",
            "image": "|STFT of the analytic signal|² / (2·sum(h²)), FFT bins inside band_hz"}
        return Representation(name=name, images=images, time_step_s=self.hop / fs,
                              cell_size=np.full((rows.size, 1), (self.hop / fs) * (fs / nfft)),
                              first_time_s=0.0, description=description)


def parse_compare_to(text) -> UserSpectrogram:
    """Parse ``KIND:LENGTH[:OVERLAP]`` (see the module docstring) into a :class:`UserSpectrogram`.

    Kind is case-insensitive; spaces around the text and its fields are ignored. Errors are
    ValueError naming the text and the cause.
    """
    def fail(cause: str) -> NoReturn:
        raise ValueError(f"compare_to={text!r}: {cause}")

    if not isinstance(text, str):
        fail(f"must be text of the form {SYNTAX}")
    parts = [p.strip() for p in text.strip().split(":")]
    if parts == [""]:
        fail(f"empty; use {SYNTAX}")
    if len(parts) == 1:
        fail(f"missing the window length; use {SYNTAX}")
    if len(parts) > 3:
        fail(f"too many fields ({len(parts)}); use {SYNTAX}")
    kind = parts[0].lower()
    if kind not in KINDS:
        fail(f"unknown window {parts[0]!r}; use hann or gaussian")
    if not _INTEGER.fullmatch(parts[1]):
        fail(f"window length must be an integer ≥ {MIN_LENGTH} samples")
    length = int(parts[1])
    if len(parts) == 3 and not _INTEGER.fullmatch(parts[2]):
        fail("overlap must be an integer ≥ 0 samples")
    overlap = int(parts[2]) if len(parts) == 3 else max(length, 0) // 2
    cause = _fields_error(kind, length, overlap)
    if cause is not None:
        fail(cause)
    return UserSpectrogram(kind, length, overlap)
