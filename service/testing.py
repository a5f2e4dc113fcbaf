"""Support for the service tests, the benchmarks and the reliability campaign (as numpy.testing
is for numpy's): small burst corpora, settings, live ``burstlens serve`` processes. The pytest
fixtures built on them (``make_client``, ``live_server``) are in tests/service/conftest.py.
Nothing in the service imports this module.

The waveforms are made up for these tests only (a seeded noise floor with Gaussian-enveloped
tone bursts); no check compares against them, they only give the corpus reader something to cut.
"""
from __future__ import annotations

import io
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import numpy as np
from scipy.signal import lfilter

from burstlens.service.config import ServiceSettings


# Tiny search settings: a job takes a few seconds on one core.
TINY = {"channels": 6, "evaluations": 8, "bootstrap": 2, "seed": 3, "window_s": 0.256}


def burst_npz(seed: int = 0, fs: float = 1000.0, seconds: float = 12.0, bursts: int = 6) -> bytes:
    """An .npz trace (``data`` and ``sampling_rate_hz``) with ``bursts`` tone bursts in noise."""
    rng = np.random.default_rng(seed)
    n = int(fs * seconds)
    t = np.arange(n) / fs
    x = 0.05 * rng.standard_normal(n)
    for k in range(bursts):
        t0 = (k + 0.5) * seconds / bursts + rng.uniform(-0.1, 0.1)
        f0 = rng.uniform(80.0, 250.0)
        x += np.exp(-0.5 * ((t - t0) / 0.02) ** 2) * np.cos(2 * np.pi * f0 * (t - t0))
    buffer = io.BytesIO()
    np.savez(buffer, data=x, sampling_rate_hz=np.float64(fs))
    return buffer.getvalue()


def drift_site_trace(seed: int, f_burst_hz: float = 120.0, seconds: float = 60.0,
                     fs: float = 1000.0) -> np.ndarray:
    """One trace of the generated site the drift checks use: decaying bursts
    x = A·exp(−t/τ)·sin(2πft), τ = 30 ms, every ~1.2 s, in AR(1) red noise with a steady 50 Hz
    line."""
    rng = np.random.default_rng(seed)
    n = int(fs * seconds)
    t = np.arange(n) / fs
    x = lfilter([1.0], [1.0, -0.95], 0.02 * rng.standard_normal(n))
    x += 0.2 * np.sin(2 * np.pi * 50.0 * t + rng.uniform(0, 2 * np.pi))
    onsets = np.arange(1.0, seconds - 1.0, 1.2)
    for t0 in onsets + rng.uniform(-0.2, 0.2, onsets.size):
        i = int(t0 * fs)
        tau = np.arange(min(n - i, 300)) / fs
        f = f_burst_hz * rng.uniform(0.9, 1.1)
        x[i:i + tau.size] += rng.uniform(2.0, 4.0) * np.exp(-tau / 0.03) * np.sin(2 * np.pi * f * tau)
    return x


def corpus_files(count: int = 2, seed: int = 0, **kwargs) -> list:
    """Multipart ``files`` entries for httpx / TestClient."""
    return [("files", (f"trace{i}.npz", burst_npz(seed + i, **kwargs), "application/octet-stream"))
            for i in range(count)]


def settings_for(data_dir: Path, **overrides) -> ServiceSettings:
    values = {"data_dir": data_dir, "lease_s": 3.0, "poll_s": 0.2, "max_attempts": 3}
    values.update(overrides)
    return ServiceSettings(**values)


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def service_env(**overrides) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("BURSTLENS_")}
    env.update({"BURSTLENS_LEASE_S": "3", "BURSTLENS_POLL_S": "0.2", "BURSTLENS_MAX_ATTEMPTS": "3"})
    env.update({k: str(v) for k, v in overrides.items()})
    return env


class LiveServer:
    """``burstlens serve`` as a real process on a loopback port."""

    def __init__(self, data_dir: Path, workers: int = 1, **env):
        self.data_dir, self.workers, self.env = data_dir, workers, env
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.proc: subprocess.Popen | None = None

    def start(self) -> LiveServer:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "burstlens.service.cli", "serve", "--host", "127.0.0.1", "--port",
             str(self.port), "--data-dir", str(self.data_dir), "--workers", str(self.workers),
             "--log-level", "warning"], env=service_env(**self.env))
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            assert self.proc.poll() is None, f"serve exited with {self.proc.returncode}"
            try:
                httpx.get(self.url + "/v1/health", timeout=1.0)
                return self
            except httpx.TransportError:
                time.sleep(0.1)
        self.stop(signal.SIGKILL)  # never leave a server behind that did not come up in time
        raise RuntimeError("server did not come up in 60 s")

    def worker_pids(self) -> list[int]:
        return child_pids(self.proc.pid)

    def stop(self, sig=signal.SIGTERM, timeout: float = 90.0) -> int | None:
        if self.proc is None or self.proc.poll() is not None:
            return None if self.proc is None else self.proc.returncode
        children = self.worker_pids()
        self.proc.send_signal(sig)
        try:
            code = self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            code = self.proc.wait()
        if sig == signal.SIGKILL:  # orphans notice their parent is gone; make sure they end
            for pid in children:
                _wait_gone(pid, timeout=30.0)
        return code


def child_pids(parent: int) -> list[int]:
    """Live child processes of ``parent`` (from /proc; Linux)."""
    pids = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            stat = Path(f"/proc/{entry}/stat").read_text()
        except OSError:
            continue
        fields = stat.rsplit(")", 1)[1].split()
        if int(fields[1]) == parent and fields[0] != "Z":
            pids.append(int(entry))
    return sorted(pids)


def _wait_gone(pid: int, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.1)
    os.kill(pid, signal.SIGKILL)


def wait_for(predicate, timeout: float = 60.0, interval: float = 0.1):
    """Poll ``predicate()`` until it returns a truthy value; that value, or an AssertionError."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(interval)
    raise AssertionError(f"condition not met within {timeout} s")


def recording_client(calls: dict, n_windows: int = 6):
    """A stand-in for ``burstlens.service.client.Client`` in CLI tests: records in ``calls`` what
    ``burstlens submit`` sends (``files``, the upload's reading options ``upload``, the job's
    settings ``job``) and answers as a server would."""

    class RecordingClient:
        def __init__(self, server, token):
            pass

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

        def upload_corpus(self, files, **read_options):
            calls["files"] = [str(f) for f in files]
            calls["upload"] = read_options
            return {"id": "c1", "summary": {"n_windows": n_windows}}

        def submit_job(self, corpus_id, settings):
            calls["job"] = settings
            return {"id": "j1", "state": "waiting"}

    return RecordingClient
