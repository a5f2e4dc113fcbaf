"""Benchmark of search.read_corpus on a week of continuous miniSEED: peak memory and time per hour
against the one-hour read.

Set-up (generated here, two worker processes, into a temporary folder deleted at the end, or into
``--keep DIR``): one 3-component station, a week at 4 kHz as 168 hourly files. Each file holds the
channels GPZ, GPN, GPE of XB.H1.00, 3600 s (14.4 M samples per channel) starting exactly at
2026-03-01T00:00:00 + h·3600 s, STEIM2 in 4096-byte records, int32 counts. Content as in
bench_corpus.py: red-ish background noise (white of 20 counts rms, coloured: ≈ 23 counts rms) and
a decaying 300–900 Hz burst 0.15 s long at 5 + 10 k s ± 2 s (k = 0 … 359 in each hour and
channel), drawn from a generator seeded by the hour, so every hour differs. The traces continue
one another across files; the noise colouring restarts each hour (the first sample of an hour
lacks its 0.6 × previous-sample term), and bursts are never cut at an hour edge: the last onset of
an hour is at most 3597 s, and the next hour's first at least 3 s in, so the rhythm of a burst
about every 10 s runs on across every boundary.

Measured, each read in a fresh interpreter with the defaults (bursts windowing): ``read_corpus``
of the first hour's file alone, then of every file of the span. The files are read once before
timing so that both scales read from the page cache. Peak memory is the child's resident peak
(``ru_maxrss`` of the rusage that ``os.wait4`` returns for that child alone, which includes the
interpreter and the imported libraries). Targets (an open issue; printed, never failed on):

- peak memory of the week's read ≤ 1024 MB;
- time per hour of data at the week scale ≤ 1.2 × time per hour of the one-hour read.

A child's address space is capped at three quarters of the memory available before the reads, so a
reader that cannot hold the span fails with MemoryError instead of exhausting the machine.

Usage: ``python bench/bench_corpus_week.py [--hours N] [--keep DIR] [--generate-only]``
(``--hours``: span in hours, default 168; ``--keep``: generate into DIR and keep it, reusing the
files already there; ``--generate-only``: stop after generating). Exit status 0 whether or not
the targets are met; 1 if a child fails or there is too little free disk.
"""
from __future__ import annotations

import argparse
import itertools
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
FS = 4000.0
HOUR_S = 3600
WEEK_HOURS = 168
CHANNELS = ("GPZ", "GPN", "GPE")
START = "2026-03-01T00:00:00"
WORKERS = 2
MIN_FREE_BYTES = 10e9          # the week is about 7 GB of STEIM2
MEMORY_TARGET_MB = 1024.0
TIME_TARGET = 1.2

CHILD = """
import json, sys, time
from burstlens.search.corpus import read_corpus
t0 = time.perf_counter()
corpus = read_corpus(sys.argv[1:])
seconds = time.perf_counter() - t0
channels = len({t["trace_id"] for t in corpus.traces})
print(json.dumps({"seconds": seconds, "files": len(corpus.files),
                   "hours": sum(t["duration_s"] for t in corpus.traces) / 3600.0 / channels,
                   "windows_kept": corpus.defaults["windows_kept"],
                   "windows_found": corpus.defaults["windows_found"],
                   "triggers": corpus.defaults["triggers"]}))
"""


def hour_name(hour: int) -> str:
    """File name of hour ``hour`` (0-based from START); names sort in time order."""
    from obspy import UTCDateTime

    return f"XB.H1.00.{(UTCDateTime(START) + hour * HOUR_S).strftime('%Y-%m-%dT%H')}.mseed"


