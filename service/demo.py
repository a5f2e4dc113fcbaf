"""``python -m service.demo`` (``make demo``): the main job end to end over HTTP.

Starts ``burstlens serve`` on a free loopback port with a temporary data dir, uploads
``demo_corpus/`` through :mod:`service.client`, queues a filterbank search, follows it with a progress
bar, saves filterbank.json, diagnostics.json and report.html under ``demo_out/``, prints a short
summary (first the gain in bits over the best spectrogram on held-out windows and any warnings,
then the stop reason and the channels carrying most of the bursts' energy in familiar terms) and
stops the server.
"""
from __future__ import annotations

import argparse
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx

from burstlens.service.client import Client
from burstlens.service.commands.submit import expand, follow
from burstlens.service.energy_channels import sample_windows

ROOT = Path(__file__).resolve().parent.parent

# Sized so the whole demo stays well inside 5 minutes on a 2-core machine, with the default
# 96-channel grid (a coarser one cannot hold the windows the bursts want) and enough windows
# that the held-out quarter is at least 30.
DEMO_SETTINGS = {"channels": 96, "evaluations": 16, "bootstrap": 4, "max_windows": 128, "seed": 7,
                 "jobs": 2}


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def wait_healthy(client, proc: subprocess.Popen, timeout_s: float = 90.0) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"the server exited with code {proc.returncode} before it was up")
        try:
            client.health()
            return
        except httpx.TransportError:
            time.sleep(0.2)
    raise RuntimeError(f"the server did not answer /v1/health within {timeout_s:.0f} s")


def summary_lines(filterbank: dict, diagnostics, elapsed_s: float,
                  bursts=None) -> list[str]:
    """The held-out gain and any warnings first (``service.verdict``), then the run and the
    channels carrying the energy of the burst corpus ``bursts`` (``service.energy_channels``)."""
    from burstlens.search.diagnostics_doc import Diagnostics
    from burstlens.service import verdict
    from burstlens.service.energy_channels import lines_or_note

    d = Diagnostics.of(diagnostics)
    lines = verdict.lines(d)  # the gain is said here once, with its interval
    lines.append(f"stop reason: {d.stop_reason}")
    lines.append(f"windows used: {d.windows.used}, rejected: {d.windows.rejected}")
    lines.append(f"channels: {len(filterbank.get('channels') or [])} at "
                 f"{filterbank.get('sampling_rate_hz')} Hz")
    lines += lines_or_note(filterbank, bursts)
    lines.append(f"elapsed: {elapsed_s:.1f} s")
    return lines


def run(corpus_dir: Path, out_dir: Path, settings: dict) -> int:
    files = expand([str(corpus_dir)])
    if not files:
        print(f"demo: no files in {corpus_dir}; generate them with `burstlens demo-corpus --out "
              f"{corpus_dir}`", file=sys.stderr)
        return 2
    start = time.monotonic()
    data_dir = Path(tempfile.mkdtemp(prefix="burstlens-demo-"))
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    env = {k: v for k, v in os.environ.items() if not k.startswith("BURSTLENS_")}
    proc = subprocess.Popen([sys.executable, "-m", "burstlens.service.cli", "serve", "--host", "127.0.0.1",
                             "--port", str(port), "--data-dir", str(data_dir), "--workers", "1",
                             "--log-level", "warning"], env=env, cwd=ROOT)
    try:
        with Client(url) as client:
            wait_healthy(client, proc)
            print(f"server up at {url} (data in {data_dir})")
            corpus = client.upload_corpus(files)
            print(f"uploaded {len(files)} file(s): {corpus['summary'].get('n_windows')} windows at "
                  f"{corpus['summary'].get('sampling_rate_hz')} Hz")
            job = client.submit_job(corpus["id"], settings)
            print(f"job {job['id']} queued with settings {settings}")
            job = follow(client, job["id"], stream=sys.stdout)
            if job["state"] != "done":
                print(f"demo: job {job['state']}: {job.get('error')}", file=sys.stderr)
                return 1
            saved = client.download_results(job["id"], out_dir)
            filterbank, diagnostics = client.filterbank(job["id"]), client.diagnostics(job["id"])
        elapsed_s = time.monotonic() - start
        bursts = sample_windows(files, filterbank)
        print("\n".join(summary_lines(filterbank, diagnostics, elapsed_s, bursts)))
        for path in saved.values():
            print(f"saved {path}")
        return 0
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        shutil.rmtree(data_dir, ignore_errors=True)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m service.demo", description=__doc__.split("\n")[0])
    parser.add_argument("--corpus", default=str(ROOT / "demo_corpus"), help="corpus folder")
    parser.add_argument("--out", default=str(ROOT / "demo_out"), help="results folder")
    args = parser.parse_args(argv)
    return run(Path(args.corpus), Path(args.out), dict(DEMO_SETTINGS))


if __name__ == "__main__":
    sys.exit(main())
