"""`burstlens submit`: what it uploads from a folder."""
import numpy as np
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import read_corpus
from burstlens.service.cli import main
from burstlens.service.testing import recording_client

FS = 1000.0


def _noise(seed, n=3000):
    return np.random.default_rng(seed).standard_normal(n) * 100


def test_submit_uploads_exactly_the_files_the_reader_reads(tmp_path, monkeypatch):
    """From a folder of waveforms (miniSEED, numeric CSV, .npy, numbers in a .txt, one in a
    sub-folder) mixed with documentation and metadata (README.md, settings.json, prose in a
    .dat, an empty file, hidden files), submit uploads exactly ``read_corpus(folder).files``:
    the upload holds what the job reads, no README, no waveform left behind. Source: the Corpus
    contract in DEVELOPERS.md (the reader recognises formats from the content)."""
    from burstlens.service.commands import submit

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
    monkeypatch.setattr(submit, "Client", recording_client(calls))
    assert main(["submit", str(tmp_path), "--server", "http://127.0.0.1:1",
                 "--csv-sampling-rate", str(FS), "--windowing", "whole"]) == 0
    read = read_corpus(tmp_path, csv_sampling_rate_hz=FS, windowing="whole").files
    assert sorted(calls["files"]) == sorted(read)
    assert {str(tmp_path / name) for name in ("a.mseed", "b.csv", "c.npy", "numbers.txt")} \
        <= set(calls["files"]) and len(calls["files"]) == 5


def test_follow_keeps_the_fit_best_apart_from_the_judgement():
    """The server's progress of a search, as `submit` shows it: during the judge stage the bar
    names the fit's best (from the family stage) and says it is judging, never showing the
    judge stage's own objective (other windows) as the best."""
    import io

    from burstlens.service.commands.submit import follow

    class Polled:
        def wait(self, job_id, on_progress, poll_s):
            base = {"id": job_id, "state": "working"}
            on_progress({**base, "progress": {"stage": "family", "round": 2, "evaluations": 8,
                                              "budget": 16, "best_objective": 4.25, "fraction": 0.4}})
            on_progress({**base, "progress": {"stage": "judge", "round": 3, "evaluations": 16,
                                              "budget": 16, "best_objective": 5.75, "fraction": 0.9}})
            return {**base, "state": "done"}

    stream = io.StringIO()
    assert follow(Polled(), "j1", stream=stream)["state"] == "done"
    shown = stream.getvalue()
    assert "fit best 4.2500 bits" in shown and "judging on the held-out windows" in shown
    assert "5.75" not in shown
