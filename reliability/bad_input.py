"""Experiment 4 — bad input: generated cases against the readers, the JSON API and the uploads.

Promise (DESIGN §6, §7): bad input gets a clear error naming the file or field and the cause,
never a 5xx; nothing half-ingested is kept; ``.npy``/``.npz`` are never unpickled.

Three parts, each seeded and bounded:

- readers — ``search.read_corpus`` on hypothesis-generated files: arbitrary bytes, and mutations
  (bit flips, truncation, insertions, deletions, extreme header integers and floats) of a valid
  file of every format (miniSEED Steim-2 and float, SAC, SEG-Y, WAV int16 and float, NPY, NPZ,
  CSV), plus object-array NumPy files one of which creates a marker file if unpickled. Run in a
  child process with a memory limit and a per-case alarm, so a reader that blows up cannot take
  the campaign with it. A failure is any exception other than ``CorpusError``, a ``CorpusError``
  that does not name the file, a case over the alarm, or the marker appearing.
- JSON API — schemathesis against the live server's ``/openapi.json`` with every check enabled
  and all phases (examples, coverage, fuzzing, stateful). Counted: answers, 5xx, each check's
  failures; afterwards the data dir is audited for orphans (files without rows, rows without
  files, unfinished uploads).
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


def run_readers(cases: int, seed: int, memory_gb: float = 4.0) -> dict:
    """:func:`reader_fuzz` in a child process with an address-space limit."""
    workdir = Path(tempfile.mkdtemp(prefix="bl-readers-"))
    try:
        out = subprocess.run([sys.executable, "-m", "reliability.bad_input", "readers",
                              "--cases", str(cases), "--seed", str(seed), "--workdir", str(workdir),
                              "--memory-gb", str(memory_gb)], cwd=ROOT, capture_output=True,
                             text=True, timeout=max(600, cases))
        lines = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
        if out.returncode != 0 or not lines:
            return {"cases": 0, "outcome": {}, "unpickled": False, "slowest_s": 0.0,
                    "failures": [f"reader fuzz process exited {out.returncode}: "
                                 f"{out.stderr.strip()[-400:]}"]}
        return json.loads(lines[-1])
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
    for event in schemathesis.engine.from_schema(schema).execute():
        if isinstance(event, events.ScenarioFinished):
            phase = getattr(event.phase, "value", str(event.phase))
            for interaction in event.recorder.interactions.values():
                if interaction.response is not None:
                    code = interaction.response.status_code
                    statuses[code] += 1
                    phases[phase] += 1
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
            "failed": failed, "samples": samples, "errors": errors}


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
            "objects_accepted": state["objects_accepted"], "unpickled": marker.exists()}


def summarize(case: dict) -> str:
    parts = ", ".join(f"{p['name'][:20]!r}/{(p['filename'] or '')[:30]!r}/{p['content']}/{p['headers']}"
                      for p in case["parts"])
    return f"[{case['framing']}] {parts or 'no parts'}"


# -- the experiment --------------------------------------------------------------------------
def _by_class(statuses: Counter) -> dict:
    return dict(sorted(Counter(f"{code // 100}xx" for code in statuses.elements()).items()))


def _readers_row(readers: dict, wanted: int) -> Row:
    outcome = readers["outcome"]
    bad = sum(outcome.get(k, 0) for k in ("other exception", "over the alarm",
                                            "error not naming the file"))
    return Row("4 bad input: readers",
               f"{readers['cases']} files (arbitrary bytes, mutated valid files of 9 kinds, "
               f"object-array NPY/NPZ): {outcome}",
               f"{bad} failures, unpickled {int(readers['unpickled'])}; slowest case "
               f"{readers['slowest_s'] * 1000:.0f} ms",
               "only CorpusError naming the file, never unpickled",
               readers["cases"] >= wanted and bad == 0 and not readers["unpickled"],
               readers["failures"])


def _api_row(api: dict, orphans: list[str]) -> Row:
    fivexx = sum(n for code, n in api["statuses"].items() if code >= 500)
    by_check: Counter = Counter()
    for (check, _op), n in api["failed"].items():
        by_check[check] += n
    details = [f"schemathesis {check} on {op}: {n}× e.g. {api['samples'].get((check, op), '')}"
               for (check, op), n in sorted(api["failed"].items())]
    details += [f"5xx {key[1]}: {sample}" for key, sample in api["samples"].items()
                if key[0] == "5xx"]
    details += [f"schemathesis error: {e}" for e in api["errors"][:10]]
    details += [f"left behind after schemathesis: {o}" for o in orphans]
    return Row("4 bad input: JSON API (schemathesis)",
               f"{api['answers']} requests, phases {dict(api['phases'])}, all checks; answers "
               f"{_by_class(api['statuses'])}",
               f"5xx {fivexx}; orphans {len(orphans)}; other check failures "
               f"{sum(by_check.values())} ({dict(by_check)})",
               "0 5xx, 0 orphans (other checks reported)",
               fivexx == 0 and not orphans and not api["errors"], details)


def _multipart_row(multipart: dict) -> Row:
    statuses = multipart["statuses"]
    fivexx = sum(n for code, n in statuses.items() if isinstance(code, int) and code >= 500)
    details = multipart["fivexx"][:20] + multipart["left"][:20]
    if multipart["objects_accepted"]:
        details.append(f"{multipart['objects_accepted']} uploads of object arrays only were "
                       "accepted")
    return Row("4 bad input: multipart uploads",
               f"{multipart['cases']} requests: {dict(sorted(statuses.items(), key=str))}",
               f"5xx {fivexx}; state left {len(multipart['left'])}; object arrays accepted "
               f"{multipart['objects_accepted']}, unpickled {int(multipart['unpickled'])}",
               GOAL, fivexx == 0 and not multipart["left"] and not multipart["objects_accepted"]
               and not multipart["unpickled"], details)


def run(reader_cases: int = 6000, api_examples: int = 60, multipart_cases: int = 1200,
        seed: int = 20261202, api_max_time_s: int = 60, min_cases: int = 10_000) -> list[Row]:
    """The three parts; the last row checks that at least ``min_cases`` cases were tried."""
    import httpx

    started = time.monotonic()
    readers = run_readers(reader_cases, seed)
    rows = [_readers_row(readers, reader_cases)]
    counts = [readers["cases"]]
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
    args = parser.parse_args(argv)
    limit = int(args.memory_gb * 1024**3)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
    import warnings
    warnings.simplefilter("ignore")
    print(json.dumps(reader_fuzz(args.cases, args.seed, Path(args.workdir))))
    return 0


if __name__ == "__main__":
    os.environ.setdefault("PYTHONHASHSEED", "0")
    raise SystemExit(main())
