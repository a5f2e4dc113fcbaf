"""Preprocessing: detrend, taper, band-pass, resampling, rate choice (search/corpus/preprocess.py)."""
import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import CorpusError, read_corpus
from burstlens.search.corpus import preprocess as pp
from burstlens.search.corpus import stream


def _tone_fit(x, fs, f0):
    """Least-squares amplitude and the frequency of the periodogram peak refined by a sine fit."""
    t = np.arange(x.size) / fs
    best = None
    for f in np.linspace(f0 * 0.998, f0 * 1.002, 801):
        basis = np.column_stack((np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)))
        coef = np.linalg.lstsq(basis, x, rcond=None)[0]
        r = np.sum((x - basis @ coef) ** 2)
        if best is None or r < best[0]:
            best = (r, f, np.hypot(*coef))
    return best[1], best[2]


@pytest.mark.parametrize("native,target", [(250.0, 200.0), (250.0, 500.0), (4000.0, 3000.0), (44100.0, 4000.0)])
def test_resampling_keeps_tone_frequency_and_amplitude(native, target):
    """Polyphase resampling (scipy.signal.resample_poly, the reference library) keeps an in-band
    tone's frequency (to 0.01 %) and amplitude (to 0.5 %) away from the trace ends (common practice)."""
    f0, amp = 0.137 * min(native, target), 3.0
    n = int(4 * native)
    x = amp * np.sin(2 * np.pi * f0 * np.arange(n) / native + 0.3)
    up, down = pp.resampling_factors(native, target)
    assert native * up / down == pytest.approx(target)
    seg = stream.SegmentInfo(stream.TraceInfo(0, "XX.A.00.HHZ", native, None, "f", n, [(0, "f")]), 0, n, 0)
    layout = stream.Layout.of(seg, target)
    y, whole = stream.process_piece(x, layout, 0, None)  # one piece: the whole segment, ends tapered (5 %)
    y = y[whole]
    assert y.size == pytest.approx(n * target / native, abs=1)
    core = y[y.size // 8: -y.size // 8]
    f_est, a_est = _tone_fit(core, target, f0)
    assert f_est == pytest.approx(f0, rel=1e-4)
    assert a_est == pytest.approx(amp, rel=5e-3)


def test_demean_detrend_equals_least_squares_line():
    """demean_detrend leaves the residual of the least-squares line (numpy.polyfit, reference)."""
    rng = np.random.default_rng(0)
    n = np.arange(5001)
    x = 3.0 + 0.01 * n + rng.standard_normal(n.size)
    expected = x - np.polyval(np.polyfit(n, x, 1), n)
    np.testing.assert_allclose(pp.demean_detrend(x.copy()), expected, atol=1e-9)


def test_cosine_taper_ramps_ends_only():
    """The Hann half-cosine taper starts at 0, is monotone over m samples and leaves the middle
    unchanged (definition of a cosine taper; common practice)."""
    x = pp.cosine_taper(np.ones(1000), 50)
    assert x[0] == 0.0 and x[-1] == 0.0
    assert np.all(np.diff(x[:50]) > 0)
    np.testing.assert_array_equal(x[50:950], 1.0)
    assert pp.taper_length(100000, 4000.0) == 4000  # capped at 1 s
    assert pp.taper_length(1000, 4000.0) == 50      # 5 % of a short segment


def test_zero_phase_bandpass_passes_band_and_rejects_outside():
    """A zero-phase Butterworth band-pass (scipy.signal.butter + sosfiltfilt, reference library)
    passes an in-band tone with no phase shift and attenuates out-of-band tones by > 40 dB."""
    fs = 4000.0
    t = np.arange(int(4 * fs)) / fs
    inband = np.sin(2 * np.pi * 500 * t)
    sos = pp.bandpass_sos((200.0, 1200.0), fs)
    y = pp.zero_phase(sos, inband + np.sin(2 * np.pi * 50 * t) + np.sin(2 * np.pi * 1900 * t))
    core = slice(2000, -2000)
    np.testing.assert_allclose(y[core], inband[core], atol=0.02)
    low = pp.zero_phase(sos, np.sin(2 * np.pi * 50 * t))[core]
    assert np.max(np.abs(low)) < 0.01


def test_bandpass_outside_nyquist_is_an_error_naming_the_option():
    """A band that does not fit below Nyquist is refused, naming bandpass_hz and the Nyquist rate."""
    with pytest.raises(CorpusError, match=r"bandpass_hz=.*Nyquist 2000 Hz"):
        pp.bandpass_sos((100.0, 2500.0), 4000.0)


def test_rate_choice_and_polyphase_factors():
    """The common rate is the most common native rate (ties: the highest); rates equal to 1e-5 need
    no resampling; a ratio needing factors above 1000 is refused (definitions in preprocess)."""
    assert pp.choose_rate([4000.0, 4000.0, 2000.0], None) == (4000.0, "most common native rate")
    assert pp.choose_rate([2000.0, 4000.0], None)[0] == 4000.0
    assert pp.choose_rate([2000.0], 500.0) == (500.0, "requested")
    assert pp.resampling_factors(4000.0, 4000.01) == (1, 1)
    assert pp.resampling_factors(4000.0, 2000.0) == (1, 2)
    assert pp.resampling_factors(44100.0, 4000.0) == (40, 441)
    with pytest.raises(ValueError, match="polyphase"):
        pp.resampling_factors(4000.0, 3999.3)


def _mseed(path, fs, station, seconds=12.0, channel="HHZ", seed=0):
    rng = np.random.default_rng(seed)
    n = int(seconds * fs)
    x = rng.standard_normal(n) * 10
    k = np.arange(int(0.1 * fs))
    for onset in (0.3, 0.55, 0.8):
        i = int(onset * n)
        x[i: i + k.size] += 800 * np.sin(2 * np.pi * fs / 8 * k / fs) * np.exp(-k / (0.02 * fs))
    tr = Trace(np.rint(x).astype(np.int32), header={"network": "XX", "station": station, "location": "00",
                                                    "channel": channel, "sampling_rate": fs,
                                                    "starttime": UTCDateTime(2026, 1, 1)})
    Stream([tr]).write(str(path), format="MSEED", encoding="STEIM2")
    return path


def test_mixed_rates_resampled_to_most_common(tmp_path):
    """Files at 4000, 4000 and 2000 Hz are read at the most common rate, 4000 Hz, and the defaults
    say so (docs/design.md §6)."""
    for k, (name, fs) in enumerate((("a", 4000.0), ("b", 4000.0), ("c", 2000.0))):
        _mseed(tmp_path / f"{name}.mseed", fs, name.upper(), seed=k)
    corpus = read_corpus(tmp_path)
    assert corpus.sampling_rate_hz == 4000.0
    assert corpus.defaults["sampling_rate_source"] == "most common native rate"
    assert corpus.defaults["native_rates_hz"] == [2000.0, 4000.0]
    assert {m["trace_id"] for m in corpus.window_meta} == {"XX.A.00.HHZ", "XX.B.00.HHZ", "XX.C.00.HHZ"}


def test_irreconcilable_rates_are_an_error_naming_the_file(tmp_path):
    """A 500 Hz file among 4 kHz files would need ×8 upsampling: a CorpusError naming that file and
    suggesting sampling_rate_hz; asking for 500 Hz explicitly downsamples all (docs/design.md §6)."""
    _mseed(tmp_path / "fast1.mseed", 4000.0, "F1")
    _mseed(tmp_path / "fast2.mseed", 4000.0, "F2", seed=1)
    slow = _mseed(tmp_path / "slow.mseed", 500.0, "S1")
    with pytest.raises(CorpusError, match=rf"{slow}.*cannot be reconciled.*×8.*sampling_rate_hz"):
        read_corpus(tmp_path)
    corpus = read_corpus(tmp_path, sampling_rate_hz=500.0)
    assert corpus.sampling_rate_hz == 500.0


def test_component_selection_by_orientation_code(tmp_path):
    """components='Z' keeps only channels whose last letter is Z (SEED channel naming); asking for an
    absent code is an error listing the codes found."""
    for k, ch in enumerate(("GPZ", "GPN", "GPE")):
        _mseed(tmp_path / f"{ch}.mseed", 4000.0, "Q1", channel=ch, seed=k)
    corpus = read_corpus(tmp_path, components="Z")
    assert {m["trace_id"] for m in corpus.window_meta} == {"XX.Q1.00.GPZ"}
    with pytest.raises(CorpusError, match=r"components='1'.*codes found: E, N, Z"):
        read_corpus(tmp_path, components="1")


def test_a_corpus_reads_to_the_same_bits_whatever_the_thread_count(tmp_path):
    """A job worker reads the corpus with other BLAS thread settings than the API or a Dask
    worker; the windows must come out bit for bit the same, so the fit is the same wherever it
    runs (docs/design.md §5 determinism; common practice). The detrend still removes the least-squares
    line: the residual is orthogonal to 1 and n (normal equations)."""
    from threadpoolctl import threadpool_limits

    from burstlens.search.corpus.preprocess import demean_detrend

    rng = np.random.default_rng(0)
    fs, n = 1000.0, 12000
    t = np.arange(n) / fs
    x = 0.05 * rng.standard_normal(n)
    for k in range(6):
        t0 = (k + 0.5) * 2.0 + rng.uniform(-0.1, 0.1)
        x += np.exp(-0.5 * ((t - t0) / 0.02) ** 2) * np.cos(2 * np.pi * rng.uniform(80, 250) * (t - t0))
    np.savez(tmp_path / "trace.npz", data=x, sampling_rate_hz=np.float64(fs))
    a = read_corpus([tmp_path], window_s=0.256).windows
    with threadpool_limits(1):
        b = read_corpus([tmp_path], window_s=0.256).windows
    assert np.array_equal(a, b)
    y = demean_detrend(x.copy())
    m = np.arange(n) - (n - 1) / 2
    assert abs(y.sum()) < 1e-9 * np.abs(y).sum() and abs((y * m).sum()) < 1e-9 * np.abs(y * m).sum()
