"""`burstlens inspect` and `burstlens demo-corpus` (service/commands/inspect.py, demo_corpus.py)."""
import hashlib
import json
import os

from burstlens.service.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DEMO = os.path.join(ROOT, "demo_corpus")


def test_inspect_demo_shows_traces_windows_defaults(capsys):
    """`burstlens inspect demo_corpus/` exits 0 and prints every trace with SEED id, rate and
    duration, the windows found, the defaults chosen and the rejections line (DESIGN §9)."""
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
    """`inspect` draws its progress on stderr, naming the files read, the hours of data and the
    windows found (the demo: 5 files of three 60 s traces, 0.25 h), and prints the same summary
    on stdout as with --quiet, which draws nothing (DESIGN §9: inspect's summary)."""
    assert main(["inspect", DEMO]) == 0
    shown = capsys.readouterr()
    assert main(["inspect", DEMO, "--quiet"]) == 0
    quiet = capsys.readouterr()
    assert shown.out == quiet.out and quiet.err == ""
    last = shown.err.replace("\r", "\n").strip().splitlines()[-1]
    found = next(line.split(": ")[1] for line in shown.out.splitlines() if line.startswith("  windows_found: "))
    assert last.startswith("cutting 15/15 ")
    assert last.endswith(f"5 files, 0.25 h of data, {found} windows found")