def hour_counts(hour: int) -> list[np.ndarray]:
    """The three channels' samples of hour ``hour``: int32 counts, each of shape (3600·FS,).

    Coloured noise (≈ 23 counts rms) plus a decaying burst of 300–900 Hz, 0.15 s long, at
    5 + 10 k ± 2 s for k = 0 … 359, from a generator seeded by ``hour``.
    """
    rng = np.random.default_rng(hour)
    n = int(HOUR_S * FS)
    k = np.arange(int(0.15 * FS))
    onsets = np.arange(5.0, HOUR_S, 10.0)
    out = []
    for _ in CHANNELS:
        x = rng.standard_normal(n).astype(np.float32) * 20.0
        x[1:] += 0.6 * x[:-1]  # a little colour
        for onset in onsets + rng.uniform(-2, 2, onsets.size):
            f = rng.uniform(300, 900)
            i = int(onset * FS)
            x[i: i + k.size] += rng.uniform(100, 3000) * np.sin(2 * np.pi * f * k / FS) * np.exp(-k / (0.02 * FS))
        out.append(np.rint(x).astype(np.int32))
    return out


def write_hour(folder: str, hour: int) -> int:
    """Write hour ``hour`` into ``folder`` (via a hidden partial file, renamed when complete, so a
    file under its final name is always whole); returns its size in bytes."""
    from obspy import Stream, Trace, UTCDateTime

    path = Path(folder) / hour_name(hour)
    part = path.with_name(f".{path.name}.part")
    start = UTCDateTime(START) + hour * HOUR_S
    stream = Stream([Trace(data, header={"network": "XB", "station": "H1", "location": "00", "channel": channel,
                                         "sampling_rate": FS, "starttime": start})
                     for channel, data in zip(CHANNELS, hour_counts(hour), strict=True)])
    try:
        stream.write(str(part), format="MSEED", encoding="STEIM2", reclen=4096)
        part.rename(path)
    except BaseException:
        part.unlink(missing_ok=True)
        raise
    return path.stat().st_size


def write_all(folder: Path, hours: list[int]) -> None:
    """Write the given hours into ``folder`` on WORKERS processes, printing progress every day."""
    queued = iter(hours)
    done = 0
    with ProcessPoolExecutor(WORKERS) as pool:
        # one hour per worker in flight: after an error or Ctrl-C nothing is left queued to write
        running = {pool.submit(write_hour, str(folder), h) for h in itertools.islice(queued, WORKERS)}
        while running:
            finished, running = wait(running, return_when=FIRST_COMPLETED)
            for future in finished:
                future.result()
                done += 1
                if done % 24 == 0 and done < len(hours):
                    print(f"  generated {done} of {len(hours)} files", flush=True)
                hour = next(queued, None)
                if hour is not None:
                    running.add(pool.submit(write_hour, str(folder), hour))


def generate(folder: Path, hours: int) -> list[Path]:
    """The files of hours 0 … hours − 1 in ``folder``, writing those missing on WORKERS processes.

    Prints the generation time and the total size. Exits with a message if fewer than
    MIN_FREE_BYTES are free on the folder's disk when something has to be written.
    """
    paths = [folder / hour_name(h) for h in range(hours)]
    missing = [h for h, p in enumerate(paths) if not p.exists()]
    if missing:
        free = shutil.disk_usage(folder).free
        if free < MIN_FREE_BYTES:
            sys.exit(f"bench_corpus_week: only {free / 1e9:.1f} GB free in {folder}; "
                     f"{MIN_FREE_BYTES / 1e9:.0f} GB needed to generate the data (a week is about 7 GB)")
        t0 = time.perf_counter()
        write_all(folder, missing)
        how = f"{len(missing)} files in {time.perf_counter() - t0:.0f} s on {WORKERS} processes"
    else:
        how = "all files already there"
    size = sum(p.stat().st_size for p in paths)
    print(f"data: {hours} h × {len(CHANNELS)} channels × {FS / 1000:g} kHz STEIM2, {len(paths)} files, "
          f"{size / 1e9:.2f} GB in {folder} ({how})", flush=True)
    return paths


def warm(paths: list[Path]) -> float:
    """Read every file once so that the timed reads find them in the page cache; returns seconds."""
    t0 = time.perf_counter()
    for p in paths:
        with open(p, "rb") as f:
            while f.read(16 * 2**20):
                pass
    return time.perf_counter() - t0


