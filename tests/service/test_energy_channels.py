"""The channel summary the CLI prints (service.energy_channels): its memory and its statistics."""
import tracemalloc

import numpy as np
import pytest

from burstlens.search import Channel, Filterbank
from burstlens.search.tfd import transform
from burstlens.service import energy_channels

FS, N = 2000.0, 512


def _bank(chirp_hz_per_s=0.0) -> Filterbank:
    centres = np.geomspace(40.0, 800.0, 12)
    return Filterbank([Channel(float(fc), 0.01, 1.0, chirp_hz_per_s) for fc in centres], FS)


def _bursts(m: int, seed: int = 0) -> np.ndarray:
    """(m, N) windows: a 50 Hz hum and a 300 Hz burst moving along the window, plus noise."""
    t = np.arange(N) / FS
    rng = np.random.default_rng(seed)
    k = np.arange(m)[:, None]
    centre = 0.06 + 0.1 * (k % 7) / 7
    return (0.3 * np.sin(2 * np.pi * 50 * t + k)
            + np.exp(-0.5 * ((t - centre) / 0.01) ** 2) * np.cos(2 * np.pi * 300 * t)
            + 0.01 * rng.standard_normal((m, N)))


def _peak_bytes(fb: dict, windows: np.ndarray) -> int:
    tracemalloc.start()
    try:
        energy_channels.burst_contrast(fb, windows)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_peak_memory_does_not_grow_with_the_window_count():
    """Eight times the windows take no more than 1.5× the peak memory: the image is formed and
    reduced a chunk of windows at a time, so only the (M, C) contrasts grow with M, not an
    (M, C, N) image (a bounded-memory streaming reduction: common practice). numpy's
    allocations are traced by tracemalloc; the windows themselves are made before tracing."""
    fb = _bank().to_json(window_samples=N)
    few, many = _bursts(64), _bursts(512)
    assert len(few) >= 4 * energy_channels.CHUNK_WINDOWS  # both sizes span several chunks
    energy_channels.burst_contrast(fb, few[:1])  # the transform's cached plan is built here
    small, large = _peak_bytes(fb, few), _peak_bytes(fb, many)
    assert large < 1.5 * small, (small, large)


@pytest.mark.parametrize("chirp_hz_per_s", [0.0, 800.0])
def test_chunked_contrast_equals_the_whole_stack_statistics(chirp_hz_per_s):
    """For a window count that is no multiple of the chunk, with the trigger known for some
    windows only, the contrast equals the statistics taken over the whole (M, C, N) image at
    once: per window and channel, mean level after over mean level before the onset, or the
    0.9 quantile over the median (numpy.median, numpy.quantile with linear interpolation,
    NumPy reference), both less one, inside the outer tenths; then the mean over windows."""
    m = 2 * energy_channels.CHUNK_WINDOWS + 5
    windows = _bursts(m, seed=3)
    bank = _bank(chirp_hz_per_s)
    onsets = [None if k % 3 else 0.06 + 0.001 * k for k in range(m)]
    image = np.abs(transform(windows, bank)).astype(np.float64)
    edge = int(energy_channels.EDGE * N)
    inner = image[:, :, edge:N - edge]
    expected = np.quantile(inner, 0.9, axis=2) / np.median(inner, axis=2) - 1.0
    for k, onset in enumerate(onsets):
        if onset is not None:
            start = round(onset * FS)
            assert 2 * edge <= start < N - 2 * edge  # far enough from the ends to be used
            expected[k] = (image[k, :, start:N - edge].mean(axis=1)
                           / image[k, :, edge:start].mean(axis=1) - 1.0)
    got = energy_channels.burst_contrast(bank.to_json(window_samples=N), windows, onsets)
    np.testing.assert_allclose(got, expected.mean(axis=0), rtol=1e-9)


def test_a_filterbank_object_reads_as_its_json():
    """The summary takes a Filterbank where it takes filterbank JSON, and prints the same lines
    (the JSON is that filterbank's ``to_json``); the reading names the Gaussian window."""
    bank = _bank()
    fb = bank.to_json(window_samples=N)
    windows = _bursts(20)
    lines = energy_channels.summary_lines(bank, windows)
    assert lines == energy_channels.summary_lines(fb, windows)
    assert len(lines) == 1 + energy_channels.LISTED
    assert "Gaussian spectrogram window" in lines[1]


def test_bad_inputs_name_the_field():
    """Offsets that do not match the windows, and a filterbank without its window length for
    reading windows back, are ValueErrors naming the field."""
    fb = _bank().to_json(window_samples=N)
    with pytest.raises(ValueError, match="trigger_offset_s: 2 offsets for 3 windows"):
        energy_channels.burst_contrast(fb, _bursts(3), [0.1, 0.1])
    with pytest.raises(ValueError, match="window_samples"):
        energy_channels.sample_windows([], _bank())
