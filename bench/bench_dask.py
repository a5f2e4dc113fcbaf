"""Scale-out line of `make bench`: a fit's evaluations per second on a 2-worker Dask LocalCluster
against local joblib on the same machine.

Three runs of the same FilterbankSearch on the same synthetic burst corpus:
  serial      jobs=1, no parallelism;
  joblib      jobs=2 with joblib's default process backend (loky), on this machine;
  dask        joblib's Dask backend on a distributed.LocalCluster of 2 worker processes with one
              thread each, on loopback — the path `burstlens serve --dask ADDR` takes.
Evaluations per second = candidate filterbanks scored (diagnostics_["evaluations"], all stages)
over the fit's wall time (diagnostics_["elapsed_s"]), so the serial parts of a fit (Gaussian-process
steps, refinement bookkeeping) and the Dask overheads (task submission, scatter of the windows,
result transfer) are all inside the figure. On one machine the three runs share the same cores,
so the ratio says what the Dask path costs (or saves: its worker processes live for the whole fit
and keep their prepared windows) against local joblib; the gain comes from adding machines.

Run: .venv/bin/python bench/bench_dask.py [--windows M] [--channels C] [--evaluations E]
"""
from __future__ import annotations

import argparse
import json
import sys
import time

import numpy as np


FS = 1000.0


class BurstCorpus:
    """M synthetic windows (N samples at FS): noise plus one Gaussian-enveloped tone burst each,
    with the attributes FilterbankSearch.fit reads. Invented for the benchmark only."""

    def __init__(self, m: int, n: int, seed: int = 0):
        rng = np.random.default_rng(seed)
        t = np.arange(n) / FS
        self.windows = 0.05 * rng.standard_normal((m, n))
        for i in range(m):
            t0, f0 = rng.uniform(0.3, 0.7) * n / FS, rng.uniform(60.0, 300.0)
            self.windows[i] += np.exp(-0.5 * ((t - t0) / 0.02) ** 2) * np.cos(2 * np.pi * f0 * (t - t0))
        self.sampling_rate_hz = FS
        self.rejections = []
        self.source_hash = f"bench-{m}x{n}-{seed}"

    def to_json(self) -> dict:
        return {"windows": int(self.windows.shape[0]), "sampling_rate_hz": FS}


def fit(corpus, options: dict, jobs: int) -> tuple[float, int, float, dict]:
    """(evaluations per second, evaluations, wall seconds, filterbank JSON) of one fit."""
    from burstlens.search.optimize import FilterbankSearch

    started = time.perf_counter()
    search = FilterbankSearch(**options, jobs=jobs).fit(corpus)
    wall = time.perf_counter() - started
    count = len(search.diagnostics_["evaluations"])
    filterbank = search.filterbank_.to_json()
    # the provenance records how the work was spread (the file's key for jobs is n_jobs);
    # everything else must be identical
    filterbank["settings"] = {k: v for k, v in filterbank.get("settings", {}).items()
                              if k != "n_jobs"}
    return count / wall, count, wall, filterbank


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--windows", type=int, default=64)
    parser.add_argument("--samples", type=int, default=1024)
    parser.add_argument("--channels", type=int, default=32)
    parser.add_argument("--evaluations", type=int, default=16)
    args = parser.parse_args(argv)

    import joblib
    from distributed import Client, LocalCluster

    import os

    corpus = BurstCorpus(args.windows, args.samples)
    load_before = os.getloadavg()[0]
    options = {"channels": args.channels, "evaluations": args.evaluations, "bootstrap": 2,
               "seed": 0}
    rows = {"serial": fit(corpus, options, 1)}
    with joblib.parallel_config(backend="loky"):
        rows["joblib"] = fit(corpus, options, 2)
    with (LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                       dashboard_address="127.0.0.1:0") as cluster,
          Client(cluster),
          joblib.parallel_config(backend="dask")):
        rows["dask"] = fit(corpus, options, -1)

    same = all(json.dumps(r[3], sort_keys=True) == json.dumps(rows["serial"][3], sort_keys=True)
               for r in rows.values())
    print(f"bench_dask: {args.windows} windows x {args.samples} samples, {args.channels} channels, "
          f"stage-1 budget {args.evaluations}")
    for name, (rate, count, wall, _) in rows.items():
        print(f"  {name:7s} {rate:8.2f} evaluations/s  ({count} evaluations in {wall:.1f} s)")
    print(f"  scale-out: dask(2 workers) / joblib(2 processes) = {rows['dask'][0] / rows['joblib'][0]:.2f}"
          f"; dask / serial = {rows['dask'][0] / rows['serial'][0]:.2f}"
          f"; same filterbank in all three runs: {'yes' if same else 'NO'}")
    print(f"  {os.cpu_count()} cores; 1-min load average {load_before:.1f} before, "
          f"{os.getloadavg()[0]:.1f} after (other work on the machine skews all three rows)")
    print("  (all three rows share the same cores, so none can scale here: the ratio is what the "
          "Dask path costs or saves against local joblib; its gain comes from Dask workers on "
          "more machines)")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
