"""Tests of search.documents: the filterbank and diagnostics documents and the NPZ layout."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from burstlens.search import Filterbank
from burstlens.search.documents import (CARRIED_OPTIONS, CHANNEL_TABLE, DiagnosticsDocument,
                              FilterbankDocument, JobRecord, npz_members)

FS = 1000.0
JOB = JobRecord("j1", {"channels": 3, "windowing": "sliding", "bandpass_hz": [5.0, 300.0],
                       "max_windows": 40, "seed": 3, "window_s": 0.256})


def _filterbank() -> Filterbank:
    fb = Filterbank.constant_area([100.0, 180.0, 300.0], 0.01, 0.8, FS, chirp_hz_per_s=250.0)
    return Filterbank(fb.channels, FS, provenance={
        "window_samples": 256, "criterion": {"name": "renyi", "alpha": 3.0}, "objective": 7.5,
        "gain_bits": 0.25, "corpus_hash": "ab" * 32, "settings": {"windowing": None}})


def test_written_document_is_the_engines_json_byte_for_byte():
    """A document of a fitted filterbank is ``Filterbank.to_json(job=...)`` itself (same keys in
    the same order, ``job`` after the engine's provenance, channels last) and encodes as strict
    JSON with indent 1, a final newline only when asked (the service's files have one,
    `burstlens tune`'s none): the files keep the bytes they had (issue 15: no format change)."""
    fb = _filterbank()
    document = FilterbankDocument.of(fb, JOB)
    expected = fb.to_json(job={"id": "j1", "settings": JOB.settings})
    assert list(document.data) == list(expected) and document.data == expected
    text = json.dumps(expected, indent=1, allow_nan=False)
    assert document.encode() == (text + "\n").encode()
    assert document.encode(final_newline=False) == text.encode()
    assert FilterbankDocument.of(fb).data == fb.to_json()


def test_read_document_gives_the_recorded_facts():
    """Read back, the typed properties are what was written: rate, window samples and length
    (N / fs), criterion, objective, gain, corpus hash, the engine's settings and the job with its
    settings as submitted; the filterbank equals the one written (docs/design.md §8)."""
    fb = _filterbank()
    document = FilterbankDocument.read(json.loads(FilterbankDocument.of(fb, JOB).encode()))
    assert document.filterbank == fb and document.version == 3
    assert (document.sampling_rate_hz, document.window_samples) == (FS, 256)
    assert document.window_s == 256 / FS
    assert document.criterion == {"name": "renyi", "alpha": 3.0}
    assert (document.objective, document.gain_bits, document.corpus_hash) == (7.5, 0.25, "ab" * 32)
    assert document.tuning_settings == {"windowing": None}
    assert document.job == JOB and document.job_settings == JOB.settings
    assert len(document.channels) == 3


def test_version_1_is_read_through_filterbank_from_json():
    """A version-1 file is read by Filterbank.from_json (chirp and correlation negated, the
    conversion noted in the provenance) and its other facts read as in version 2 (docs/design.md §3, §8;
    search/filterbank.py docstring)."""
    fb = _filterbank()
    old = fb.to_json()
    old["version"] = 1
    for channel in old["channels"]:
        channel["chirp_hz_per_s"], channel["correlation"] = (-channel["chirp_hz_per_s"],
                                                             -channel["correlation"])
    document = FilterbankDocument.read(old)
    assert document.version == 1 and document.filterbank == fb
    assert document.filterbank.provenance["converted_from_version"] == 1
    assert document.window_samples == 256 and document.objective == 7.5


def test_missing_parts_read_as_none_and_bad_files_fail_on_read():
    """A document lacking what the tuning records reads None or {} part by part (the report
    renders what is there); ``read`` checks the channels and names the field. Common practice."""
    bare = FilterbankDocument({"channels": []})
    assert (bare.sampling_rate_hz, bare.window_samples, bare.window_s, bare.objective,
            bare.gain_bits, bare.job, bare.job_settings) == (None,) * 7
    assert bare.tuning_settings == {} and bare.corpus_options == {}
    assert FilterbankDocument({"window_samples": True, "objective": float("nan")}).window_samples \
        is None
    with pytest.raises(ValueError, match="format"):
        FilterbankDocument.read({"format": "something-else"})
    with pytest.raises(ValueError, match="not JSON"):
        FilterbankDocument.loads("{")


def test_reading_options_carry_how_the_tuning_cut_its_corpus():
    """New files are read at the filterbank's rate and window length, with the corpus options
    that say how windows are cut (the job's settings over its corpus upload's options); the
    sample size and seed of the tuning corpus are not carried (issue 15, the transform bug)."""
    document = FilterbankDocument.of(_filterbank(), JOB)
    assert set(CARRIED_OPTIONS).isdisjoint({"max_windows", "seed", "sampling_rate_hz", "window_s"})
    assert document.corpus_options == {"windowing": "sliding", "bandpass_hz": [5.0, 300.0]}
    read = document.reading_options({"windowing": "whole", "trigger": "exponential",
                                     "max_windows": 7})
    assert read == {"sampling_rate_hz": FS, "window_s": 0.256, "windowing": "sliding",
                    "bandpass_hz": [5.0, 300.0], "trigger": "exponential"}
    assert FilterbankDocument.of(_filterbank()).reading_options() == {"sampling_rate_hz": FS,
                                                                      "window_s": 0.256}


def test_a_bad_recorded_option_is_named():
    """A corpus option in the job's settings that the reader would refuse is a ValueError naming
    the job's settings and the option (project rule: errors name the field)."""
    document = FilterbankDocument.of(_filterbank(), JobRecord("j2", {"windowing": "diagonal"}))
    with pytest.raises(ValueError, match=r"job\.settings.*windowing"):
        document.reading_options()
    with pytest.raises(ValueError, match="windowing"):
        FilterbankDocument.read(document.data)


def test_diagnostics_document_reads_old_and_cancelled_runs():
    """Diagnostics without a judgement (a cancelled run, or one from before the held-out
    judgement) read ``judgement`` None; the reader's record gives the windowing; numbers that are
    not finite read None (DEVELOPERS.md, diagnostics_ keys)."""
    old = DiagnosticsDocument({"stop_reason": "budget", "gain_bits": 0.5, "version": "0.0.9",
                               "result": {"objective": 3.25},
                               "corpus": {"defaults": {"windowing": "bursts"}}})
    assert old.judgement is None and old.windowing == "bursts"
    assert (old.stop_reason, old.gain_bits, old.objective, old.version) == ("budget", 0.5, 3.25,
                                                                            "0.0.9")
    cancelled = DiagnosticsDocument({"stop_reason": "cancelled", "judgement": None,
                                     "gain_bits": None, "result": None})
    assert (cancelled.judgement, cancelled.gain_bits, cancelled.objective) == (None, None, None)
    assert cancelled.evaluations == [] and cancelled.settings == {} and cancelled.corpus == {}
    assert cancelled.reader_defaults is None and cancelled.windowing is None
    judged = DiagnosticsDocument({"judgement": {"in_sample": False}, "gain_bits": math.inf})
    assert judged.judgement == {"in_sample": False} and judged.gain_bits is None


def test_npz_members_are_plain_arrays_in_one_order():
    """The transform NPZ holds the image (M, C, N) float32, the sample times, the channel table
    (C,) float64, the rate and per-window file, trace id and offset, all plain (non-object)
    arrays so np.load needs no pickles (docs/design.md §8); file names go through ``file_name``, and a
    window without a recorded offset gets NaN."""
    fb = _filterbank()
    image = np.ones((2, 3, 4))
    meta = [{"file": "/srv/0000.npz", "trace_id": "XX.A.00.HHZ", "offset_s": 1.5},
            {"file": "/srv/0000.npz", "trace_id": "XX.A.00.HHZ"}]
    members = npz_members(image, fb, meta, {"/srv/0000.npz": "mine.npz"}.get)
    assert list(members) == ["representation", "times_s", *CHANNEL_TABLE, "sampling_rate_hz",
                             "window_file", "window_trace_id", "window_offset_s"]
    assert members["representation"].dtype == np.float32
    assert members["representation"].shape == (2, 3, 4)
    np.testing.assert_array_equal(members["times_s"], np.arange(4) / FS)
    for name in CHANNEL_TABLE:
        np.testing.assert_array_equal(members[name], getattr(fb, name))
        assert members[name].dtype == np.float64
    assert members["sampling_rate_hz"] == FS
    assert members["window_file"].tolist() == ["mine.npz", "mine.npz"]
    assert members["window_trace_id"].tolist() == ["XX.A.00.HHZ"] * 2
    assert members["window_offset_s"][0] == 1.5 and math.isnan(members["window_offset_s"][1])
    assert all(array.dtype != object for array in members.values())
