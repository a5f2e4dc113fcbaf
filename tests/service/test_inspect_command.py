"""`burstlens inspect` and `burstlens demo-corpus` (service/commands/inspect.py, demo_corpus.py)."""
import hashlib
import json
import os

import pytest

from burstlens.service.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "demo_corpus")


def test_inspect_demo_shows_traces_windows_defaults(capsys):
    """`burstlens inspect demo_corpus/` exits 0 and prints every trace with SEED id, rate and
    duration, the windows found, the defaults chosen and the rejections line (docs/design.md §9)."""
    assert main(["inspect", DEMO]) == 0
    out = capsys.readouterr().out
    assert "windows of 1024 samples (256 ms) at 4000 Hz" in out
    for station in ("Q215A", "Q215B", "Q245A", "Q245B", "Q275A"):
        for channel in ("GPZ", "GPN", "GPE"):
            assert f"XX.{station}.00.{channel}" in out
    assert "defaults chosen:" in out and "sta_s:" in out and "trigger_on: 3.5" in out
    assert "rejections:" in out
    assert "60.000 s" in out


def test_inspect_json_matches_the_corpus_summary(capsys):
    """`inspect --json` prints Corpus.to_json(): window count, hash and defaults as JSON."""
    from burstlens.search.corpus import read_corpus

    assert main(["inspect", DEMO, "--json", "--components", "Z"]) == 0
    summary = json.loads(capsys.readouterr().out)
    corpus = read_corpus(DEMO, components="Z")
    assert summary["n_windows"] == corpus.n_windows
    assert summary["source_hash"] == corpus.source_hash
    assert summary["defaults"]["components"] == "Z"


def test_inspect_reads_on_two_processes_with_the_same_result(capsys):
    """`inspect --jobs 2` reads the demo's five stations on two local processes (one task per
    file, then per station's files) and prints the same JSON summary as one process: same windows
    hash, defaults, records. Source: the reader's contract (a mapper changes nothing)."""
    assert main(["inspect", DEMO, "--json", "--quiet"]) == 0
    one = capsys.readouterr().out
    assert main(["inspect", DEMO, "--json", "--quiet", "--jobs", "2"]) == 0
    assert capsys.readouterr().out == one


def test_inspect_bad_input_exits_2_with_the_message(tmp_path, capsys):
    """A CorpusError is printed on stderr, naming the file and the cause, with exit code 2."""
    junk = tmp_path / "junk.dat"
    junk.write_bytes(b"\x01\x02\x03" * 100)
    assert main(["inspect", str(junk)]) == 2
    err = capsys.readouterr().err
    assert str(junk) in err and "unknown format" in err


def test_demo_corpus_command_writes_identical_files(tmp_path, capsys):
    """`burstlens demo-corpus --out DIR` writes the committed files byte for byte and prints their
    sha256 (FIPS 180-4 via hashlib)."""
    assert main(["demo-corpus", "--out", str(tmp_path)]) == 0
    printed = dict(line.split("  ")[::-1] for line in capsys.readouterr().out.strip().splitlines())
    for path, digest in printed.items():
        with open(os.path.join(DEMO, os.path.basename(path)), "rb") as fh:
            assert hashlib.sha256(fh.read()).hexdigest() == digest
    assert len(printed) == 6


def test_inspect_progress_bar_on_stderr_leaves_stdout_unchanged(capsys):
    """`inspect` draws its progress on stderr, naming the files read, the trace-hours read and
    the windows found (the demo: 5 files of three 60 s traces, 0.25 trace-hours), and prints the
    same summary on stdout as with --quiet, which draws nothing (docs/design.md §9: inspect's summary)."""
    assert main(["inspect", DEMO]) == 0
    shown = capsys.readouterr()
    assert main(["inspect", DEMO, "--quiet"]) == 0
    quiet = capsys.readouterr()
    assert shown.out == quiet.out and quiet.err == ""
    last = shown.err.replace("\r", "\n").strip().splitlines()[-1]
    found = next(line.split(": ")[1] for line in shown.out.splitlines() if line.startswith("  windows_found: "))
    assert last.startswith("cutting 15/15 ")
    assert last.endswith(f"5 files, 0.25 trace-hours, {found} windows found")


def test_inspect_counts_station_hours_and_trace_hours_each_named(capsys):
    """The demo is one minute of record at five 3-component stations (demo_corpus/README.md):
    the summary says 5 stations, 15 traces, 5/60 = 0.0833 station-hours and 15/60 = 0.25
    trace-hours, naming each, with the UTC span of the record."""
    assert main(["inspect", DEMO, "--quiet"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[1] == "record: 5 stations, 15 traces, 2026-03-17 02:00:00 to 2026-03-17 02:01:00 UTC"
    assert out[2].startswith("  0.0833 station-hours (each station's time on record), "
                             "0.25 trace-hours (every trace's length summed)")


def test_record_hours_counts_a_stations_time_once():
    """Station-hours: per station (NET.STA of the SEED id NET.STA.LOC.CHA; FDSN SEED Reference
    Manual v2.4, 2012, field order from memory), the length of the union of its traces' spans,
    so the components of one station and overlapping pieces count once and a gap counts
    nothing; trace-hours: every trace's length summed (common practice). Worked by hand:
    station A has Z, N, E over 02:00–03:00 (1 h) plus a Z piece 02:30–03:30 (union 02:00–03:30,
    1.5 h); station B has 02:00–02:15 and 02:45–03:00 (0.5 h); a WAV trace with no start time
    adds 0.25 h of its own. Trace-hours: 3 + 1 + 0.25 + 0.25 + 0.25 = 4.75 h."""
    from burstlens.service.commands.inspect import record_hours

    def trace(trace_id, start, hours):
        return {"trace_id": trace_id, "start": start, "duration_s": 3600.0 * hours}

    traces = [trace(f"XX.A.00.GP{c}", "2026-03-17T02:00:00.000000Z", 1.0) for c in "ZNE"]
    traces += [trace("XX.A.10.GPZ", "2026-03-17T02:30:00.000000Z", 1.0),
               trace("XX.B.00.GPZ", "2026-03-17T02:00:00.000000Z", 0.25),
               trace("XX.B.00.GPZ", "2026-03-17T02:45:00.000000Z", 0.25),
               trace(".event1.00.", None, 0.25)]
    r = record_hours(traces)
    assert (r.stations, r.traces) == (3, 7)
    assert r.station_hours == pytest.approx(1.5 + 0.5 + 0.25, abs=1e-12)
    assert r.trace_hours == pytest.approx(4.75, abs=1e-12)
    assert r.first.isoformat() == "2026-03-17T02:00:00+00:00"
    assert r.last.isoformat() == "2026-03-17T03:30:00+00:00"
