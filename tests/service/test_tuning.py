"""The one tuning pipeline (service.tuning) that `burstlens tune` and the worker's search jobs run:
what differs between the two is a parameter, and the files are those of service.results."""
import json

import numpy as np
import pytest

from burstlens.search.corpus import Corpus
from burstlens.search.documents import JobRecord
from burstlens.search.settings import JobSettings
from burstlens.service import tuning
from burstlens.service.results import DIAGNOSTICS_JSON, FILTERBANK_JSON, WINDOWS_NPY

FS, N, M = 1000.0, 256, 12
SERVER = "/srv/burstlens/blobs/corpora/3f2a"
SETTINGS = JobSettings(channels=6, evaluations=4, refine=False, bootstrap=0)


def _corpus():
    """Gaussian bursts at 100 Hz at random onsets in light noise, 'read' from a server path."""
    rng = np.random.default_rng(0)
    u = np.arange(N) / FS - rng.uniform(0.08, 0.16, (M, 1))
    windows = np.exp(-(u / 0.01) ** 2) * np.cos(2 * np.pi * 100 * u) + 0.01 * rng.standard_normal((M, N))
    meta = [{"file": f"{SERVER}/a.npy", "trace_id": "XX.TUN..HHZ", "start": None, "offset_s": 0.5 * i}
            for i in range(M)]
    return Corpus(windows, FS, meta, [], [], {}, "made up", files=[f"{SERVER}/a.npy"])


@pytest.fixture(scope="module")
def fitted():
    corpus = _corpus()
    return corpus, tuning.fit(corpus, SETTINGS)


def test_final_newline_is_the_only_difference(fitted, tmp_path):
    """Property: the same fit written with final_newline False (`burstlens tune`) and True (the
    service) gives files that differ by exactly one trailing newline, each strict JSON with
    indent 1 (the documents' encoding: json.dumps(indent=1, allow_nan=False), Python stdlib)."""
    corpus, search = fitted
    bare = tuning.write_results(tmp_path / "tune", search, corpus, final_newline=False)
    lined = tuning.write_results(tmp_path / "job", search, corpus, final_newline=True)
    assert bare.written == lined.written == (FILTERBANK_JSON, DIAGNOSTICS_JSON)
    for name in bare.written:
        plain = (tmp_path / "tune" / name).read_bytes()
        assert (tmp_path / "job" / name).read_bytes() == plain + b"\n"
        assert plain == json.dumps(json.loads(plain), indent=1, allow_nan=False).encode()


def test_rename_keeps_server_paths_from_the_files(fitted, tmp_path):
    """Property: with the worker's renamer, no server path reaches the written documents; the
    client's file name stands in its place; without one, the documents are the search's own."""
    corpus, search = fitted
    tuned = tuning.write_results(tmp_path, search, corpus, job=JobRecord("j1", {"channels": 6}),
                                 rename=lambda text: text.replace(f"{SERVER}/a.npy", "site.npy"))
    text = (tmp_path / DIAGNOSTICS_JSON).read_text() + (tmp_path / FILTERBANK_JSON).read_text()
    assert SERVER not in text and "site.npy" in text
    assert tuned.filterbank.data["job"] == {"id": "j1", "settings": {"channels": 6}}
    plain = tuning.write_results(tmp_path / "plain", search, corpus)
    assert SERVER in (tmp_path / "plain" / DIAGNOSTICS_JSON).read_text()
    assert "job" not in plain.filterbank.data


def test_window_sample_and_unknown_extra(fitted, tmp_path):
    """Property: extra windows.npy keeps the corpus's windows as a plain .npy (read back by
    numpy.load without pickle, equal to the windows); an extra that is no result file is a
    ValueError naming it, after the documents are written."""
    corpus, search = fitted
    tuned = tuning.write_results(tmp_path, search, corpus, extra=(WINDOWS_NPY,))
    assert tuned.written[-1] == WINDOWS_NPY
    np.testing.assert_array_equal(np.load(tmp_path / WINDOWS_NPY, allow_pickle=False), corpus.windows)
    with pytest.raises(ValueError, match="'notes.txt'"):
        tuning.write_results(tmp_path / "x", search, corpus, extra=("notes.txt",))


def test_a_failed_write_is_results_not_written(fitted, tmp_path):
    """Property: an OSError writing a document surfaces as ResultsNotWritten naming the cause
    (the worker retries the attempt with that message)."""
    corpus, search = fitted

    def full(path, data):
        raise OSError(28, "No space left on device")

    with pytest.raises(tuning.ResultsNotWritten, match="OSError.*No space left"):
        tuning.write_results(tmp_path, search, corpus, write=full)


def test_fitted_false_writes_nothing(tmp_path):
    """Property: a caller refusing the fit (a job withdrawn meanwhile) gets None and no file."""
    seen = []
    assert tuning.tune(_corpus(), SETTINGS, tmp_path / "out", extra=(),
                       fitted=lambda search: seen.append(search) or False) is None
    assert len(seen) == 1 and hasattr(seen[0], "filterbank_")
    assert not (tmp_path / "out").exists()


def test_a_refused_resume_starts_over_only_when_the_caller_says_so():
    """Property: a state the search refuses (not a search state) propagates its ValueError,
    unless on_resume_refused returns True: then the fit starts over and gives the filterbank of
    a fresh run (determinism for a given seed, docs/design.md §5.5)."""
    corpus = _corpus()
    with pytest.raises(ValueError):
        tuning.fit(corpus, SETTINGS, resume_from={"not": "a state"})
    refused = []
    again = tuning.fit(corpus, SETTINGS, resume_from={"not": "a state"},
                       on_resume_refused=lambda exc: refused.append(exc) or True)
    assert len(refused) == 1 and isinstance(refused[0], ValueError)
    fresh = tuning.fit(corpus, SETTINGS)
    assert again.filterbank_.to_json() == fresh.filterbank_.to_json()
