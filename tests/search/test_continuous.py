"""The continuous transform (search/continuous.py) and its time step (search/timestep.py).

References: the one-pass transform of the whole trace (``search.tfd.transform``, one window
read by ``read_corpus(windowing='whole')``); obspy's trace times (UTC of each sample); hashlib's
sha256; scipy.signal.resample (Fourier interpolation) for the step's error bound; xarray in a
plain interpreter for the store's layout.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import subprocess
import sys

import numpy as np
import obspy
import pytest
from scipy import signal

from burstlens.search import continuous
from burstlens.search.continuous import overlap_samples, transform_continuous
from burstlens.search.corpus import read_corpus, stream
from burstlens.search.documents import FilterbankDocument
from burstlens.search.filterbank import Channel, Filterbank, center_grid
from burstlens.search.timestep import aliasing_at, interpolation_bound, time_step
from burstlens.search.tfd import transform, transform_decimated

FS = 100.0
START = obspy.UTCDateTime(2024, 3, 1, 0, 0, 0)
TRACE_ID = "XX.STA.00.HHZ"


def _filterbank(lines=()):
    fb = Filterbank.constant_q(center_grid((4.0, 40.0), 12), 5.0, FS)
    return Filterbank(fb.channels, FS, steady_lines_hz=lines)


def _samples(n, seed=0, line_hz=None):
    """Band-passed noise with a few short bursts (and a steady line), float64."""
    rng = np.random.default_rng(seed)
    x = signal.sosfilt(signal.butter(4, [1.0, 45.0], "bandpass", fs=FS, output="sos"), rng.standard_normal(n))
    t = np.arange(n) / FS
    for onset in rng.uniform(0, n / FS, size=max(1, n // 20000)):
        x += 8.0 * np.exp(-(((t - onset) / 0.3) ** 2)) * np.sin(2 * np.pi * 15.0 * t)
    if line_hz is not None:
        x += 3.0 * np.sin(2 * np.pi * line_hz * t + 0.4)
    return x


def _write(path, x, start=START, trace_id=TRACE_ID):
    net, sta, loc, cha = trace_id.split(".")
    tr = obspy.Trace(x.astype(np.float32), header={"network": net, "station": sta, "location": loc,
                                                    "channel": cha, "sampling_rate": FS, "starttime": start})
    tr.write(str(path), format="MSEED")
    return str(path)


def _one_pass(paths, filterbank):
    """The reference: the whole trace read as one window and transformed in one pass (float64)."""
    corpus = read_corpus(paths, windowing="whole", sampling_rate_hz=FS)
    return transform(corpus.windows[0], filterbank, dtype=np.float64)


def _image(store, group):
    import zarr

    part = zarr.open_group(store, mode="r")[group]
    return part["image"][:].T.astype(np.float64), dict(part.attrs)


def test_piece_edges_change_nothing(tmp_path):
    """Property: away from the trace's own ends, the image written piece by piece equals the
    one-pass transform of the whole trace to 1e-5 of its peak, at hop 1 and at the rule's step
    (the overlap covers the kernels' support); a smaller overlap breaks it (the check can fail)."""
    fb = _filterbank()
    path = _write(tmp_path / "a.mseed", _samples(60_000))
    ref = _one_pass([path], fb)
    overlap = overlap_samples(fb)
    inner = slice(overlap, ref.shape[1] - overlap)
    doc = FilterbankDocument.of(fb)
    for step_s, name in ((1 / FS, "hop1.zarr"), (None, "step.zarr")):
        result = transform_continuous([path], doc, str(tmp_path / name), step_s=step_s, piece_samples=4096)
        step = result.step.samples
        image, attrs = _image(str(tmp_path / name), result.parts[0].group)
        assert attrs["complete_until"] == image.shape[1] == math.ceil(ref.shape[1] / step)
        expected = ref[:, ::step]
        kept = slice(-(-inner.start // step), inner.stop // step)
        err = np.abs(image[:, kept] - expected[:, kept]).max() / np.abs(ref).max()
        assert err < 1e-5, (step, err)


def test_overlap_is_needed(tmp_path, monkeypatch):
    """Property: with a tenth of the overlap, piece edges show (> 1e-3 of the peak): the
    equality above comes from the overlap, not from chance."""
    fb = _filterbank()
    path = _write(tmp_path / "a.mseed", _samples(30_000))
    ref = _one_pass([path], fb)
    full = overlap_samples(fb)
    monkeypatch.setattr(continuous, "overlap_samples", lambda filterbank, eps=1e-6: full // 10)
    result = transform_continuous([path], FilterbankDocument.of(fb), str(tmp_path / "o.zarr"), step_s=1 / FS,
                                  piece_samples=4096)
    image, _ = _image(str(tmp_path / "o.zarr"), result.parts[0].group)
    inner = slice(full, ref.shape[1] - full)
    assert np.abs(image[:, inner] - ref[:, inner]).max() / np.abs(ref).max() > 1e-3


def test_chirped_channel_piece_edges(tmp_path):
    """Property: a chirped channel (ambiguity-domain path) is piece-edge free too (1e-5)."""
    fb = Filterbank([Channel(10.0, 0.2, 1.0, 8.0), Channel(20.0, 0.1, 2.0, -15.0), Channel(30.0, 0.3)], FS)
    path = _write(tmp_path / "a.mseed", _samples(20_000, seed=3))
    ref = _one_pass([path], fb)
    result = transform_continuous([path], FilterbankDocument.of(fb), str(tmp_path / "o.zarr"), step_s=1 / FS,
                                  piece_samples=3000)
    image, _ = _image(str(tmp_path / "o.zarr"), result.parts[0].group)
    o = overlap_samples(fb)
    assert np.abs(image[:, o:-o] - ref[:, o:-o]).max() / np.abs(ref).max() < 1e-5


def test_steady_lines_removed_per_piece(tmp_path):
    """Property: with steady lines the fit is per piece; the measured difference from the
    one-pass image (which fits the line over the whole trace) stays below 1e-3 of the peak, and
    the line is removed (its channel's level drops to the no-line level within 5 %)."""
    line = 25.0
    fb, plain = _filterbank((line,)), _filterbank()
    x = _samples(40_000, seed=5)
    with_line = _write(tmp_path / "l.mseed", x + 3.0 * np.sin(2 * np.pi * line * np.arange(x.size) / FS + 0.4))
    no_line = _write(tmp_path / "n.mseed", x)
    ref = _one_pass([with_line], fb)
    result = transform_continuous([with_line], FilterbankDocument.of(fb), str(tmp_path / "o.zarr"),
                                  step_s=1 / FS, piece_samples=8192)
    image, _ = _image(str(tmp_path / "o.zarr"), result.parts[0].group)
    o = overlap_samples(fb)
    err = np.abs(image[:, o:-o] - ref[:, o:-o]).max() / np.abs(ref).max()
    assert err < 1e-3, err
    clean = _one_pass([no_line], plain)
    c = int(np.argmin(np.abs(fb.center_hz - line)))
    assert abs(image[c, o:-o].mean() / clean[c, o:-o].mean() - 1.0) < 0.05


def test_short_trace_is_one_pass_everywhere(tmp_path):
    """Property: a trace shorter than one piece is transformed as one window: equal to the
    one-pass image at every sample, its ends included."""
    fb = _filterbank()
    path = _write(tmp_path / "a.mseed", _samples(3000, seed=2))
    ref = _one_pass([path], fb)
    result = transform_continuous([path], FilterbankDocument.of(fb), str(tmp_path / "o.zarr"), step_s=1 / FS)
    image, _ = _image(str(tmp_path / "o.zarr"), result.parts[0].group)
    assert np.abs(image - ref).max() / np.abs(ref).max() < 1e-6


# --- the time step --------------------------------------------------------------------------

def test_step_rule_closed_form():
    """Property: the rule's step is the largest whole step with the Gaussian kernel's spectrum
    exp(−2π²σ²θ²) at the step's Nyquist fs/(2Δ) below ε_a (Gaussian Fourier pair, common
    practice): below at Δ, above at Δ + 1, for the smallest σ_t of an unchirped filterbank."""
    fb = _filterbank()
    sigma = fb.time_spread_s.min()
    step = time_step(fb, aliasing=1e-3)

    def gain(d):
        return math.exp(-2 * math.pi**2 * (sigma * FS / (2 * d)) ** 2)

    assert gain(step.samples) <= 1e-3 < gain(step.samples + 1)
    assert step.aliasing == pytest.approx(gain(step.samples), rel=1e-12)
    assert step.seconds == step.samples / FS
    assert time_step(fb, step_s=0.05).samples == 5
    with pytest.raises(ValueError, match="time step"):
        time_step(fb, step_s=-1.0)


def test_step_interpolation_error_within_bound():
    """Property: the hop-1 image of a short arrival, sampled at the rule's step and Fourier
    interpolated back (scipy.signal.resample), errs by at most the stated bound
    2·erfc(√ln 1/ε_a) of its peak (Brown 1967, the aliasing error of band-limited
    interpolation); at three times the step it errs by more (the check can fail)."""
    fb = _filterbank()
    n = 4800
    x = np.zeros(n)
    t = np.arange(n) / FS
    x += np.exp(-(((t - 24.0) / 0.04) ** 2)) * np.cos(2 * np.pi * 20.0 * t)  # shorter than σ_t,min
    x += 0.3 * np.exp(-(((t - 12.0) / 1.0) ** 2)) * np.cos(2 * np.pi * 8.0 * t)
    ref = transform(x, fb, dtype=np.float64)
    step = time_step(fb)
    assert n % step.samples == 0 and n % (3 * step.samples) == 0
    for factor, within in ((1, True), (3, False)):
        d = factor * step.samples
        back = signal.resample(ref[:, ::d], n, axis=1)
        err = np.abs(back - ref).max() / np.abs(ref).max()
        bound = interpolation_bound(aliasing_at(fb, step.samples))
        assert (err <= bound) == within, (factor, err, bound)


# --- the store ------------------------------------------------------------------------------

def test_store_opens_with_plain_xarray(tmp_path):
    """Property: xarray opens the part group without burstlens importable; times are the
    record's UTC sample times (obspy), frequencies the channels' centres, the attributes carry
    the filterbank JSON, its sha256 (hashlib) and the reading settings."""
    fb = _filterbank()
    x = _samples(12_000, seed=4)
    path = _write(tmp_path / "a.mseed", x)
    doc = FilterbankDocument.of(fb)
    out = str(tmp_path / "o.zarr")
    result = transform_continuous([path], doc, out, piece_samples=2048)
    step = result.step.samples
    code = f"""
import sys, json
sys.modules['burstlens'] = None
import os
sys.path = [p for p in sys.path if p and not os.path.isfile(os.path.join(p, 'pyproject.toml'))]
import xarray as xr, numpy as np
ds = xr.open_zarr({out!r}, group={result.parts[0].group!r}, consolidated=False)
print(json.dumps({{"times": ds.time.values.astype('int64').tolist(), "freq": ds.frequency.values.tolist(),
    "shape": list(ds.image.shape), "dims": list(ds.image.dims), "nan": bool(np.isnan(ds.image.values).any()),
    "sha": ds.attrs['filterbank_sha256'], "fb": ds.attrs['filterbank'], "reading": ds.attrs['reading'],
    "dtype": str(ds.time.dtype)}}))
"""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)}
    run = subprocess.run([sys.executable, "-I", "-c", code], capture_output=True, text=True, env=env,
                         cwd=str(tmp_path), check=False)
    assert run.returncode == 0, run.stderr
    got = json.loads(run.stdout.strip().splitlines()[-1])
    trace = obspy.read(path)[0]
    expected = np.round(trace.times("timestamp")[::step] * 1e6).astype(np.int64) * 1000
    assert got["dtype"] == "datetime64[ns]"
    assert np.abs(np.array(got["times"]) - expected).max() <= 1000  # µs: miniSEED's time resolution
    assert got["freq"] == pytest.approx(fb.center_hz.tolist())
    assert got["dims"] == ["time", "frequency"] and got["shape"] == [len(expected), len(fb)] and not got["nan"]
    assert got["sha"] == hashlib.sha256(doc.encode()).hexdigest()
    assert Filterbank.from_json(got["fb"]) == fb
    assert got["reading"]["sampling_rate_hz"] == FS


def test_append_later_hour_extends_time(tmp_path, monkeypatch):
    """Property: a store written from the first file, then run again over both consecutive
    files, holds one part whose time runs on and whose image equals a fresh one-pass run over
    both (1e-6 of the peak); only the chunks a later sample can change were recomputed."""
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 8192)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 2048)
    fb = _filterbank()
    x = _samples(72_000, seed=6)
    half = 36_000
    first = _write(tmp_path / "h1.mseed", x[:half])
    second = _write(tmp_path / "h2.mseed", x[half:], start=START + half / FS)
    doc = FilterbankDocument.of(fb)
    out, fresh = str(tmp_path / "day.zarr"), str(tmp_path / "fresh.zarr")
    one = transform_continuous([first], doc, out, piece_samples=2048)
    two = transform_continuous([first, second], doc, out, piece_samples=2048)
    ref = transform_continuous([first, second], doc, fresh, piece_samples=2048)
    assert [p.group for p in two.parts] == [p.group for p in one.parts] == [p.group for p in ref.parts]
    image, attrs = _image(out, two.parts[0].group)
    expected, _ = _image(fresh, ref.parts[0].group)
    assert image.shape == expected.shape and image.shape[1] > one.parts[0].n_steps
    assert np.abs(image - expected).max() / np.abs(expected).max() < 1e-6
    assert two.parts[0].resumed_at_step > 0 and two.parts[0].steps_written < two.parts[0].n_steps
    assert attrs["complete_until"] == image.shape[1]


