"""Readers: format recognition by content and round trips (search/corpus/readers.py)."""
import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime
from scipy.io import wavfile

from burstlens.search.corpus import CorpusError, read_corpus
from burstlens.search.corpus.readers import detect_format, read_head, read_waveform_file

START = UTCDateTime("2026-01-05T10:20:30.25")


def _read(path, **kw):
    head, size = read_head(str(path))
    fmt = detect_format(head, size)
    return fmt, read_waveform_file(str(path), fmt, **kw)


def _stream(data, rate=4000.0, station="STA01", channels=("GPZ",)):
    st = Stream()
    for ch, row in zip(channels, np.atleast_2d(data), strict=True):
        st.append(Trace(row, header={"network": "XX", "station": station, "location": "00",
                                     "channel": ch, "sampling_rate": rate, "starttime": START}))
    return st


@pytest.mark.parametrize("encoding,dtype", [("STEIM2", np.int32), ("STEIM1", np.int32), ("FLOAT32", np.float32),
                                            ("INT16", np.int16)])
def test_mseed_round_trip(tmp_path, encoding, dtype):
    """miniSEED written by ObsPy (SEED Manual v2.4 encodings) reads back sample for sample with its
    SEED ids, start time and rate; recognised by content, not by name."""
    rng = np.random.default_rng(0)
    data = (rng.standard_normal((3, 5000)) * 300).astype(dtype)
    path = tmp_path / "record.bin"  # a name that says nothing
    _stream(data, channels=("GPZ", "GPN", "GPE")).write(str(path), format="MSEED", encoding=encoding, reclen=512)
    fmt, traces = _read(path)
    assert fmt == "MSEED"
    assert [t.trace_id for t in traces] == ["XX.STA01.00.GPZ", "XX.STA01.00.GPN", "XX.STA01.00.GPE"]
    for t, row in zip(traces, data, strict=True):
        np.testing.assert_array_equal(t.data, row)
        assert t.sampling_rate_hz == 4000.0
        assert t.start == pytest.approx(START.timestamp, abs=1e-6)


@pytest.mark.parametrize("byteorder", ["<", ">"])
def test_sac_round_trip(tmp_path, byteorder):
    """Binary SAC (little and big endian; SAC User's Manual header layout) reads back its samples,
    SEED codes, start time and sampling rate."""
    rng = np.random.default_rng(1)
    data = rng.standard_normal(3000).astype(np.float32)
    path = tmp_path / "event.sac"
    _stream(data, rate=2500.0, station="BH3").write(str(path), format="SAC", byteorder=byteorder)
    fmt, traces = _read(path)
    assert fmt == "SAC"
    (t,) = traces
    assert t.trace_id == "XX.BH3.00.GPZ"
    assert t.sampling_rate_hz == pytest.approx(2500.0)
    assert t.start == pytest.approx(START.timestamp, abs=1e-3)
    np.testing.assert_array_equal(t.data, data)


@pytest.mark.filterwarnings("ignore:CREATING TRACE HEADER")
def test_segy_round_trip(tmp_path):
    """SEG-Y rev 1 written by ObsPy reads back; SEG-Y has no SEED codes, so the station is the file
    stem and the location the trace number (documented convention)."""
    rng = np.random.default_rng(2)
    data = rng.standard_normal((2, 1000)).astype(np.float32)
    path = tmp_path / "shot7.sgy"
    st = _stream(data, rate=2000.0, channels=("GPZ", "GPN"))
    for tr in st:
        tr.stats.starttime = UTCDateTime(2026, 1, 5)
    st.write(str(path), format="SEGY", data_encoding=5)
    fmt, traces = _read(path)
    assert fmt == "SEGY"
    assert [t.trace_id for t in traces] == [".shot7.00.", ".shot7.01."]
    assert traces[0].sampling_rate_hz == pytest.approx(2000.0)
    np.testing.assert_array_equal(np.stack([t.data for t in traces]), data)


@pytest.mark.parametrize("dtype", [np.int16, np.int32, np.float32, np.uint8])
def test_wav_round_trip(tmp_path, dtype):
    """WAV (scipy.io.wavfile, the reference writer) reads back each channel as a trace at the file's
    rate; 8-bit WAV is offset binary (RIFF WAVE specification) and is centred on 0."""
    rng = np.random.default_rng(3)
    raw = rng.integers(0, 200, size=(4000, 2)) if dtype == np.uint8 else rng.standard_normal((4000, 2)) * 1000
    data = raw.astype(dtype)
    path = tmp_path / "vibration.wav"
    wavfile.write(str(path), 8000, data)
    fmt, traces = _read(path)
    assert fmt == "WAV"
    assert len(traces) == 2 and traces[0].sampling_rate_hz == 8000.0
    expected = data.astype(np.int16) - 128 if dtype == np.uint8 else data
    np.testing.assert_array_equal(np.stack([t.data for t in traces]), expected.T)
    assert traces[0].trace_id == ".vibration.00." and traces[1].trace_id == ".vibration.01."


