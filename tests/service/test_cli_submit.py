"""`burstlens submit`: what it uploads from a folder."""
import numpy as np
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import read_corpus
from burstlens.service.cli import main
from service_helpers import recording_client

FS = 1000.0


def _noise(seed, n=3000):
    return np.random.default_rng(seed).standard_normal(n) * 100


def test_submit_uploads_exactly_the_files_the_reader_reads(tmp_path, monkeypatch):
    """From a folder of waveforms (miniSEED, numeric CSV, .npy, numbers in a .txt, one in a
    sub-folder) mixed with documentation and metadata (README.md, settings.json, prose in a
    .dat, an empty file, hidden files), submit uploads exactly ``read_corpus(folder).files``:
    the upload holds what the job reads, no README, no waveform left behind. Source: the Corpus
    contract in DEVELOPERS.md (the reader recognises formats from the content)."""
    from burstlens.service import client as client_module

    trace = Trace(np.rint(_noise(0)).astype(np.int32), header={
        "network": "XX", "station": "A1", "location": "00", "channel": "HHZ",
        "sampling_rate": FS, "starttime": UTCDateTime(2026, 2, 3)})
    Stream([trace]).write(str(tmp_path / "a.mseed"), format="MSEED", encoding="STEIM2")
    np.savetxt(tmp_path / "b.csv", _noise(1))
    np.save(tmp_path / "c.npy", _noise(2))
    np.savetxt(tmp_path / "numbers.txt", _noise(3))
    (tmp_path / "more").mkdir()
    np.save(tmp_path / "more" / "d.npy", _noise(4))
    (tmp_path / "README.md").write_text("# site\nsensors on the north wall\n")
    (tmp_path / "settings.json").write_text('{"channels": 8}\n')
    (tmp_path / "log.dat").write_text("field log\nrain in the afternoon\n")
    (tmp_path / "empty.csv").write_bytes(b"")
    np.save(tmp_path / ".scratch.npy", _noise(5))

    calls = {}
    monkeypatch.setattr(client_module, "Client", recording_client(calls))
    assert main(["submit", str(tmp_path), "--server", "http://127.0.0.1:1",
                 "--csv-sampling-rate", str(FS), "--windowing", "whole"]) == 0
    read = read_corpus(tmp_path, csv_sampling_rate_hz=FS, windowing="whole").files
    assert sorted(calls["files"]) == sorted(read)
    assert {str(tmp_path / name) for name in ("a.mseed", "b.csv", "c.npy", "numbers.txt")} \
        <= set(calls["files"]) and len(calls["files"]) == 5
