"""Which files of a folder the reader reads: ``folder_files`` and ``is_waveform_file``
(search/corpus/ingest.py), the one definition ``burstlens submit`` uploads by."""
import os

import numpy as np
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import folder_files, is_waveform_file, read_corpus

FS = 1000.0


def _noise(seed, n=3000):
    return np.random.default_rng(seed).standard_normal(n) * 100


def test_folder_rule_is_the_readers(tmp_path):
    """In a folder, ``folder_files`` filtered by ``is_waveform_file`` gives exactly the files
    ``read_corpus`` reads, and the rest of ``folder_files`` are exactly ``Corpus.skipped``; the
    content decides, never the name (a miniSEED file named .json is read, numbers in a .txt are
    read, prose in a .csv is skipped), and hidden files and folders are not looked at. Source:
    the Corpus contract in DEVELOPERS.md (format recognised from the content)."""
    trace = Trace(np.rint(_noise(0)).astype(np.int32), header={
        "network": "XX", "station": "A1", "location": "00", "channel": "HHZ",
        "sampling_rate": FS, "starttime": UTCDateTime(2026, 2, 3)})
    Stream([trace]).write(str(tmp_path / "meta.json"), format="MSEED", encoding="STEIM2")
    np.save(tmp_path / "b.npy", _noise(1))
    np.savetxt(tmp_path / "numbers.txt", _noise(2))
    (tmp_path / "sub").mkdir()
    np.savetxt(tmp_path / "sub" / "c.csv", _noise(3))
    (tmp_path / "prose.csv").write_text("station notes\nthe sensor was moved on Monday\n")
    (tmp_path / "README.md").write_text("# corpus\nrecorded at the test site\n")
    (tmp_path / "empty.mseed").write_bytes(b"")
    (tmp_path / ".hidden.npy").write_bytes((tmp_path / "b.npy").read_bytes())
    (tmp_path / ".cache").mkdir()
    np.save(tmp_path / ".cache" / "d.npy", _noise(4))

    looked_at = folder_files(tmp_path)
    chosen = {f for f in looked_at if is_waveform_file(f)}
    corpus = read_corpus(tmp_path, windowing="whole", csv_sampling_rate_hz=FS)

    assert chosen == set(corpus.files)
    assert set(looked_at) - chosen == {s["file"] for s in corpus.skipped}
    assert {os.path.relpath(f, tmp_path) for f in chosen} == {
        "meta.json", "b.npy", "numbers.txt", os.path.join("sub", "c.csv")}
    assert not any(os.path.basename(f).startswith(".") or ".cache" in f for f in looked_at)
