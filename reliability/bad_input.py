"""Experiment 4 — bad input: generated cases against the readers, the JSON API and the uploads.

Promise (docs/design.md §6, §7): bad input gets a clear error naming the file or field and the cause,
never a 5xx; nothing half-ingested is kept; ``.npy``/``.npz`` are never unpickled.

Five parts, each seeded and bounded, at least 10^5 cases in a full run:

- readers through ``search.read_corpus`` on hypothesis-generated files: arbitrary bytes, and
  mutations (bit flips, truncation, insertions, deletions, extreme header integers and floats) of
  a valid file of every format (miniSEED Steim-2 and float, SAC, SEG-Y, WAV int16 and float, NPY,
  NPZ, CSV), plus object-array NumPy files one of which creates a marker file if unpickled.
- readers at the reader (:func:`reader_bulk`): the same seeds under seeded mutations (also cuts
  at a miniSEED record boundary), format detection as the corpus reader does it, then the
  whole-file read or the streamed read in small blocks, alternately.
- miniSEED cuts and garbage records (:func:`mseed_sweep`): real files (ObsPy's test data,
  ``obspy.read()``'s example as ObsPy writes it, our Steim-2 seed) cut at every byte (files up to
  8 KiB) or at every record boundary and at fixed and seeded points inside every record, and
  every record replaced by garbage of ten kinds; each read has one right outcome (the samples of
  the remaining records, or a ``CorpusError`` naming the cut or garbage record's byte offset).

  The reader parts run in a child process with a memory limit, a per-case alarm and a temp folder
  of their own, so a reader that blows up cannot take the campaign with it. A failure is any
  exception other than ``CorpusError``, a ``CorpusError`` that does not name the file, a case over
  the alarm, a wrong outcome, the marker appearing, or a file left in the work or temp folder.
- JSON API — schemathesis against the live server's ``/openapi.json`` with every check enabled
  and all phases (examples, coverage, fuzzing, stateful). Counted: answers, 5xx, answers that say
  they are JSON (any ``+json`` media type) and do not parse, each check's failures; afterwards the
  data dir is audited for orphans (files without rows, rows without files, unfinished uploads).
  Only status classes and media types are read, never an error body's layout or a state name.
- uploads — hand-built multipart bodies (wrong part names, huge part and request headers,
  zero-byte files, path-like and hostile file names, object-array NPZ, broken framing, mutated
  valid files) sent to ``POST /v1/corpora`` and ``POST /v1/transform``; the data dir's files and
  every table are compared before and after each request that did not create a corpus (an
  accepted corpus is deleted again through the API before the next case).
"""
from __future__ import annotations

import argparse
import json
import os
import random
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

from reliability.harness import (ROOT, corpus_files, DataDirAudit, LiveServer, remove_tree, Row)

GOAL = "0 5xx, 0 state left behind"
EXTENSIONS = ("", ".mseed", ".sac", ".segy", ".sgy", ".wav", ".npy", ".npz", ".csv", ".txt", ".bin")
WINDOWINGS = ("bursts", "whole", "sliding")
CASE_ALARM_S = 20


# -- readers (child process) -----------------------------------------------------------------
class _Alarm(Exception):
    pass


def _on_alarm(*_):
    raise _Alarm()


