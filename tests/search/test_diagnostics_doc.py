"""Tests of search.diagnostics_doc: diagnostics.json read into typed records, and written back.

The byte checks compare with the JSON text itself (RFC 8259 via Python's ``json``, strict: no
NaN); the rest is common practice for a versioned reader: today's files, the older shapes the
readers tolerate, and missing or wrongly typed parts reading None in one place.
"""
from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest

from burstlens.search.diagnostics_doc import (Baseline, Diagnostics, Interval, Judgement,
                                              PerWindow)
from burstlens.search.documents import DiagnosticsDocument, encode

FIXTURE = (Path(__file__).parents[1] / "fixtures" / "datadir-schema1" / "blobs" / "results"
           / "78da625babfc410499ae02012abc6ae0" / "attempt-1" / "diagnostics.json")


def test_a_stored_file_reads_typed_and_writes_back_byte_for_byte():
    """The diagnostics.json of the stored data dir (written by the service's worker of the first
    release, tests/fixtures/datadir-schema1) reads as schema 2 with each typed field equal to
    its JSON value, and ``encode(to_json())`` is the file's bytes (strict JSON, indent 1, final
    newline: the worker's encoding)."""
    raw = FIXTURE.read_bytes()
    obj = json.loads(raw)
    d = Diagnostics.from_json(obj)
    assert encode(d.to_json()) == raw and list(d.to_json()) == list(obj)
    judged = obj["judgement"]
    assert d.schema == 2 and isinstance(d.judgement, Judgement)
    assert (d.judgement.held_out_windows, d.judgement.fit_windows, d.judgement.in_sample) == \
        (judged["held_out_windows"], judged["fit_windows"], judged["in_sample"])
    assert d.judgement.gain_bits.estimate == judged["gain_bits"]["estimate"] == d.gain_bits
    assert d.judgement.gain_bits.resamples == judged["gain_bits"]["resamples"]
    assert d.judgement.onset.result.median_ms == judged["onset"]["result"]["median_ms"]
    assert set(d.judgement.scorecard.representations) == \
        set(judged["scorecard"]["representations"])
    assert d.judgement.scorecard.to_json() == judged["scorecard"]
    assert d.result == Interval.from_json(obj["result"]) and d.result.objective == \
        obj["result"]["objective"]
    assert d.spectrogram.time_spread_s == \
        obj["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
    assert len(d.evaluations) == len(obj["evaluations"])
    assert [e.to_json() for e in d.evaluations] == obj["evaluations"]
    assert d.bootstrap.channels[0].time_spread_s == \
        tuple(obj["bootstrap"]["channels"][0]["time_spread_s"])
    assert d.fallback.from_origin == obj["fallback"]["from"]
    assert d.windows.used == obj["windows"]["used"] and d.stop_reason == obj["stop_reason"]
    assert d.channel_centres == tuple(r["center_hz"] for r in obj["refinement"])


def test_an_engine_run_round_trips_and_its_document_delegates():
    """A real FilterbankSearch's ``diagnostics_`` (today's engine) reads back: ``to_json`` is the
    engine's dict, key order included, so the encoded bytes are the engine's; the document's
    properties the worker reads (objective, gain, stop reason, evaluations) are the typed ones."""
    from burstlens.search import FilterbankSearch
    from burstlens.search.corpus import Corpus

    fs, n, m = 1000.0, 256, 8
    t = np.arange(n) / fs
    rng = np.random.default_rng(1)
    windows = np.array([np.exp(-0.5 * ((t - 0.12) / 0.02) ** 2)
                        * np.cos(2 * np.pi * (80 + 30 * k) * (t - 0.12))
                        + 0.02 * rng.standard_normal(n) for k in range(m)])
    corpus = Corpus(windows=windows, sampling_rate_hz=fs,
                    window_meta=[{"trace_id": "XX.T01..HHZ", "offset_s": 0.5 * k,
                                  "trigger_offset_s": 0.064} for k in range(m)],
                    traces=[], rejections=[], defaults={"windowing": "bursts"},
                    source_hash="5e" * 32)
    search = FilterbankSearch(channels=4, evaluations=4, refine=False, bootstrap=2,
                              seed=3).fit(corpus)
    engine = json.loads(json.dumps(search.diagnostics_))   # as a reader gets it from the file
    d = Diagnostics.from_json(engine)
    assert d.to_json() == engine and list(d.to_json()) == list(engine)
    assert encode(d.to_json()) == encode(search.diagnostics_)
    assert d.schema == 2 and d.judgement is not None
    document = DiagnosticsDocument(engine)
    assert document.typed == d
    assert document.objective == d.result.objective == engine["result"]["objective"]
    assert document.gain_bits == engine["gain_bits"] and document.stop_reason == \
        engine["stop_reason"]
    assert document.evaluations == engine["evaluations"]


def old_diagnostics() -> dict:
    """A file from before the held-out judgement: no ``judgement``; per-window scores without
    their window indices; baselines without negative shares; a bootstrap key since dropped."""
    return {"stop_reason": "budget", "gain_bits": 0.5, "version": "0.0.9",
            "result": {"objective": 9.1, "low": 9.0, "high": 9.3},
            "baselines": {"spectrogram": {"objective": 9.6, "parameters": {"time_spread_s": 0.004}},
                          "pseudo_wvd": None},
            "per_window": {"result": [9.0, 9.2], "spectrogram": [9.5, float("nan")]},
            "bootstrap": {"resamples": 4, "objective": {"estimate": 9.1},
                          "channels": [{"time_spread_s": [0.001, 0.01]}, None]},
            "windows": {"used": [0, 1, 2], "rejected": 0},
            "corpus": {"defaults": {"windowing": "bursts"}}}


def test_a_file_from_before_the_judgement_reads_as_schema_1():
    """Schema 1: judgement None (so no onset, scorecard, negative shares or bounds), per-window
    indices None (scores in corpus order), a missing baseline field None, a baseline recorded
    as null an empty record, a list of used windows counted; to_json keeps every key, the
    dropped bootstrap ``objective`` too."""
    obj = old_diagnostics()
    d = Diagnostics.from_json(copy.deepcopy(obj))
    assert d.schema == 1 and d.judgement is None and d.to_json() == obj
    assert d.per_window == PerWindow(result=(9.0, 9.2), spectrogram=(9.5, None), windows=None)
    assert d.spectrogram.negative_share is None and d.spectrogram.time_spread_s == 0.004
    assert d.baselines["pseudo_wvd"] == Baseline() and d.baselines["pseudo_wvd"].objective is None
    assert d.bootstrap.channels[1] is None and d.bootstrap.channels[0].cell_area is None
    assert d.bootstrap.to_json()["objective"] == {"estimate": 9.1}
    assert (d.windows.used, d.windows.rejected) == (3, 0)
    assert d.corpus.windowing == "bursts" and d.corpus.defaults == {"windowing": "bursts"}


def test_a_cancelled_run_reads_none_for_every_judged_part():
    """Schema 2 with ``stop_reason`` cancelled (DEVELOPERS.md, diagnostics_): judgement, result,
    bootstrap, gain and fallback None; baselines and per-window scores empty."""
    d = Diagnostics.from_json({"stop_reason": "cancelled", "judgement": None, "result": None,
                               "baselines": None, "bootstrap": None, "gain_bits": None,
                               "per_window": None, "fallback": None})
    assert d.schema == 2 and d.cancelled
    assert (d.judgement, d.result, d.bootstrap, d.gain_bits, d.fallback) == (None,) * 5
    assert d.baselines == {} and d.per_window == PerWindow() and d.evaluations == ()
    assert d.spectrogram is None and d.channel_centres is None


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, True, "0.5", [0.5], None])
def test_a_number_of_the_wrong_kind_reads_none(value):
    """Non-finite numbers, booleans, numeric strings, lists and null all read None, wherever the
    file holds a number or a count; the document keeps the value as it was."""
    obj = {"gain_bits": value, "judgement": {"held_out_windows": value, "gain_bits": {
        "estimate": value, "resamples": value}, "negative_share": {"per_channel": [value, 0.1]}}}
    d = Diagnostics.from_json(obj)
    assert d.gain_bits is None and d.judgement.held_out_windows is None
    assert d.judgement.gain_bits.estimate is None and d.judgement.gain_bits.resamples is None
    assert d.judgement.negative_share.per_channel == (None, 0.1)
    assert d.to_json()["gain_bits"] is value


def test_what_is_not_an_object_is_refused_naming_the_document():
    """A diagnostics file whose top level is not a JSON object is a ValueError that names it
    (project rule: errors name the field); None, for the readers, is a run recording nothing."""
    with pytest.raises(ValueError, match="diagnostics: expected a JSON object, got list"):
        Diagnostics.from_json([])
    assert Diagnostics.of(None) == Diagnostics.from_json({})
    assert Diagnostics.of(None).schema == 1


def test_the_readers_say_the_same_of_the_json_and_of_the_typed_record():
    """The verdict, the report's plot entries and the CLI summary give the same words for the
    JSON object and its typed reading (one reading, in from_json)."""
    from burstlens.service import verdict
    from burstlens.service.commands.tune import summary_lines
    from burstlens.service.report.figures import baseline_entries

    for obj in (json.loads(FIXTURE.read_text()), old_diagnostics()):
        d = Diagnostics.from_json(obj)
        assert verdict.lines(obj) == verdict.lines(d)
        assert verdict.gain_words(obj) == verdict.gain_words(d)
        assert baseline_entries(obj) == baseline_entries(d)
        assert summary_lines(obj) == summary_lines(d)
