"""Measure the peak memory of the transform and of a job's fit, and fit a sizing formula.

Usage (from the project folder, with the project's virtualenv):

    .venv/bin/python deploy/measure_memory.py            # transform and fit (15-20 min on 2 cores)
    .venv/bin/python deploy/measure_memory.py --quick    # fewer points

Each point runs in a fresh Python process (so caches of one point do not inflate the next) and
reports that process's peak resident set size (``resource.getrusage(RUSAGE_SELF).ru_maxrss``,
KiB on Linux) minus its resident size just before the work started (after imports and after the
input windows exist). The excess is fitted by least squares as

    excess_bytes ≈ k_img · M·C·N + k_win · M·N + k_0

with M windows, C channels, N samples per window, for the transform (its images are (M, C, N)
float32, 4 bytes a value, so k_img ≥ 4 is what the layout alone predicts), and as
``k_cn · C·N + k_n · N + k_0`` for a fit, whose work goes in chunks of 16 windows (see MODELS).
The measured constants include numpy's and scipy's work arrays and the kernel-plan caches.
Synthetic noise windows are enough: memory does not depend on the sample values.

The numbers are for this machine's numpy/scipy builds; rerun the script on the target host
before sizing a fleet (deploy/README.md, "Sizing").
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent

_CHILD = r"""
import json, resource, sys
import numpy as np
kind, m, c, n = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
fs = 1000.0
from burstlens.search.filterbank import Filterbank, center_grid
from burstlens.search.tfd import transform
from burstlens.search.optimize import FilterbankSearch
rng = np.random.default_rng(0)
windows = rng.standard_normal((m, n))

def rss_kib():
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])

class SyntheticCorpus:
    # the attributes FilterbankSearch.fit reads (see its docstring)
    def __init__(self, windows):
        self.windows, self.sampling_rate_hz = windows, fs
        self.rejections, self.source_hash = [], "synthetic"
    def to_json(self):
        return {"windows": int(self.windows.shape[0]), "sampling_rate_hz": fs}

before = rss_kib()
if kind == "transform":
    centers = center_grid([10.0, 450.0], c, "log")
    bank = Filterbank.constant_window(centers, 0.02, fs)
    out = transform(windows, bank)
    assert out.shape == (m, c, n)
else:
    FilterbankSearch(channels=c, evaluations=8, bootstrap=2, seed=0, jobs=1).fit(
        SyntheticCorpus(windows))
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"before_kib": before, "peak_kib": peak}))
"""

FULL = {
    "transform": [(m, c, n) for m in (64, 256) for c in (16, 64) for n in (512, 2048)],
    # one factor at a time around M=64, C=16, N=1024
    "fit": [(64, 16, 1024), (32, 16, 1024), (256, 16, 1024), (64, 8, 1024), (64, 48, 1024),
            (64, 16, 512), (64, 16, 2048)],
}
QUICK = {
    "transform": [(64, 16, 512), (256, 16, 512), (64, 64, 2048), (256, 64, 1024)],
    "fit": [(32, 8, 512), (64, 16, 1024), (32, 8, 2048)],
}


def measure(kind: str, m: int, c: int, n: int) -> dict:
    """Peak RSS excess (bytes) of one transform or fit of M × N windows with C channels."""
    out = subprocess.run([sys.executable, "-c", _CHILD, kind, str(m), str(c), str(n)], cwd=ROOT,
                         capture_output=True, text=True, check=True)
    row = json.loads(out.stdout.strip().splitlines()[-1])
    return {"kind": kind, "M": m, "C": c, "N": n,
            "excess_bytes": (row["peak_kib"] - row["before_kib"]) * 1024,
            "baseline_bytes": row["before_kib"] * 1024}


# Regressors of each kind (bytes = Σ coefficient · regressor). The transform holds its (M, C, N)
# output and (M, N) analytic signals; a fit scores 16-window chunks (search.fit.evaluate.CHUNK), so
# its peak follows the per-chunk work and the kernel plans, C·N and N, not M (the M-sized arrays
# of a fit, windows and per-window sums, are 8·M·N + 32·M·C bytes: small next to these here).
MODELS = {"transform": (("M·C·N", lambda r: r["M"] * r["C"] * r["N"]),
                        ("M·N", lambda r: r["M"] * r["N"]), ("1", lambda r: 1.0)),
          "fit": (("C·N", lambda r: r["C"] * r["N"]), ("N", lambda r: r["N"]),
                  ("1", lambda r: 1.0))}


def fit_formula(kind: str, rows: list[dict]) -> list[tuple[str, float]]:
    """Least-squares coefficients (bytes per unit of each regressor of ``MODELS[kind]``)."""
    terms = MODELS[kind]
    a = np.array([[f(r) for _, f in terms] for r in rows], dtype=float)
    y = np.array([r["excess_bytes"] for r in rows], dtype=float)
    coef, *_ = np.linalg.lstsq(a, y, rcond=None)
    return [(name, float(c)) for (name, _), c in zip(terms, coef, strict=True)]


def predict(kind: str, formula: list[tuple[str, float]], row: dict) -> float:
    return sum(c * f(row) for (_, c), (_, f) in zip(formula, MODELS[kind], strict=True))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer measurement points")
    parser.add_argument("--only", choices=["transform", "fit"], help="measure one kind only")
    args = parser.parse_args(argv)
    grid = QUICK if args.quick else FULL
    for kind in ("transform", "fit"):
        if args.only and kind != args.only:
            continue
        rows = [measure(kind, *point) for point in grid[kind]]
        print(f"{kind}:")
        print("  | M | C | N | peak RSS excess (MiB) |")
        print("  |---:|---:|---:|---:|")
        for r in rows:
            print(f"  | {r['M']} | {r['C']} | {r['N']} | {r['excess_bytes'] / 2**20:.0f} |")
        print(f"  process RSS before the work: {min(r['baseline_bytes'] for r in rows) / 2**20:.0f}-"
              f"{max(r['baseline_bytes'] for r in rows) / 2**20:.0f} MiB")
        formula = fit_formula(kind, rows)
        text = " + ".join(f"{c / 2**20:.0f} MiB" if name == "1" else f"{c:.1f} B·{name}"
                          for name, c in formula)
        print(f"  least squares: excess ≈ {text}")
        worst = max(abs(r["excess_bytes"] - predict(kind, formula, r)) for r in rows)
        print(f"  largest residual: {worst / 2**20:.0f} MiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