def address_space_cap() -> int:
    """Three quarters of MemAvailable (/proc/meminfo), bytes: the children's RLIMIT_AS."""
    with open("/proc/meminfo") as f:
        for line in f:
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024 * 3 // 4
    raise RuntimeError("no MemAvailable in /proc/meminfo")


def run_reader(paths: list[Path], cap: int) -> dict:
    """read_corpus(paths) in a fresh interpreter: its JSON figures plus ``peak_mb``, the child's
    own ru_maxrss (from os.wait4, so earlier children play no part), MB. Exits 1 with the child's
    stderr if it fails."""
    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

    cmd = [sys.executable, "-c", CHILD, *map(str, paths)]
    # files, not pipes: the parent reads nothing until os.wait4 has reaped the child
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        child = subprocess.Popen(cmd, stdout=out, stderr=err, preexec_fn=limit)
        _, status, usage = os.wait4(child.pid, 0)
        child.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        stdout, stderr = out.read().decode(), err.read().decode(errors="replace")
    if child.returncode:
        print(f"read_corpus child failed (status {child.returncode}):\n{stderr}")
        sys.exit(1)
    result = json.loads(stdout.strip().splitlines()[-1])
    result["peak_mb"] = usage.ru_maxrss / 1024.0  # kB on Linux
    return result


ROW = "  {:<8}{:>7}{:>7}{:>9}{:>8}{:>9}{:>7}{:>8}{:>10}"


def row(name: str, r: dict) -> str:
    """One table line: the figures of one scale."""
    return ROW.format(name, f"{r['hours']:.1f}", r["files"], f"{r['seconds']:.1f}", f"{r['seconds'] / r['hours']:.2f}",
                      f"{r['peak_mb']:.0f}", r["windows_kept"], r["windows_found"], r["triggers"])


def measure(paths: list[Path]) -> None:
    """Read the first hour alone, then the whole span; print the figures and the two targets."""
    cap = address_space_cap()
    print(f"page cache warmed in {warm(paths):.1f} s; children capped at {cap / 2**30:.1f} GiB of address space; "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}", flush=True)
    span = "week" if len(paths) == WEEK_HOURS else f"{len(paths)} h"
    print(ROW.format("scale", "hours", "files", "seconds", "s/hour", "peak MB", "kept", "found", "triggers"))
    hour = run_reader(paths[:1], cap)
    print(row("1 h", hour), flush=True)
    big = run_reader(paths, cap)
    print(row(span, big))
    ratio = (big["seconds"] / big["hours"]) / (hour["seconds"] / hour["hours"])
    print(f"  peak memory, {span}: {big['peak_mb']:.0f} MB (target <= {MEMORY_TARGET_MB:.0f} MB)")
    print(f"  RATIO time per hour, {span} / 1 h: {ratio:.2f} (target <= {TIME_TARGET})")
    if len(paths) != WEEK_HOURS:
        print(f"  (a span of {len(paths)} h, not the week: a check of the bench, not of the targets)")
    met = big["peak_mb"] <= MEMORY_TARGET_MB and ratio <= TIME_TARGET
    print("targets met" if met else "TARGETS MISSED")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=int, default=WEEK_HOURS, help=f"span in hours (default {WEEK_HOURS})")
    parser.add_argument("--keep", type=Path,
                        help="generate into this folder and keep it; files already there are reused")
    parser.add_argument("--generate-only", action="store_true", help="generate the data, do not read it")
    args = parser.parse_args()
    if args.hours < 2:
        parser.error("--hours must be at least 2 (the one-hour read is the reference)")
    print(f"corpus week bench: {args.hours} h of XB.H1.00 GPZ/GPN/GPE at {FS / 1000:g} kHz, "
          "one file per hour", flush=True)
    if args.keep is not None:
        args.keep.mkdir(parents=True, exist_ok=True)
        paths = generate(args.keep, args.hours)
        if not args.generate_only:
            measure(paths)
        return 0
    with tempfile.TemporaryDirectory(prefix="bench_corpus_week_") as tmp:
        paths = generate(Path(tmp), args.hours)
        if not args.generate_only:
            measure(paths)
    return 0


if __name__ == "__main__":
    sys.exit(main())