def test_interrupted_run_resumes(tmp_path):
    """Property: a run stopped after k chunks leaves complete_until = k chunks and the rest NaN
    (nothing half-written reads as complete); running again resumes there and ends equal to an
    uninterrupted run."""
    fb = _filterbank()
    path = _write(tmp_path / "a.mseed", _samples(30_000, seed=7))
    doc = FilterbankDocument.of(fb)
    out, whole = str(tmp_path / "o.zarr"), str(tmp_path / "w.zarr")

    class Stop(Exception):
        pass

    def stop_after_three(group, complete):
        if complete >= 3 * chunk:
            raise Stop

    chunk = max(1, 2048 // time_step(fb).samples)
    with pytest.raises(Stop):
        transform_continuous([path], doc, out, piece_samples=2048, on_chunk=stop_after_three)
    group = f"{TRACE_ID}/{continuous.part_name(int(START.ns))}"
    image, attrs = _image(out, group)
    assert attrs["complete_until"] == 3 * chunk
    assert np.isfinite(image[:, : 3 * chunk]).all() and np.isnan(image[:, 3 * chunk:]).all()
    again = transform_continuous([path], doc, out, piece_samples=2048)
    assert again.parts[0].resumed_at_step == 3 * chunk
    reference = transform_continuous([path], doc, whole, piece_samples=2048)
    assert np.array_equal(_image(out, group)[0], _image(whole, reference.parts[0].group)[0])


def test_gap_splits_parts(tmp_path):
    """Property: a gap between two files of one SEED id gives two parts named by their
    starts, each part's time starting at its own first sample."""
    fb = _filterbank()
    a = _write(tmp_path / "a.mseed", _samples(6000, seed=8))
    later = START + 6000 / FS + 30.0
    b = _write(tmp_path / "b.mseed", _samples(6000, seed=9), start=later)
    result = transform_continuous([a, b], FilterbankDocument.of(fb), str(tmp_path / "o.zarr"))
    assert [p.group for p in result.parts] == [f"{TRACE_ID}/20240301T000000.000000Z",
                                               f"{TRACE_ID}/20240301T000130.000000Z"]
    assert result.parts[1].start_ns == later.ns


def test_other_filterbank_refused(tmp_path):
    """Property: a store written with one filterbank refuses another (ValueError names it)."""
    path = _write(tmp_path / "a.mseed", _samples(3000))
    out = str(tmp_path / "o.zarr")
    transform_continuous([path], FilterbankDocument.of(_filterbank()), out)
    other = Filterbank.constant_q(center_grid((4.0, 40.0), 8), 5.0, FS)
    with pytest.raises(ValueError, match="another filterbank"):
        transform_continuous([path], FilterbankDocument.of(other), out)


# --- the output at the step only, and where the chunks run ------------------------------------

@pytest.mark.parametrize("step, offset", [(1, 0), (5, 0), (5, 3), (7, 1234), (16, 15)])
def test_decimated_equals_sampled_transform(step, offset):
    """Property: transform_decimated is the hop-1 transform sampled at offset + k·step, to
    round-off (1e-12 of the peak), for unchirped and chirped channels and several windows: the
    folded inverse DFT (DFT decimation in time, Oppenheim & Schafer, "Discrete-Time Signal
    Processing", 3rd ed., 2010, §4.6) and the kernel shifted by the offset change nothing but
    which samples are made. The same check against a sampling one sample later fails."""
    fb = Filterbank([Channel(10.0, 0.2, 1.0, 8.0), Channel(20.0, 0.1, 2.0), Channel(30.0, 0.05),
                     Channel(40.0, 0.3, 0.5)], FS)
    windows = np.stack([_samples(3001, seed=s) for s in (11, 12)])
    full = transform(windows, fb, dtype=np.float64)
    got = transform_decimated(windows, fb, step, offset=offset, dtype=np.float64)
    expected = full[..., offset::step]
    assert got.shape == expected.shape == (2, len(fb), -(-(3001 - offset) // step))
    assert np.abs(got - expected).max() / np.abs(full).max() < 1e-12
    later = full[..., offset + 1::step][..., : got.shape[-1] - 1]
    assert np.abs(got[..., : later.shape[-1]] - later).max() / np.abs(full).max() > 1e-3


def test_decimated_with_steady_lines_and_one_window():
    """Property: with steady lines (removed from the samples first) and one 1-D window the
    decimated image is the hop-1 one sampled (1e-12), shape (C, K)."""
    fb = _filterbank((25.0,))
    x = _samples(5000, seed=13, line_hz=25.0)
    full = transform(x, fb, dtype=np.float64)
    got = transform_decimated(x, fb, 9, offset=4, dtype=np.float64)
    assert got.shape == full[:, 4::9].shape
    assert np.abs(got - full[:, 4::9]).max() / np.abs(full).max() < 1e-12


@pytest.mark.parametrize("kwargs, needle", [({"step": 0}, "step"), ({"step": 2.5}, "step"),
                                            ({"step": 2, "offset": -1}, "offset"),
                                            ({"step": 2, "offset": 500}, "offset")])
def test_decimated_bad_input(kwargs, needle):
    """Property: a bad step or offset is a ValueError naming it."""
    with pytest.raises(ValueError, match=needle):
        transform_decimated(np.zeros(500), _filterbank(), **kwargs)


def _two_traces(tmp_path):
    """Two SEED ids in two files each (consecutive hours at 100 Hz, shortened)."""
    paths = []
    for k, trace_id in enumerate(("XX.STA.00.HHZ", "XX.STA.00.HHN")):
        x = _samples(30_000, seed=20 + k)
        paths.append(_write(tmp_path / f"{k}a.mseed", x[:15_000], trace_id=trace_id))
        paths.append(_write(tmp_path / f"{k}b.mseed", x[15_000:], start=START + 150.0, trace_id=trace_id))
    return paths


def _all_images(store):
    import zarr

    root = zarr.open_group(store, mode="r")
    return {f"{t}/{p}": (part["image"][:], dict(part.attrs)["complete_until"])
            for t, trace in root.groups() for p, part in trace.groups()}


def test_pool_writes_the_same_bytes(tmp_path):
    """Property: chunks computed on joblib's process pool (2 workers) give a store equal bit for
    bit to the serial run, over two SEED ids in two files each, every step complete."""
    paths = _two_traces(tmp_path)
    doc = FilterbankDocument.of(_filterbank())
    serial, pool = str(tmp_path / "serial.zarr"), str(tmp_path / "pool.zarr")
    one = transform_continuous(paths, doc, serial, piece_samples=2048)
    two = transform_continuous(paths, doc, pool, piece_samples=2048, jobs=2)
    a, b = _all_images(serial), _all_images(pool)
    assert len(a) == 2 and a.keys() == b.keys()
    for key in a:
        assert a[key][1] == b[key][1] == a[key][0].shape[0]
        assert np.array_equal(a[key][0], b[key][0]), key
    assert [p.steps_written for p in one.parts] == [p.steps_written for p in two.parts]


def test_dask_backend_writes_the_same_bytes(tmp_path):
    """Property: under joblib's Dask backend (an in-process LocalCluster) the store equals the
    serial one bit for bit."""
    distributed = pytest.importorskip("distributed")
    import joblib

    paths = _two_traces(tmp_path)[:2]
    doc = FilterbankDocument.of(_filterbank())
    serial, cluster = str(tmp_path / "serial.zarr"), str(tmp_path / "dask.zarr")
    transform_continuous(paths, doc, serial, piece_samples=2048)
    with (distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                   dashboard_address=None) as lc, distributed.Client(lc) as client,
          joblib.parallel_config(backend="dask", client=client)):
        transform_continuous(paths, doc, cluster, piece_samples=2048)
    a, b = _all_images(serial), _all_images(cluster)
    assert a.keys() == b.keys() and all(np.array_equal(a[k][0], b[k][0]) for k in a)


def test_bad_jobs(tmp_path):
    """Property: jobs 0 or below −1 is a ValueError naming jobs."""
    path = _write(tmp_path / "a.mseed", _samples(3000))
    with pytest.raises(ValueError, match="jobs="):
        transform_continuous([path], FilterbankDocument.of(_filterbank()), str(tmp_path / "o.zarr"), jobs=0)


def test_cli_jobs_flag(tmp_path, capsys):
    """Property: `transform --continuous --jobs 2` writes the serial run's bytes; --jobs
    without --continuous, or 0, exits 2 naming --jobs."""
    from burstlens.service.cli import main

    paths = _two_traces(tmp_path)[:2]
    fb = _filterbank()
    fb_path = tmp_path / "filterbank.json"
    fb_path.write_text(json.dumps(fb.to_json()))
    out = str(tmp_path / "cli.zarr")
    assert main(["transform", "--continuous", *paths, "--filterbank", str(fb_path), "--out", out,
                 "--quiet", "--jobs", "2"]) == 0
    ref = str(tmp_path / "ref.zarr")
    transform_continuous(paths, FilterbankDocument.read(json.loads(fb_path.read_text())), ref)
    a, b = _all_images(out), _all_images(ref)
    assert a.keys() == b.keys() and all(np.array_equal(a[k][0], b[k][0]) for k in a)
    capsys.readouterr()
    for extra in (["--jobs", "2"], ["--continuous", "--jobs", "0"]):
        code = main(["transform", *paths, "--filterbank", str(fb_path), "--out", str(tmp_path / "x.zarr"),
                     "--quiet", *extra])
        assert code == 2 and "--jobs" in capsys.readouterr().err


# --- appending from the new files alone ---------------------------------------------------------

def _days(tmp_path, n_days, n, *, rate=FS, seed=30, gap_s=0.0, trace_id=TRACE_ID):
    """Consecutive 'days' of one SEED id (n native samples each, a file each), float32 miniSEED."""
    x = _samples(n_days * n, seed=seed) if rate == FS else signal.resample_poly(_samples(n_days * n // 2, seed), 2, 1)
    paths = []
    for d in range(n_days):
        net, sta, loc, cha = trace_id.split(".")
        tr = obspy.Trace(x[d * n:(d + 1) * n].astype(np.float32),
                         header={"network": net, "station": sta, "location": loc, "channel": cha,
                                 "sampling_rate": rate, "starttime": START + d * (n / rate + gap_s)})
        path = str(tmp_path / f"day{d}.mseed")
        tr.write(path, format="MSEED")
        paths.append(path)
    return paths


def _store_bytes(store):
    """Every part's image and time arrays and its complete_until, by group."""
    import zarr

    root = zarr.open_group(store, mode="r")
    return {f"{t}/{p}": (part["image"][:], part["time"][:], part.attrs["complete_until"])
            for t, trace in root.groups() for p, part in trace.groups()}


def _same_store(a, b):
    x, y = _store_bytes(a), _store_bytes(b)
    assert x.keys() == y.keys()
    for key in x:
        assert x[key][2] == y[key][2] == x[key][0].shape[0], key
        assert np.array_equal(x[key][0], y[key][0]) and np.array_equal(x[key][1], y[key][1]), key


def test_day_by_day_equals_one_pass(tmp_path):
    """Property: two days appended one file at a time give the bytes of one run over both files,
    and that image equals the one-pass transform of the joined trace (read whole by read_corpus,
    ``search.tfd.transform``) to 1e-5 of its peak away from the trace's ends, at the
    rule's step; the second run reports the part as appended."""
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    paths = _days(tmp_path, 2, 30_000)
    daily, once = str(tmp_path / "daily.zarr"), str(tmp_path / "once.zarr")
    transform_continuous(paths[:1], doc, daily, piece_samples=4096)
    second = transform_continuous(paths[1:], doc, daily, piece_samples=4096)
    ref_run = transform_continuous(paths, doc, once, piece_samples=4096)
    assert second.parts[0].appended and second.parts[0].group == ref_run.parts[0].group
    _same_store(daily, once)
    step = ref_run.step.samples
    ref = _one_pass(paths, fb)[:, ::step]
    image, _ = _image(daily, second.parts[0].group)
    o = -(-overlap_samples(fb) // step)
    assert image.shape == ref.shape
    assert np.abs(image[:, o:-o] - ref[:, o:-o]).max() / np.abs(ref).max() < 1e-5


@pytest.mark.parametrize("rate, band, n", [(FS, None, 30_000), (2 * FS, (2.0, 40.0), 34_900)])
def test_appends_recompute_only_the_seam(tmp_path, monkeypatch, rate, band, n):
    """Property: with many reader pieces per day (detrended, resampled and band-passed per
    piece), three days appended one at a time give the bytes of one run over the three files,
    and each append rewrote only the chunks after its part's final_until (fewer than the part's
    steps). The store's seam arrays hold native samples from the first re-read piece on."""
    import zarr

    monkeypatch.setattr(stream, "PIECE_SAMPLES", 8192)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 2048)
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    reading = {"sampling_rate_hz": FS, "bandpass_hz": band}
    paths = _days(tmp_path, 3, n, rate=rate)
    daily, once = str(tmp_path / "daily.zarr"), str(tmp_path / "once.zarr")
    stored = 0
    for d, path in enumerate(paths):
        run = transform_continuous([path], doc, daily, reading=reading, piece_samples=2048)
        part = run.parts[0]
        assert part.appended == (d > 0)
        if d:  # the stored steps before final_until are kept, the rest rewritten
            assert stored // 2 < part.resumed_at_step < stored
            assert part.steps_written == part.n_steps - part.resumed_at_step
        stored = part.n_steps
    transform_continuous(paths, doc, once, reading=reading, piece_samples=2048)
    _same_store(daily, once)
    group = zarr.open_group(daily, mode="r")[run.parts[0].group]
    seam = group.attrs["seam"]
    assert seam["n_raw"] == 3 * len(obspy.read(paths[0])[0].data) and seam["final_pieces"] > 0
    assert [name for name, _ in group.groups()] == [seam["group"]]
    assert group[seam["group"]]["raw"].shape == (seam["n_raw"] - seam["raw_first"],)


def test_gap_before_the_new_day_starts_a_part(tmp_path):
    """Property: a new day starting 30 s after the stored end is a new part named by its start;
    the stored part keeps its bytes (a run over both files writes the same two parts)."""
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    paths = _days(tmp_path, 2, 12_000, gap_s=30.0)
    daily, once = str(tmp_path / "daily.zarr"), str(tmp_path / "once.zarr")
    transform_continuous(paths[:1], doc, daily, piece_samples=2048)
    before = _store_bytes(daily)
    second = transform_continuous(paths[1:], doc, daily, piece_samples=2048)
    assert not second.parts[0].appended
    assert second.parts[0].start_ns == (START + 12_000 / FS + 30.0).ns
    after = _store_bytes(daily)
    assert len(after) == 2 and all(np.array_equal(after[k][0], before[k][0]) for k in before)
    transform_continuous(paths, doc, once, piece_samples=2048)
    _same_store(daily, once)


def test_overlapping_new_data_refused(tmp_path):
    """Property: data overlapping a stored part (a file starting 10 s before the stored end, or
    the appended day run again) is a ValueError naming the SEED id, its times and the stored
    part, and leaves the store's bytes as they were."""
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    paths = _days(tmp_path, 2, 12_000)
    out = str(tmp_path / "o.zarr")
    transform_continuous(paths[:1], doc, out, piece_samples=2048)
    early = _write(tmp_path / "early.mseed", _samples(5000, seed=40), start=START + 120.0 - 10.0)
    before = _store_bytes(out)
    with pytest.raises(ValueError, match=r"XX\.STA\.00\.HHZ from 2024-03-01T00:01:50\.000000Z .* overlaps"):
        transform_continuous([early], doc, out, piece_samples=2048)
    assert _store_bytes(out).keys() == before.keys()
    assert all(np.array_equal(_store_bytes(out)[k][0], before[k][0]) for k in before)
    transform_continuous(paths[1:], doc, out, piece_samples=2048)
    with pytest.raises(ValueError, match="overlaps the stored part XX.STA.00.HHZ/20240301T000000.000000Z"):
        transform_continuous(paths[1:], doc, out, piece_samples=2048)


def test_append_with_other_filterbank_or_step_refused(tmp_path):
    """Property: appending with another filterbank (the message names both sha256 hashes,
    hashlib) or another time step is a ValueError, and the store is unchanged."""
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    paths = _days(tmp_path, 2, 6000)
    out = str(tmp_path / "o.zarr")
    transform_continuous(paths[:1], doc, out)
    before = _store_bytes(out)
    other = FilterbankDocument.of(Filterbank.constant_q(center_grid((4.0, 40.0), 8), 5.0, FS))
    with pytest.raises(ValueError, match="another filterbank") as info:
        transform_continuous(paths[1:], other, out)
    assert hashlib.sha256(doc.encode()).hexdigest() in str(info.value)
    assert hashlib.sha256(other.encode()).hexdigest() in str(info.value)
    with pytest.raises(ValueError, match="another time step"):
        transform_continuous(paths[1:], doc, out, step_s=0.02)
    after = _store_bytes(out)
    assert after.keys() == before.keys() and all(np.array_equal(after[k][0], before[k][0]) for k in before)


def test_killed_append_resumes_to_the_same_bytes(tmp_path, monkeypatch):
    """Property: an append stopped after two chunks claims no more than what it wrote
    (complete_until below the part's steps); a second stop, after the last chunk but before the
    seam is saved, leaves the old seam in force; running the new file again ends with the bytes
    of one run over both files, and a third day then still appends exactly."""
    monkeypatch.setattr(stream, "PIECE_SAMPLES", 8192)
    monkeypatch.setattr(stream, "MARGIN_SAMPLES", 2048)
    fb = _filterbank()
    doc = FilterbankDocument.of(fb)
    paths = _days(tmp_path, 3, 20_000)
    daily, once = str(tmp_path / "daily.zarr"), str(tmp_path / "once.zarr")
    transform_continuous(paths[:1], doc, daily, piece_samples=2048)

    class Killed(Exception):
        pass

    calls = []

    def kill_after_two(group, complete):
        calls.append(complete)
        if len(calls) == 2:
            raise Killed

    with pytest.raises(Killed):
        transform_continuous(paths[1:2], doc, daily, piece_samples=2048, on_chunk=kill_after_two)
    image, attrs = _image(daily, f"{TRACE_ID}/20240301T000000.000000Z")
    assert attrs["complete_until"] == calls[-1] < image.shape[1] and attrs["seam"]["n_raw"] == 20_000

    def no_seam(self):
        raise Killed

    with monkeypatch.context() as m:
        m.setattr(continuous._PartWriter, "keep_seam", no_seam)
        with pytest.raises(Killed):
            transform_continuous(paths[1:2], doc, daily, piece_samples=2048)
    image, attrs = _image(daily, f"{TRACE_ID}/20240301T000000.000000Z")
    assert attrs["complete_until"] == image.shape[1] and attrs["seam"]["n_raw"] == 20_000
    again = transform_continuous(paths[1:2], doc, daily, piece_samples=2048)
    assert again.parts[0].steps_written == 0
    transform_continuous(paths[:2], doc, once, piece_samples=2048)
    _same_store(daily, once)
    transform_continuous(paths[2:], doc, daily, piece_samples=2048)
    transform_continuous(paths[2:], doc, once, piece_samples=2048)
    _same_store(daily, once)


@pytest.mark.parametrize("step, offset", [(1, 0), (5, 3), (7, 1234)])
def test_decimated_single_precision(step, offset):
    """Property: with precision='single' the unchirped channels are computed in float32 and
    still equal the float64 hop-1 transform sampled at offset + k·step to 1e-5 of the peak
    (float32 round-off on lag sums of a few hundred terms, IEEE 754 single precision: about
    1e-7 relative per operation); mixed with chirped channels (double precision), several
    windows. A sampling one sample later fails the same check."""
    fb = Filterbank([Channel(10.0, 0.2, 1.0, 8.0), Channel(20.0, 0.1, 2.0), Channel(30.0, 0.05),
                     Channel(40.0, 0.3, 0.5)], FS)
    windows = np.stack([_samples(3001, seed=s) for s in (14, 15)])
    full = transform(windows, fb, dtype=np.float64)
    got = transform_decimated(windows, fb, step, offset=offset, precision="single")
    expected = full[..., offset::step]
    assert got.dtype == np.float32 and got.shape == expected.shape
    assert np.abs(got - expected).max() / np.abs(full).max() < 1e-5
    later = full[..., offset + 1::step][..., : got.shape[-1] - 1]
    assert np.abs(got[..., : later.shape[-1]] - later).max() / np.abs(full).max() > 1e-3
