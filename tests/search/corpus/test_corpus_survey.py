"""One-pass dominant-frequency survey (search/corpus/survey.py)."""
from decimal import Decimal, getcontext

import numpy as np
import pytest
from scipy.signal import lfilter

from burstlens.search.corpus import survey as sv

FS = 4000.0
NFFT = 256


def dominant_frequency(  # the previous whole-data estimator, kept as the reference
    segments: list[np.ndarray], fs: float, nfft: int = 256) -> tuple[float | None, dict]:
    """Frequency of the transients, Hz: centroid of the loud frames' excess power.

    Frames of ``nfft`` samples (Hann, no overlap) are Fourier transformed; the noise spectrum is the
    median over frames, the transient spectrum the mean of the frames with more than 8 × the median
    frame energy (at most the loudest 5 %), and the dominant frequency the centroid of their
    positive difference, each loud frame normalised to unit excess power. Stationary lines (fans, power-line
    hum) sit in the median and cancel. Returns (None, info) when no frame stands out.
    """
    frames = [x[: (x.size // nfft) * nfft].reshape(-1, nfft) for x in segments if x.size >= nfft]
    if not frames:
        return None, {"frames": 0}
    energies = [np.einsum("ij,ij->i", f, f) for f in frames]
    energy = np.concatenate(energies)
    loud_cut = max(8.0 * np.median(energy), np.quantile(energy, 0.95))
    if not np.any(energy > loud_cut):
        return None, {"frames": int(energy.size)}
    # gather the loud frames, and a spread-out subset for the noise, without copying whole traces
    total = energy.size
    step = max(1, total // 4096)
    loud_frames, quiet_frames, offset = [], [], 0
    for f, e in zip(frames, energies, strict=True):
        loud_frames.append(f[e > loud_cut])
        first = (-offset) % step
        quiet_frames.append(f[first::step])
        offset += f.shape[0]
    win = np.hanning(nfft)
    loud = np.abs(np.fft.rfft(np.concatenate(loud_frames) * win, axis=1)) ** 2
    noise = np.median(np.abs(np.fft.rfft(np.concatenate(quiet_frames) * win, axis=1)) ** 2, axis=0)
    # each loud frame counts once, whatever its energy: normalise its excess to unit sum
    excess = np.clip(loud - noise, 0.0, None)
    totals = excess.sum(axis=1, keepdims=True)
    excess = (excess[totals[:, 0] > 0] / totals[totals[:, 0] > 0]).mean(axis=0) if np.any(totals > 0) else np.zeros(1)
    freqs = np.fft.rfftfreq(nfft, 1.0 / fs)
    if not excess.sum() > 0:
        return None, {"frames": int(total)}
    return float(np.sum(freqs * excess) / excess.sum()), {"frames": int(total), "loud_frames": int(loud.shape[0])}


def _segment(n, seed, carrier=600.0, hum=0.0, burst_amp=200.0):
    """Red-ish noise (AR(1), coefficient 0.9, unit innovations), an optional 50 Hz hum of amplitude
    ``hum``, and decaying sinusoid bursts (decay 30 ms, amplitude ``burst_amp`` × U(0.5, 1.5)) at
    ``carrier`` Hz every 0.5 s (2000 samples), first at sample 1000."""
    rng = np.random.default_rng(seed)
    x = lfilter([1.0], [1.0, -0.9], rng.standard_normal(n))
    x += hum * np.sin(2 * np.pi * 50.0 * np.arange(n) / FS + 0.3)
    t = np.arange(800) / FS
    burst = np.exp(-t / 0.03) * np.sin(2 * np.pi * carrier * t)
    for start in range(1000, n - burst.size, 2000):
        x[start: start + burst.size] += burst_amp * rng.uniform(0.5, 1.5) * burst
    return x


def _pieces(segments, keys, seed, max_frames=40):
    """Frame-aligned pieces (x, stream_key, first_frame) of random lengths 1..max_frames frames; the
    last piece of a segment keeps its partial frame."""
    rng = np.random.default_rng(seed)
    out = []
    for x, key in zip(segments, keys, strict=True):
        frame = 0
        while frame * NFFT < x.size:
            step = int(rng.integers(1, max_frames + 1))
            out.append((x[frame * NFFT: (frame + step) * NFFT], key, frame))
            frame += step
    return out


def _survey(pieces, noise_frames=4096):
    s = sv.SpectrumSurvey(FS, NFFT, noise_frames)
    for x, key, first in pieces:
        s.add(x, key, first)
    return s


def test_splitmix64_reference_outputs():
    """splitmix64(k·0x9E3779B97F4A7C15) are the first outputs of SplitMix64 seeded with 0
    (Steele, Lea and Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014; the
    values 0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F from memory of the
    reference C implementation's output)."""
    golden = 0x9E3779B97F4A7C15
    states = np.array([0, golden, 2 * golden % 2**64], dtype=np.uint64)
    assert [int(v) for v in sv.splitmix64(states)] == [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F]


def test_mantissa_edges_are_rounded_up_powers():
    """Each bin edge is 2^(k/64) rounded up to 53 bits: at or above the value computed to 60
    digits by Python's decimal module, and less than one unit in the last place above it."""
    getcontext().prec = 60
    for k, edge in enumerate(sv.MANTISSA_EDGES):
        exact = Decimal(2) ** (Decimal(k) / Decimal(64))
        assert Decimal(float(edge)) >= exact
        assert Decimal(float(edge)) - Decimal(float(np.spacing(edge))) < exact


def test_energy_bins_match_log2():
    """Away from the edges, a frame energy's bin is ⌊64·log2 E⌋ (numpy's log2 as the reference),
    over energies from 1e-300 to 1e300 including subnormal ones; E = 0 goes to the zero bin, and
    every energy lies in [bin_edge(b), bin_edge(b + 1))."""
    rng = np.random.default_rng(3)
    energy = np.concatenate((10.0 ** rng.uniform(-300, 300, 20000), [5e-324, 1e-310, 0.0, 1.0, 2.0]))
    bins, _ = sv.energy_bins(energy)
    assert bins[-3] == sv.ZERO_BIN and bins[-2] == 0 and bins[-1] == 64
    positive = energy > 0
    ref = 64 * np.log2(energy[positive])
    clear = np.abs(ref - np.round(ref)) > 1e-6
    np.testing.assert_array_equal(bins[positive][clear], np.floor(ref[clear]).astype(np.int64))
    for e, b in zip(energy[positive][::97].tolist(), bins[positive][::97].tolist(), strict=True):
        assert sv.bin_edge(b) <= e < sv.bin_edge(b + 1)


@pytest.mark.parametrize("hum", [0.0, 20.0])
def test_burst_carrier_frequency(hum):
    """Decaying 600 Hz sinusoid bursts every 0.5 s in red noise (fs 4 kHz): the dominant frequency
    is within 5 % of the carrier, by construction (common practice); with a stationary 50 Hz hum
    of 20 × the noise's innovation amplitude it still is: the hum sits in the noise median and
    cancels."""
    segments = [_segment(200_000, seed, hum=hum) for seed in range(3)]
    f, info = _survey(_pieces(segments, [11, 12, 13], seed=0, max_frames=300)).result()
    assert f == pytest.approx(600.0, rel=0.05)
    assert info["frames"] == sum(x.size // NFFT for x in segments)
    assert 0 < info["loud_frames"] < info["frames"] // 5


def test_stationary_noise_has_no_dominant_frequency():
    """Red noise without transients (and with a 50 Hz hum): no frame reaches 8 × the median frame
    energy, so there is no dominant frequency (None), as for the previous estimator."""
    rng = np.random.default_rng(5)
    n = 400_000
    x = lfilter([1.0], [1.0, -0.9], rng.standard_normal(n)) + 5.0 * np.sin(2 * np.pi * 50.0 * np.arange(n) / FS)
    s = sv.SpectrumSurvey(FS)
    s.add(x, 1, 0)
    f, info = s.result()
    assert f is None and info["loud_frames"] == 0 and info["frames"] == n // NFFT
    assert dominant_frequency([x], FS)[0] is None


def test_order_and_merge_are_bit_identical():
    """The same pieces added in three shuffled orders, and split across three surveys merged in
    different orders, give == equal frequencies and info (exact integer sums and bottom-k
    sampling; plain float accumulation would differ in the last bits). A small noise sample (64
    frames of ~2300) makes the sampling evict."""
    segments = [_segment(n, seed) for n, seed in [(190_000, 1), (150_123, 2), (220_007, 3)]]
    pieces = _pieces(segments, [7, 2**64 - 5, -3], seed=1)
    rng = np.random.default_rng(2)
    results = []
    for _ in range(3):
        order = rng.permutation(len(pieces))
        results.append(_survey([pieces[i] for i in order], noise_frames=64).result())
    parts = np.array_split(rng.permutation(len(pieces)), 3)
    for merge_order in [(0, 1, 2), (2, 0, 1), (1, 2, 0)]:
        surveys = [_survey([pieces[i] for i in parts[j]], noise_frames=64) for j in range(3)]
        head, *rest = [surveys[j] for j in merge_order]
        for other in rest:
            head.merge(other)
        results.append(head.result())
    assert results[0][0] is not None
    for f, info in results[1:]:
        assert f == results[0][0]
        assert info == results[0][1]


def test_chunking_does_not_change_result():
    """A segment added as one array, and as consecutive frame-aligned pieces with their
    first_frame (the last one with a partial frame), give == equal results."""
    x = _segment(300_000 + 100, 4)
    whole = sv.SpectrumSurvey(FS, noise_frames=200)
    whole.add(x, 99, 0)
    pieced = _survey(_pieces([x], [99], seed=3, max_frames=50), noise_frames=200)
    assert whole.result() == pieced.result()
    np.testing.assert_array_equal(whole.noise_spectrum(), pieced.noise_spectrum())


def test_noise_sample_is_bottom_k_of_frame_keys():
    """The noise spectrum is the median over the frames with the k smallest frame keys (bottom-k
    sampling: Cohen and Kaplan, "Summarizing data using bottom-k sketches", PODC 2007), checked
    by brute force over all frames with numpy's rfft and median, after adding in pieces."""
    segments = [_segment(60_000, 8), _segment(45_000, 9)]
    keys = [3, 4]
    s = _survey(_pieces(segments, keys, seed=5), noise_frames=50)
    window = np.hanning(NFFT)
    power, frame_key = [], []
    for x, key in zip(segments, keys, strict=True):
        frames = x[: x.size // NFFT * NFFT].reshape(-1, NFFT)
        power.append(np.abs(np.fft.rfft(frames * window, axis=1)) ** 2)
        frame_key.append(sv.frame_keys(key, np.arange(frames.shape[0])))
    smallest = np.argsort(np.concatenate(frame_key))[:50]
    expected = np.median(np.concatenate(power)[smallest], axis=0)
    np.testing.assert_allclose(s.noise_spectrum(), expected, rtol=1e-12)
    assert s.noise_sample_size == 50


@pytest.mark.parametrize("carrier,hum", [(600.0, 0.0), (600.0, 20.0), (1100.0, 0.0), (250.0, 5.0)])
def test_agrees_with_previous_estimator(carrier, hum):
    """Same data, same answer within 2 %: windowing.dominant_frequency, the previous whole-data
    estimator (exact quantiles, a strided noise subset, per-frame clipping). The loud cut is
    max(8 × median, 95 % quantile) of the frame energies with numpy's median and quantile as the
    reference, within the 1/64-octave quantisation, and the loud frames are exactly the frames at
    or above it (brute force over the frame energies)."""
    segments = [_segment(200_000, 20 + seed, carrier=carrier, hum=hum) for seed in range(3)]
    s = sv.SpectrumSurvey(FS)
    for key, x in enumerate(segments):
        s.add(x, key, 0)
    f, info = s.result()
    f_old, info_old = dominant_frequency(segments, FS)
    assert f == pytest.approx(f_old, rel=0.02)
    assert f == pytest.approx(carrier, rel=0.05)
    assert info["frames"] == info_old["frames"]
    energy = np.concatenate([np.square(x[: x.size // NFFT * NFFT].reshape(-1, NFFT)).sum(axis=1) for x in segments])
    cut = max(8.0 * np.median(energy), np.quantile(energy, 0.95))
    assert abs(np.log2(info["loud_cut"] / cut)) <= 1 / 64 + 1e-9
    assert info["loud_frames"] == np.count_nonzero(energy >= info["loud_cut"])


def test_memory_stays_bounded():
    """After 2 million frames of noise at levels spread over 40 octaves of energy, the noise
    sample holds exactly noise_frames spectra, the occupied energy bins are within the stated
    bound (64 per octave spanned, plus one) and the state stays under 20 MB. Common practice
    (bounded-memory streaming); the levels are chosen so the bins are many."""
    rng = np.random.default_rng(6)
    pool = rng.standard_normal(1 << 21)
    piece = 1 << 18
    s = sv.SpectrumSurvey(FS)
    levels = 10.0 ** (np.arange(97) / 16 - 3)  # amplitudes 1e-3 .. 1e3: energies over 40 octaves
    for p in range(-(-2_000_000 * NFFT // piece)):
        offset = (p * 7919 * NFFT) % (pool.size - piece)
        s.add(pool[offset: offset + piece] * levels[p % levels.size], p, 0)
    f, info = s.result()
    assert info["frames"] >= 2_000_000
    assert s.noise_sample_size == s.noise_frames == info["noise_frames"] == 4096
    octaves = np.log2((levels[-1] / levels[0]) ** 2 * 2.0)  # levels and the spread of noise frame energies
    assert 1000 < s.energy_bin_count <= 64 * (octaves + 1) + 1
    assert s.nbytes < 20e6
