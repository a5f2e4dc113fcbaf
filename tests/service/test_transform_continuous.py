"""`burstlens transform --continuous`: the Zarr store, the step flag, exit codes and messages.

Reference: the one-pass transform of the whole trace (``search.tfd.transform`` of the trace
read by ``read_corpus(windowing='whole')``), sampled at the step the store records.
"""
from __future__ import annotations

import json

import numpy as np
import obspy
import pytest

from burstlens.search.continuous import overlap_samples
from burstlens.search.corpus import read_corpus
from burstlens.search.filterbank import Filterbank, center_grid
from burstlens.search.tfd import transform
from burstlens.service.cli import main

FS = 100.0
START = obspy.UTCDateTime(2024, 5, 2, 12, 0, 0)


@pytest.fixture
def site(tmp_path):
    """A filterbank file and one miniSEED trace (band-limited noise with a burst)."""
    rng = np.random.default_rng(0)
    n = 20_000
    t = np.arange(n) / FS
    x = rng.standard_normal(n) + 6.0 * np.exp(-(((t - 90.0) / 0.5) ** 2)) * np.sin(2 * np.pi * 12.0 * t)
    tr = obspy.Trace(x.astype(np.float32), header={"network": "XX", "station": "A", "channel": "HHZ",
                                                    "sampling_rate": FS, "starttime": START})
    wave = tmp_path / "a.mseed"
    tr.write(str(wave), format="MSEED")
    fb = Filterbank.constant_q(center_grid((3.0, 40.0), 10), 5.0, FS)
    fb_path = tmp_path / "filterbank.json"
    fb_path.write_text(json.dumps(fb.to_json()))
    return fb, str(fb_path), str(wave)


def test_continuous_writes_store(site, tmp_path, capsys):
    """Property: exit 0, one part per SEED id named by its UTC start, the image equal to the
    one-pass transform at the recorded step (1e-5 of the peak, away from the trace's ends), and
    --time-step sets the step."""
    import zarr

    fb, fb_path, wave = site
    out = str(tmp_path / "o.zarr")
    assert main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out", out, "--quiet"]) == 0
    assert "wrote" in capsys.readouterr().out
    part = zarr.open_group(out, mode="r")["XX.A..HHZ/20240502T120000.000000Z"]
    step = part.attrs["time_step"]["samples"]
    ref = transform(read_corpus([wave], windowing="whole", sampling_rate_hz=FS).windows[0], fb,
                    dtype=np.float64)[:, ::step]
    image = part["image"][:].T
    o = -(-overlap_samples(fb) // step)
    assert np.abs(image[:, o:-o] - ref[:, o:-o]).max() / np.abs(ref).max() < 1e-5
    out2 = str(tmp_path / "s.zarr")
    assert main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out", out2, "--quiet",
                 "--time-step", "0.03"]) == 0
    assert zarr.open_group(out2, mode="r").attrs["time_step"]["samples"] == 3


@pytest.mark.parametrize("extra, needle", [
    (["--time-step", "-1"], "-1"),
    (["--max-windows", "3"], "--max-windows"),
])
def test_bad_values_exit_2(site, tmp_path, capsys, extra, needle):
    """Property: a bad value exits 2 with a message naming it."""
    _, fb_path, wave = site
    code = main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out",
                 str(tmp_path / "o.zarr"), "--quiet", *extra])
    assert code == 2 and needle in capsys.readouterr().err


def test_out_must_be_zarr(site, tmp_path, capsys):
    """Property: --continuous with an output not named *.zarr exits 2 naming --out."""
    _, fb_path, wave = site
    assert main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out",
                 str(tmp_path / "o.npz"), "--quiet"]) == 2
    assert "--out" in capsys.readouterr().err


def test_file_breaking_mid_stream(site, tmp_path, capsys, monkeypatch):
    """Property: a file that loses samples between the first look and the read (it breaks
    mid-stream) exits 2 naming the file, and no part of the store claims complete steps."""
    import zarr

    from burstlens.search.corpus import stream

    _, fb_path, wave = site
    first_look = stream.summarize_file

    def look_then_cut(path, fmt, csv_rate):
        summary = first_look(path, fmt, csv_rate)
        tr = obspy.read(path)[0]
        tr.data = tr.data[: tr.data.size // 2]
        tr.write(path, format="MSEED")
        return summary

    monkeypatch.setattr(stream, "summarize_file", look_then_cut)
    out = str(tmp_path / "o.zarr")
    code = main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out", out, "--quiet"])
    assert code == 2 and wave in capsys.readouterr().err
    root = zarr.open_group(out, mode="r")
    parts = [part for _, trace in root.groups() for _, part in trace.groups()]
    assert parts and all(part.attrs["complete_until"] == 0 for part in parts)


def test_store_of_other_filterbank_exit_2(site, tmp_path, capsys):
    """Property: running into a store written with another filterbank exits 2 naming --out."""
    _, fb_path, wave = site
    out = str(tmp_path / "o.zarr")
    assert main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out", out, "--quiet"]) == 0
    other = tmp_path / "other.json"
    other.write_text(json.dumps(Filterbank.constant_q(center_grid((3.0, 40.0), 6), 5.0, FS).to_json()))
    assert main(["transform", "--continuous", wave, "--filterbank", str(other), "--out", out, "--quiet"]) == 2
    assert "another filterbank" in capsys.readouterr().err


def test_cli_appends_a_day_and_refuses_an_overlap(site, tmp_path, capsys):
    """Property: `transform --continuous NEXT --out EXISTING.zarr` with the file that continues
    the stored trace exits 0, says the part continues the store, and extends time to the one-
    pass transform of both files (read whole, ``search.tfd.transform``, 1e-5 of the peak
    away from the ends); the same file again overlaps what is stored: exit 2 naming the SEED id."""
    import zarr

    fb, fb_path, wave = site
    first = obspy.read(wave)[0]
    rng = np.random.default_rng(1)
    nxt = obspy.Trace(rng.standard_normal(15_000).astype(np.float32),
                      header={"network": "XX", "station": "A", "channel": "HHZ", "sampling_rate": FS,
                              "starttime": first.stats.endtime + 1 / FS})
    later = str(tmp_path / "b.mseed")
    nxt.write(later, format="MSEED")
    out = str(tmp_path / "o.zarr")
    assert main(["transform", "--continuous", wave, "--filterbank", fb_path, "--out", out, "--quiet"]) == 0
    capsys.readouterr()
    assert main(["transform", "--continuous", later, "--filterbank", fb_path, "--out", out, "--quiet"]) == 0
    assert "1 continuing the store" in capsys.readouterr().out
    part = zarr.open_group(out, mode="r")["XX.A..HHZ/20240502T120000.000000Z"]
    step = part.attrs["time_step"]["samples"]
    ref = transform(read_corpus([wave, later], windowing="whole", sampling_rate_hz=FS).windows[0], fb,
                    dtype=np.float64)[:, ::step]
    image = part["image"][:].T
    o = -(-overlap_samples(fb) // step)
    assert image.shape == ref.shape and part.attrs["complete_until"] == ref.shape[1]
    assert np.abs(image[:, o:-o] - ref[:, o:-o]).max() / np.abs(ref).max() < 1e-5
    assert main(["transform", "--continuous", later, "--filterbank", fb_path, "--out", out, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "XX.A..HHZ" in err and "overlaps" in err