def reader_fuzz(cases: int, seed: int, workdir: Path) -> dict:
    """Run ``cases`` reader cases (half arbitrary bytes, half mutated valid files)."""
    import hypothesis
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from reliability.samples import hostile_files, mutate, valid_files
    from burstlens.search.corpus import CorpusError, read_corpus

    marker = workdir / "UNPICKLED"
    seeds = {**valid_files(), **hostile_files(str(marker))}
    outcome: Counter = Counter()
    failures: list[str] = []
    slowest = [0.0]
    signal.signal(signal.SIGALRM, _on_alarm)

    def check(blob: bytes, ext: str, windowing: str, label: str) -> None:
        path = workdir / f"case{outcome.total():06d}{ext}"
        path.write_bytes(blob)
        t0 = time.monotonic()
        signal.alarm(CASE_ALARM_S)
        try:
            read_corpus([str(path)], windowing=windowing, csv_sampling_rate_hz=1000.0)
            outcome["read"] += 1
        except CorpusError as exc:
            if path.name not in str(exc):
                outcome["error not naming the file"] += 1
                failures.append(f"{label}: CorpusError without the file name: {str(exc)[:160]}")
            else:
                outcome["CorpusError"] += 1
        except _Alarm:
            outcome["over the alarm"] += 1
            failures.append(f"{label}: still reading after {CASE_ALARM_S} s")
        except Exception as exc:  # the finding this part looks for
            outcome["other exception"] += 1
            failures.append(f"{label}: {type(exc).__name__}: {str(exc)[:160]} "
                            f"(first bytes {blob[:24].hex()})")
        finally:
            signal.alarm(0)
            slowest[0] = max(slowest[0], time.monotonic() - t0)
            path.unlink(missing_ok=True)

    quiet = settings(database=None, deadline=None, suppress_health_check=list(HealthCheck),
                     max_examples=max(1, cases // 2))

    @quiet
    @hypothesis.seed(seed)
    @given(blob=st.binary(max_size=8192), ext=st.sampled_from(EXTENSIONS),
           windowing=st.sampled_from(WINDOWINGS))
    def arbitrary(blob, ext, windowing):
        check(blob, ext, windowing, f"arbitrary {len(blob)} bytes as '{ext}'")

    where = st.one_of(st.floats(0.0, 0.999), st.integers(1, 700))
    op = st.one_of(
        st.tuples(st.just("flip"), where, st.integers(1, 255)),
        st.tuples(st.just("truncate"), where),
        st.tuples(st.just("insert"), where, st.binary(min_size=1, max_size=64)),
        st.tuples(st.just("delete"), where, st.integers(1, 512)),
        st.tuples(st.just("int32"), where, st.sampled_from([0, 1, -1, 2**31 - 1, -2**31, 65536, 7]),
                  st.sampled_from("<>")),
        st.tuples(st.just("float64"), where, st.sampled_from([0.0, -1.0, float("nan"), float("inf"),
                                                              -float("inf"), 1e308, 5e-324]),
                  st.sampled_from("<>")))

    @quiet
    @hypothesis.seed(seed + 1)
    @given(name=st.sampled_from(sorted(seeds)), ops=st.lists(op, min_size=0, max_size=6),
           windowing=st.sampled_from(WINDOWINGS))
    def mutated(name, ops, windowing):
        check(mutate(seeds[name], ops), "", windowing, f"{name} mutated by {ops}")

    arbitrary()
    mutated()
    if marker.exists():
        failures.append("an object array was unpickled (the marker file exists)")
    return {"cases": outcome.total(), "outcome": dict(outcome), "failures": failures[:50],
            "unpickled": marker.exists(), "slowest_s": slowest[0]}


class _Tally:
    """Outcomes and failures of one reader part; every case reads one file written to ``workdir``
    and removed again, under the per-case alarm."""

    def __init__(self, workdir: Path):
        self.workdir = workdir
        self.outcome: Counter = Counter()
        self.wrong = 0
        self.failures: list[str] = []
        self.slowest = 0.0

    def attempt(self, blob: bytes, ext: str, read, label: str, expect=None) -> None:
        """Write ``blob``, run ``read(path)``; a ``CorpusError`` must name the file. ``expect``
        (optional) gets ``(samples read or None, error text or None)`` and returns what is wrong
        with that outcome, or None."""
        from burstlens.search.corpus import CorpusError

        path = self.workdir / f"case{self.outcome.total():07d}{ext}"
        path.write_bytes(blob)
        t0 = time.monotonic()
        signal.alarm(CASE_ALARM_S)
        try:
            got, error = read(str(path)), None
            self.outcome["read"] += 1
        except CorpusError as exc:
            got, error = None, str(exc)
            if path.name not in error:
                self.outcome["error not naming the file"] += 1
                self.failures.append(f"{label}: CorpusError without the file name: {error[:160]}")
                error = None
            else:
                self.outcome["CorpusError"] += 1
        except _Alarm:
            got = error = None
            self.outcome["over the alarm"] += 1
            self.failures.append(f"{label}: still reading after {CASE_ALARM_S} s")
        except Exception as exc:  # the finding this part looks for
            got = error = None
            self.outcome["other exception"] += 1
            self.failures.append(f"{label}: {type(exc).__name__}: {str(exc)[:160]} "
                                 f"(first bytes {blob[:24].hex()})")
        finally:
            signal.alarm(0)
            self.slowest = max(self.slowest, time.monotonic() - t0)
            path.unlink(missing_ok=True)
        if expect is not None and (got is not None or error is not None):
            wrong = expect(got, error)
            if wrong:
                self.wrong += 1
                self.failures.append(f"{label}: {wrong}")

    def result(self) -> dict:
        return {"cases": self.outcome.total(), "outcome": dict(self.outcome), "wrong": self.wrong,
                "failures": self.failures[:50], "slowest_s": self.slowest}


def _read_whole(path: str) -> int:
    """Samples of one file read whole, its format found as the corpus reader finds it."""
    from burstlens.search.corpus.ingest import expand_paths
    from burstlens.search.corpus.readers import read_waveform_file

    (_, fmt), = expand_paths([path])[0]
    return sum(t.data.size for t in read_waveform_file(path, fmt, csv_sampling_rate_hz=1000.0))


def _read_streamed(path: str, chunk_bytes: int = 1024) -> int:
    """Samples of one file read as the streaming reader's first look reads it, in blocks of at
    most ``chunk_bytes`` (so a miniSEED file of more than two records streams)."""
    from burstlens.search.corpus.ingest import expand_paths
    from burstlens.search.corpus.readers import iter_waveform_chunks

    (_, fmt), = expand_paths([path])[0]
    return sum(t.data.size for block in iter_waveform_chunks(path, fmt, csv_sampling_rate_hz=1000.0,
                                                             chunk_bytes=chunk_bytes) for t in block)


def reader_bulk(cases: int, seed: int, workdir: Path) -> dict:
    """``cases`` reader cases at the reader level (format detection, then the whole-file read or
    the streamed read, alternately): a tenth arbitrary bytes, the rest a valid or hostile file
    of every format under 0–6 seeded mutations (flips, truncations anywhere or at a miniSEED
    record boundary, insertions, deletions, extreme integers and floats)."""
    from reliability.samples import hostile_files, mutate, valid_files

    seeds = {**valid_files(), **hostile_files(str(workdir / "UNPICKLED"))}
    names = sorted(seeds)
    rng = random.Random(seed)
    tally = _Tally(workdir)
    extreme_ints = [0, 1, -1, 2**31 - 1, -2**31, 65536, 7]
    extreme_floats = [0.0, -1.0, float("nan"), float("inf"), -float("inf"), 1e308, 5e-324]
    for k in range(cases):
        read = _read_whole if k % 2 == 0 else _read_streamed
        ext = rng.choice(EXTENSIONS)
        if rng.random() < 0.1:
            blob = rng.randbytes(rng.randint(0, 8192))
            tally.attempt(blob, ext, read, f"arbitrary {len(blob)} bytes as '{ext}' ({read.__name__})")
            continue
        name = rng.choice(names)
        ops = []
        for _ in range(rng.randint(0, 6)):
            where = rng.random() if rng.random() < 0.7 else rng.randint(1, 700)
            kind = rng.choice(["flip", "truncate", "insert", "delete", "int32", "float64", "record"])
            if kind == "flip":
                ops.append(("flip", where, rng.randint(1, 255)))
            elif kind == "truncate":
                ops.append(("truncate", where))
            elif kind == "record":  # cut at a record boundary of the 512-byte records
                ops.append(("truncate", 512 * rng.randint(1, max(1, len(seeds[name]) // 512))))
            elif kind == "insert":
                ops.append(("insert", where, rng.randbytes(rng.randint(1, 64))))
            elif kind == "delete":
                ops.append(("delete", where, rng.randint(1, 512)))
            elif kind == "int32":
                ops.append(("int32", where, rng.choice(extreme_ints), rng.choice("<>")))
            else:
                ops.append(("float64", where, rng.choice(extreme_floats), rng.choice("<>")))
        tally.attempt(mutate(seeds[name], ops), ext, read, f"{name} mutated by {ops} ({read.__name__})")
    out = tally.result()
    out["unpickled"] = (workdir / "UNPICKLED").exists()
    return out


def _expecting(what: str, value: int = 0):
    """The one right outcome of a sweep case: ("samples", n) read, ("record", offset) a
    CorpusError naming the record at that byte, ("error",) any CorpusError naming the file,
    ("any",) either; the check returns what is wrong, or None."""
    def expect(got, error):
        if what == "samples" and got != value:
            return f"expected {value} samples, got {got} ({error})"
        if what == "record" and (error is None or f"record at byte {value} " not in error):
            return f"expected a CorpusError naming byte {value}, got {got} samples / {error}"
        if what == "error" and error is None:
            return f"expected a CorpusError, read {got} samples"
        return None
    return expect


def mseed_sweep(seed: int, workdir: Path, every_byte: bool = True, sources: int | None = None) -> dict:
    """Truncations and garbage records of real miniSEED files, each read whole and streamed,
    each with its one right outcome (SEED Reference Manual v2.4, IRIS/FDSN 2012, ch. 8: a file
    is a sequence of records of 2^e bytes, e from blockette 1000):

    - cut on a record boundary: a valid shorter file, read to the samples its records declare;
    - cut inside record k (every byte of files up to 8 KiB, else 1, 47, 48, 55, 56, 64, half
      and length − 1 bytes into every record and three seeded points): a ``CorpusError`` naming
      the file and record k's byte offset;
    - record k replaced by garbage of every kind of :func:`reliability.samples.garbage_record`:
      a ``CorpusError`` naming the file and record k's offset (for k = 0 the file is no
      miniSEED any more, and any ``CorpusError`` naming the file is right).
    """
    import numpy as np

    from reliability.samples import GARBAGE_KINDS, garbage_record, mseed_sources
    from burstlens.search.corpus.mseed_records import FIXED_HEADER_BYTES, record_layout

    rng = random.Random(seed)
    nprng = np.random.default_rng(seed)
    tally = _Tally(workdir)
    files = list(mseed_sources().items())[:sources]
    for name, raw in files:
        layout = record_layout(raw)
        starts = layout.offsets.tolist()
        ends = (layout.offsets + layout.lengths).tolist()
        chunk = 2 * int(layout.lengths.min())
        modes = (("whole", _read_whole), ("streamed", lambda p, c=chunk: _read_streamed(p, c)))

        if every_byte and len(raw) <= 8192:
            cuts = range(1, len(raw))
        else:
            cuts = set(starts[1:])
            for s0, e0 in zip(starts, ends, strict=True):
                cuts |= {s0 + d for d in (1, 47, 48, 55, 56, 64, (e0 - s0) // 2, e0 - s0 - 1)}
                cuts |= {rng.randint(s0 + 1, e0 - 1) for _ in range(3)}
            cuts = sorted(c for c in cuts if 0 < c < len(raw))
        for cut in cuts:
            k = int(np.searchsorted(layout.offsets, cut, side="right")) - 1
            if cut in starts:
                expect = _expecting("samples", int(layout.samples[:k].sum()))
            elif cut < FIXED_HEADER_BYTES:  # no longer miniSEED (a few digits may read as CSV)
                expect = _expecting("any")
            else:
                expect = _expecting("record", starts[k])
            for mode, read in modes:
                tally.attempt(raw[:cut], ".mseed", read, f"{name} cut at byte {cut} ({mode})", expect)
        for k, (s0, e0) in enumerate(zip(starts, ends, strict=True)):
            for kind in GARBAGE_KINDS:
                blob = raw[:s0] + garbage_record(raw[s0:e0], kind, nprng) + raw[e0:]
                expect = _expecting("record", s0) if k else _expecting("error")
                for mode, read in modes:
                    tally.attempt(blob, ".mseed", read, f"{name} record {k} ({s0}) {kind} garbage ({mode})", expect)
    return tally.result()


def run_readers(cases: int, seed: int, memory_gb: float = 4.0, bulk: int = 0, sweep: str = "none",
                sweep_sources: int | None = None) -> dict:
    """The reader parts in a child process with an address-space limit and its own temp folder:
    :func:`reader_fuzz` (``cases``), :func:`reader_bulk` (``bulk``) and :func:`mseed_sweep`
    (``sweep``: "every-byte", "boundaries" or "none"). Afterwards the work folder and the
    child's temp folder must be empty: ``left`` lists what a reader left behind."""
    workdir = Path(tempfile.mkdtemp(prefix="bl-readers-"))
    tmp = workdir / "tmp"
    tmp.mkdir()
    broken = {"cases": 0, "outcome": {}, "wrong": 0, "slowest_s": 0.0, "failures": []}
    try:
        args = ["--cases", str(cases), "--seed", str(seed), "--workdir", str(workdir),
                "--memory-gb", str(memory_gb), "--bulk", str(bulk), "--sweep", sweep]
        if sweep_sources is not None:
            args += ["--sweep-sources", str(sweep_sources)]
        budget = 600 + 0.05 * (cases + bulk) + (3000 if sweep != "none" else 0)
        out = subprocess.run([sys.executable, "-m", "reliability.bad_input", "readers", *args],
                             cwd=ROOT, capture_output=True, text=True, timeout=budget,
                             env={**os.environ, "TMPDIR": str(tmp)})
        lines = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
        if out.returncode != 0 or not lines:
            failed = dict(broken, failures=[f"reader fuzz process exited {out.returncode}: "
                                            f"{out.stderr.strip()[-400:]}"])
            return {"corpus": dict(failed, unpickled=False), "bulk": broken, "sweep": broken, "left": []}
        result = json.loads(lines[-1])
        result["left"] = sorted(str(p.relative_to(workdir)) for p in workdir.rglob("*") if p != tmp)
        return result
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


# -- JSON API (schemathesis) -----------------------------------------------------------------
def run_schemathesis(url: str, max_examples: int, seed: int, max_time_s: int) -> dict:
    """Every phase and every check of the installed schemathesis against ``url``."""
    import schemathesis
    from schemathesis.engine import events

    config = schemathesis.Config.from_dict({
        "seed": seed, "base-url": url, "workers": 1, "max-time": max_time_s,
        "generation": {"max-examples": max_examples, "mode": "all"},
        "checks": {"enabled": True},
        "phases": {"examples": {"enabled": True}, "coverage": {"enabled": True},
                   "fuzzing": {"enabled": True}, "stateful": {"enabled": True, "max-steps": 20}}})
    schema = schemathesis.openapi.from_url(url + "/openapi.json", config=config)
    statuses: Counter = Counter()
    phases: Counter = Counter()
    failed: Counter = Counter()
    samples: dict = {}
    errors: list[str] = []
    unparseable = 0
    for event in schemathesis.engine.from_schema(schema).execute():
        if isinstance(event, events.ScenarioFinished):
            phase = getattr(event.phase, "value", str(event.phase))
            for interaction in event.recorder.interactions.values():
                if interaction.response is not None:
                    code = interaction.response.status_code
                    statuses[code] += 1
                    phases[phase] += 1
                    headers = {k.lower(): v for k, v in interaction.response.headers.items()}
                    if not json_parses(headers.get("content-type", [""])[0], interaction.response.content):
                        req = interaction.request
                        unparseable += 1
                        samples.setdefault(("json", code), f"{req.method} {req.uri}")
                    if code >= 500:
                        req = interaction.request
                        samples.setdefault(("5xx", code), f"{req.method} {req.uri}")
            for case_id, checks in event.recorder.checks.items():
                for check in checks:
                    if getattr(check.status, "value", str(check.status)) != "failure":
                        continue
                    node = event.recorder.cases.get(case_id)
                    case = getattr(node, "value", None)
                    where = (f"{case.operation.method.upper()} {case.operation.path}"
                             if case is not None else event.recorder.label)
                    key = (check.name, where)
                    failed[key] += 1
                    if key not in samples and check.failure_info is not None:
                        failure = check.failure_info.failure
                        response = event.recorder.interactions.get(case_id)
                        code = getattr(getattr(response, "response", None), "status_code", "?")
                        answer = getattr(response, "response", None)
                        try:
                            text = answer.content.decode("utf-8", "replace") if answer else ""
                        except AttributeError:
                            text = ""
                        samples[key] = (f"{getattr(failure, 'title', '')} (answer {code} "
                                        f"{' '.join(text.split())[:160]!r})")
        elif isinstance(event, (events.NonFatalError, events.FatalError)):
            errors.append(repr(getattr(event, "value", getattr(event, "exception", event)))[:300])
    return {"answers": sum(statuses.values()), "statuses": statuses, "phases": phases,
            "failed": failed, "samples": samples, "errors": errors, "unparseable": unparseable}


def json_parses(content_type: str, body: bytes | None) -> bool:
    """Whether an answer that says it is JSON (``application/json`` or any ``+json`` type, such as
    RFC 9457's ``application/problem+json``) parses as JSON; other answers pass. Only the media
    type is read, never the body's layout."""
    media = content_type.split(";")[0].strip().lower()
    if not (media == "application/json" or media.endswith("+json")):
        return True
    try:
        json.loads(body or b"")
    except ValueError:
        return False
    return True


# -- multipart uploads -----------------------------------------------------------------------
FIELD_NAMES = ("files", "files", "files", "file", "filterbank", "job_id", "windowing", "window_s",
               "csv_sampling_rate_hz", "", "FILES", "files[]", "../files", "x" * 300, "fi\x00les",
               "files\r\nX-Injected: 1")
FILE_NAMES = (None, "", "trace.npz", "../../../../tmp/escape.npz", "/etc/passwd", "..", ".",
              "C:\\Windows\\system32\\x.sac", "a\x00b.npz", "ü-日本.npz", "n" * 5000 + ".npz",
              "trace.NPZ", "no-extension", "x.npz\r\nContent-Type: text/html", "%2e%2e%2fup.npz",
              "con.wav", " .npz", "trace.npz.exe")
CONTENTS = ("empty", "npz", "npz", "mseed", "npy-object", "npz-pickle-marker", "npz-raw-pickle",
            "random", "mutated", "csv", "big-text", "filterbank")
PART_HEADERS = ("plain", "plain", "huge-part-header", "many-part-headers", "odd-content-type",
                "no-disposition", "no-name")
FRAMINGS = ("ok", "ok", "ok", "no-closing", "wrong-boundary", "no-boundary-param", "not-multipart",
            "preamble", "truncated", "lf-only", "huge-request-header", "duplicate-disposition")


def _valid_filterbank_json() -> str:
    from burstlens.search.filterbank import Filterbank, center_grid

    fb = Filterbank.constant_window(center_grid([20.0, 400.0], 4, "log"), 0.01, 1000.0)
    return json.dumps(fb.to_json())


def _content(kind: str, rng: random.Random, seeds: dict) -> bytes:
    from reliability.samples import mutate

    if kind == "empty":
        return b""
    if kind == "npz":
        return seeds["npz"]
    if kind == "mseed":
        return seeds["mseed-steim2"]
    if kind == "csv":
        return seeds["csv"]
    if kind in seeds:
        return seeds[kind]
    if kind == "random":
        return rng.randbytes(rng.randint(1, 4096))
    if kind == "mutated":
        name = rng.choice(sorted(k for k in seeds if "marker" not in k))
        ops = [("flip", rng.random(), rng.randint(1, 255)) for _ in range(rng.randint(1, 4))]
        if rng.random() < 0.3:
            ops.append(("truncate", rng.random()))
        return mutate(seeds[name], ops)
    if kind == "big-text":
        return b"1.0\n" * 300_000  # 1.2 MB of one-column text
    if kind == "filterbank":
        return seeds["filterbank"]
    raise ValueError(kind)


def build_multipart(case: dict, rng: random.Random, seeds: dict) -> tuple[dict, bytes]:
    """(headers, body) of one multipart case."""
    boundary = f"bl{rng.getrandbits(64):016x}"
    sep = b"\n" if case["framing"] == "lf-only" else b"\r\n"
    chunks = []
    if case["framing"] == "preamble":
        chunks.append(b"this text comes before the first boundary" + sep)
    for part in case["parts"]:
        chunks.append(b"--" + boundary.encode() + sep)
        name = part["name"].encode("utf-8", "surrogatepass")
        disposition = b'Content-Disposition: form-data; name="' + name + b'"'
        if part["filename"] is not None:
            disposition += b'; filename="' + part["filename"].encode("utf-8", "surrogatepass") + b'"'
        if part["headers"] == "no-disposition":
            disposition = b"X-Nothing: here"
        elif part["headers"] == "no-name":
            disposition = b"Content-Disposition: form-data"
        chunks.append(disposition + sep)
        if case["framing"] == "duplicate-disposition":
            chunks.append(b'Content-Disposition: form-data; name="job_id"' + sep)
        if part["headers"] == "huge-part-header":
            chunks.append(b"X-Padding: " + b"a" * 200_000 + sep)
        elif part["headers"] == "many-part-headers":
            chunks += [f"X-H{i}: v".encode() + sep for i in range(2000)]
        elif part["headers"] == "odd-content-type":
            chunks.append(b"Content-Type: application/x-npz; charset=\xff\xfe" + sep)
        chunks.append(sep)
        chunks.append(_content(part["content"], rng, seeds) + sep)
    if case["framing"] != "no-closing":
        chunks.append(b"--" + boundary.encode() + b"--" + sep)
    body = b"".join(chunks)
    if case["framing"] == "truncated":
        body = body[: rng.randint(0, max(0, len(body) - 1))]
    headers = {"content-type": f"multipart/form-data; boundary={boundary}"}
    if case["framing"] == "wrong-boundary":
        headers["content-type"] = "multipart/form-data; boundary=someotherboundary"
    elif case["framing"] == "no-boundary-param":
        headers["content-type"] = "multipart/form-data"
    elif case["framing"] == "not-multipart":
        headers["content-type"] = rng.choice(["application/json", "text/plain", "",
                                              "application/x-www-form-urlencoded"])
    elif case["framing"] == "huge-request-header":
        headers["x-padding"] = "b" * 100_000
    return headers, body


def _fixed_cases() -> list[dict]:
    """Cases the issue names, tried first whatever the generator draws."""
    def one(content="npz", name="files", filename="trace.npz", headers="plain", framing="ok",
            route="/v1/corpora"):
        return {"route": route, "framing": framing,
                "parts": [{"name": name, "filename": filename, "content": content, "headers": headers}]}
    cases = [one(name=n) for n in ("file", "upload", "", "FILES", "files[]")]
    cases += [one(headers="huge-part-header"), one(headers="many-part-headers"),
              one(framing="huge-request-header"), one(content="empty"),
              one(content="empty", filename="")]
    cases += [one(filename=f) for f in ("../../../../tmp/escape.npz", "/etc/passwd", "..",
                                        "C:\\Windows\\system32\\x.sac", "a\x00b.npz", "n" * 5000)]
    cases += [one(content=c) for c in ("npy-object", "npz-pickle-marker", "npz-raw-pickle")]
    cases += [one(content=c, route="/v1/transform") for c in ("npz-pickle-marker", "empty")]
    cases.append({"route": "/v1/corpora", "framing": "ok", "parts": []})
    cases += [{"route": "/v1/corpora", "framing": f, "parts": one()["parts"]}
              for f in FRAMINGS if f != "ok"]
    return cases


def run_multipart(url: str, data_dir: Path, cases: int, seed: int, marker: Path) -> dict:
    """The fixed cases, then hypothesis-generated ones up to ``cases`` in all; each request's
    effect on the data dir is audited (an accepted corpus is deleted again first)."""
    import httpx
    import hypothesis
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from reliability.samples import hostile_files, valid_files

    seeds = {**valid_files(), **hostile_files(str(marker)),
             "filterbank": _valid_filterbank_json().encode()}
    rng = random.Random(seed)
    part = st.fixed_dictionaries({"name": st.sampled_from(FIELD_NAMES),
                                  "filename": st.sampled_from(FILE_NAMES),
                                  "content": st.sampled_from(CONTENTS),
                                  "headers": st.sampled_from(PART_HEADERS)})
    strategy = st.fixed_dictionaries({"route": st.sampled_from(["/v1/corpora", "/v1/corpora",
                                                                "/v1/transform"]),
                                      "parts": st.lists(part, max_size=4),
                                      "framing": st.sampled_from(FRAMINGS)})
    audit = DataDirAudit(data_dir)
    statuses: Counter = Counter()
    left: list[str] = []
    fivexx: list[str] = []
    unparseable: list[str] = []
    state = {"client": httpx.Client(base_url=url, timeout=120.0), "before": audit.snapshot(),
             "objects_accepted": 0, "done": 0}

    def one(case: dict) -> None:
        state["done"] += 1
        headers, body = build_multipart(case, rng, seeds)
        try:
            response = state["client"].post(case["route"], headers=headers, content=body)
        except httpx.HTTPError as exc:
            statuses[f"no answer ({type(exc).__name__})"] += 1
            state["client"].close()
            state["client"] = httpx.Client(base_url=url, timeout=120.0)
            response = None
        code = None if response is None else response.status_code
        if response is not None:
            statuses[code] += 1
            if code >= 500:
                fivexx.append(f"{case['route']} {summarize(case)} -> {code} {response.text[:160]!r}")
            if not json_parses(response.headers.get("content-type", ""), response.content):
                unparseable.append(f"{case['route']} {summarize(case)} -> {code} {response.text[:160]!r}")
        if code == 201 and case["route"] == "/v1/corpora":
            kinds = {p["content"] for p in case["parts"] if p["filename"] is not None}
            if kinds and kinds <= {"npy-object", "npz-pickle-marker", "npz-raw-pickle"}:
                state["objects_accepted"] += 1
            state["client"].delete(f"/v1/corpora/{response.json()['id']}")
        # a rejected request, a transform and an accepted-then-deleted corpus all leave nothing
        after = audit.snapshot()
        changes = DataDirAudit.diff(state["before"], after)
        if changes:
            left.append(f"{case['route']} {summarize(case)} -> {code}: {changes[:4]}")
        state["before"] = after

    fixed = _fixed_cases()
    for case in fixed[:cases]:
        one(case)

    @settings(database=None, deadline=None, suppress_health_check=list(HealthCheck),
              max_examples=max(1, cases - len(fixed)))
    @hypothesis.seed(seed)
    @given(case=strategy)
    def generated(case):
        one(case)

    if cases > len(fixed):
        generated()
    state["client"].close()
    return {"cases": state["done"], "statuses": statuses, "left": left, "fivexx": fivexx,
            "unparseable": unparseable,
            "objects_accepted": state["objects_accepted"], "unpickled": marker.exists()}


def summarize(case: dict) -> str:
    parts = ", ".join(f"{p['name'][:20]!r}/{(p['filename'] or '')[:30]!r}/{p['content']}/{p['headers']}"
                      for p in case["parts"])
    return f"[{case['framing']}] {parts or 'no parts'}"


# -- the experiment --------------------------------------------------------------------------
def _by_class(statuses: Counter) -> dict:
    return dict(sorted(Counter(f"{code // 100}xx" for code in statuses.elements()).items()))


_READER_FAILURES = ("other exception", "over the alarm", "error not naming the file")


def _reader_rows(readers: dict, wanted: dict) -> list[Row]:
    """One row per reader part; ``wanted`` is the number of cases each part was asked for."""
    left = readers.get("left", [])
    rows = []
    for key, title, what, goal in (
            ("corpus", "4 bad input: readers (read_corpus)",
             "files (arbitrary bytes, mutated valid files of 9 kinds, object-array NPY/NPZ), the whole read",
             "only CorpusError naming the file, never unpickled"),
            ("bulk", "4 bad input: readers, every format",
             "files at the reader (format detection, whole and streamed reads; arbitrary bytes, "
             "mutations and record-boundary cuts of every format)",
             "only CorpusError naming the file, never unpickled"),
            ("sweep", "4 bad input: miniSEED cuts and garbage records",
             "reads (cuts at every byte or record boundary and inside every record, garbage "
             "records of 10 kinds, of 6 real files; whole and streamed)",
             "each read's one right outcome; a cut or garbage record named by its byte offset")):
        part = readers[key]
        if not wanted[key]:
            continue
        outcome = part["outcome"]
        bad = sum(outcome.get(k, 0) for k in _READER_FAILURES) + part.get("wrong", 0)
        unpickled = int(bool(part.get("unpickled", False)))
        details = list(part["failures"])
        if key == "corpus":
            details += [f"left behind by the readers: {p}" for p in left]
        rows.append(Row(title, f"{part['cases']} {what}: {outcome}",
                        f"{bad} failures ({part.get('wrong', 0)} wrong outcomes), unpickled {unpickled}"
                        + (f", left behind {len(left)}" if key == "corpus" else "")
                        + f"; slowest case {part['slowest_s'] * 1000:.0f} ms",
                        goal + (", nothing left behind" if key == "corpus" else ""),
                        part["cases"] >= wanted[key] and bad == 0 and not unpickled
                        and not (key == "corpus" and left), details))
    return rows


def _api_row(api: dict, orphans: list[str]) -> Row:
    fivexx = sum(n for code, n in api["statuses"].items() if code >= 500)
    by_check: Counter = Counter()
    for (check, _op), n in api["failed"].items():
        by_check[check] += n
    details = [f"schemathesis {check} on {op}: {n}× e.g. {api['samples'].get((check, op), '')}"
               for (check, op), n in sorted(api["failed"].items())]
    details += [f"5xx {key[1]}: {sample}" for key, sample in api["samples"].items()
                if key[0] == "5xx"]
    details += [f"JSON answer that does not parse ({key[1]}): {sample}"
                for key, sample in api["samples"].items() if key[0] == "json"]
    details += [f"schemathesis error: {e}" for e in api["errors"][:10]]
    details += [f"left behind after schemathesis: {o}" for o in orphans]
    return Row("4 bad input: JSON API (schemathesis)",
               f"{api['answers']} requests, phases {dict(api['phases'])}, all checks; answers "
               f"{_by_class(api['statuses'])}",
               f"5xx {fivexx}; unparseable JSON {api['unparseable']}; orphans {len(orphans)}; other "
               f"check failures {sum(by_check.values())} ({dict(by_check)})",
               "0 5xx, JSON answers parse, 0 orphans (other checks reported)",
               fivexx == 0 and not api["unparseable"] and not orphans and not api["errors"], details)


def _multipart_row(multipart: dict) -> Row:
    statuses = multipart["statuses"]
    fivexx = sum(n for code, n in statuses.items() if isinstance(code, int) and code >= 500)
    details = multipart["fivexx"][:20] + multipart["left"][:20] + multipart["unparseable"][:20]
    if multipart["objects_accepted"]:
        details.append(f"{multipart['objects_accepted']} uploads of object arrays only were "
                       "accepted")
    return Row("4 bad input: multipart uploads",
               f"{multipart['cases']} requests: {dict(sorted(statuses.items(), key=str))}",
               f"5xx {fivexx}; unparseable JSON {len(multipart['unparseable'])}; state left "
               f"{len(multipart['left'])}; object arrays accepted {multipart['objects_accepted']}, "
               f"unpickled {int(multipart['unpickled'])}",
               GOAL + ", JSON answers parse", fivexx == 0 and not multipart["left"]
               and not multipart["unparseable"] and not multipart["objects_accepted"]
               and not multipart["unpickled"], details)


def run(reader_cases: int = 6000, api_examples: int = 60, multipart_cases: int = 1200,
        seed: int = 20261202, api_max_time_s: int = 60, min_cases: int = 100_000,
        bulk_cases: int = 50_000, sweep: str = "every-byte", sweep_sources: int | None = None) -> list[Row]:
    """The reader parts (:func:`run_readers`), the JSON API and the multipart uploads; the last
    row checks that at least ``min_cases`` cases were tried in all."""
    import httpx

    started = time.monotonic()
    readers = run_readers(reader_cases, seed, bulk=bulk_cases, sweep=sweep, sweep_sources=sweep_sources)
    rows = _reader_rows(readers, {"corpus": reader_cases, "bulk": bulk_cases, "sweep": sweep != "none"})
    counts = [readers[k]["cases"] for k in ("corpus", "bulk", "sweep")]
    tmp = Path(tempfile.mkdtemp(prefix="bl-badinput-"))
    server = None
    try:
        server = LiveServer(tmp / "api", workers=0, BURSTLENS_MAX_QUEUED_JOBS="100000").start()
        with httpx.Client(base_url=server.url, timeout=60.0) as client:
            client.post("/v1/corpora", files=corpus_files(1)).raise_for_status()
        api = run_schemathesis(server.url, api_examples, seed, api_max_time_s)
        server.stop()
        server = None
        rows.append(_api_row(api, DataDirAudit(tmp / "api").orphans()))
        counts.append(api["answers"])
        server = LiveServer(tmp / "multipart", workers=0).start()
        multipart = run_multipart(server.url, tmp / "multipart", multipart_cases, seed,
                                  tmp / "UNPICKLED-MULTIPART")
        rows.append(_multipart_row(multipart))
        counts.append(multipart["cases"])
    except Exception as exc:
        rows.append(Row("4 bad input: service", "-", "experiment aborted", GOAL, False,
                        [f"experiment aborted: {type(exc).__name__}: {exc}"]))
    finally:
        if server is not None:
            server.stop()
        remove_tree(tmp)
    total = sum(counts)
    rows.append(Row("4 bad input: total", f"{total} generated cases "
                    f"({' + '.join(map(str, counts))}) in {time.monotonic() - started:.0f} s",
                    f"{total} cases", f">= {min_cases:,} cases", total >= min_cases))
    return rows


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="reader fuzzing in a child process")
    parser.add_argument("part", choices=["readers"])
    parser.add_argument("--cases", type=int, required=True)
    parser.add_argument("--seed", type=int, required=True)
    parser.add_argument("--workdir", required=True)
    parser.add_argument("--memory-gb", type=float, default=4.0)
    parser.add_argument("--bulk", type=int, default=0)
    parser.add_argument("--sweep", choices=["every-byte", "boundaries", "none"], default="none")
    parser.add_argument("--sweep-sources", type=int, default=None)
    args = parser.parse_args(argv)
    limit = int(args.memory_gb * 1024**3)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    import warnings
    warnings.simplefilter("ignore")
    workdir = Path(args.workdir)
    signal.signal(signal.SIGALRM, _on_alarm)
    empty = {"cases": 0, "outcome": {}, "wrong": 0, "failures": [], "slowest_s": 0.0}
    result = {"corpus": reader_fuzz(args.cases, args.seed, workdir),
              "bulk": reader_bulk(args.bulk, args.seed + 2, workdir) if args.bulk else empty,
              "sweep": (mseed_sweep(args.seed + 3, workdir, args.sweep == "every-byte", args.sweep_sources)
                        if args.sweep != "none" else empty)}
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    os.environ.setdefault("PYTHONHASHSEED", "0")
    raise SystemExit(main())