def test_npy_round_trip_needs_declared_rate(tmp_path):
    """A bare .npy array (rows are traces) reads back exactly at the declared rate; without a rate
    it is an error that names the file and the option (numpy .npy format)."""
    data = np.arange(12000, dtype=np.float64).reshape(3, 4000)
    path = tmp_path / "pipeline.npy"
    np.save(path, data)
    fmt, traces = _read(path, csv_sampling_rate_hz=500.0)
    assert fmt == "NPY"
    np.testing.assert_array_equal(np.stack([t.data for t in traces]), data)
    assert traces[0].sampling_rate_hz == 500.0
    with pytest.raises(CorpusError, match=r"pipeline\.npy.*no sampling rate.*csv_sampling_rate_hz"):
        _read(path)


def test_npz_round_trip_with_rate_ids_and_start(tmp_path):
    """An .npz with 'data', 'sampling_rate_hz', 'trace_ids' and 'start' reads back those values
    (the documented layout; numpy .npz format, never unpickled)."""
    data = np.random.default_rng(4).standard_normal((2, 3000))
    path = tmp_path / "cut.npz"
    np.savez(path, data=data, sampling_rate_hz=np.float64(3000.0),
             trace_ids=np.array(["XX.Q1.00.GPZ", "XX.Q1.00.GPN"]), start=np.array("2026-01-05T10:20:30.25"))
    fmt, traces = _read(path)
    assert fmt == "NPZ"
    assert [t.trace_id for t in traces] == ["XX.Q1.00.GPZ", "XX.Q1.00.GPN"]
    assert traces[0].sampling_rate_hz == 3000.0
    assert traces[0].start == pytest.approx(START.timestamp)
    np.testing.assert_array_equal(traces[1].data, data[1])


def test_csv_round_trip_with_seed_header(tmp_path):
    """A numeric CSV (columns are traces, optional header of SEED ids) reads back at the declared rate."""
    data = np.round(np.random.default_rng(5).standard_normal((500, 2)), 6)
    path = tmp_path / "export.csv"
    with open(path, "w") as fh:
        fh.write("XX.A1.00.HHZ,XX.A1.00.HHN\n")
        for row in data:
            fh.write(f"{row[0]:.6f},{row[1]:.6f}\n")
    fmt, traces = _read(path, csv_sampling_rate_hz=200.0)
    assert fmt == "CSV"
    assert [t.trace_id for t in traces] == ["XX.A1.00.HHZ", "XX.A1.00.HHN"]
    np.testing.assert_allclose(np.stack([t.data for t in traces]), data.T, atol=1e-12)


def test_read_corpus_keeps_seed_ids_start_and_rate(tmp_path):
    """Every window records its file, SEED id, start time (ISO 8601 UTC) and offset; every trace its
    native rate and duration (the Corpus contract in DEVELOPERS.md)."""
    rng = np.random.default_rng(6)
    fs = 4000.0
    x = rng.standard_normal(int(20 * fs)) * 10
    onset = int(8 * fs)
    x[onset: onset + 400] += 400 * np.sin(2 * np.pi * 500 * np.arange(400) / fs) * np.exp(-np.arange(400) / 100)
    path = tmp_path / "one.mseed"
    _stream(np.rint(x).astype(np.int32)).write(str(path), format="MSEED", encoding="STEIM2")
    corpus = read_corpus(path, window_s=0.256)
    assert corpus.traces == [{"file": str(path), "trace_id": "XX.STA01.00.GPZ", "sampling_rate_hz": 4000.0,
                              "start": "2026-01-05T10:20:30.250000Z", "duration_s": 20.0, "windows": 1}]
    (meta,) = corpus.window_meta
    assert meta["trace_id"] == "XX.STA01.00.GPZ" and meta["file"] == str(path)
    # the window starts a quarter window (pre_trigger 0.25) before the onset, within a few samples
    assert meta["offset_s"] == pytest.approx(8.0 - 0.064, abs=0.005)
    assert meta["start"].startswith("2026-01-05T10:20:38.")
