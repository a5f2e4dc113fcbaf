"""``burstlens transform --filterbank FILE PATH... --out FILE.npz``: apply a tuned filterbank.

The NPZ (DESIGN §8) holds plain arrays only (no object arrays, so ``np.load`` never needs
``allow_pickle``):

- ``representation`` (M, C, N) float32: the filterbank image of each window;
- ``times_s`` (N,) float64: sample times within a window, s (n / fs);
- ``center_hz``, ``time_spread_s``, ``freq_spread_hz``, ``correlation``, ``cell_area``,
  ``chirp_hz_per_s`` (C,) float64: the channel table;
- ``sampling_rate_hz`` () float64; ``window_offset_s`` (M,) float64: start of each window in its
  trace; ``window_file`` and ``window_trace_id`` (M,) unicode strings.
"""
from __future__ import annotations

import argparse

CHANNEL_TABLE = ("center_hz", "time_spread_s", "freq_spread_hz", "correlation", "cell_area",
                 "chirp_hz_per_s")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "transform", help="apply a filterbank to waveform files, write an NPZ",
        description="Cut windows from the waveform files as the tuning did and write the learned "
                    "representation (windows x channels x samples) with its axes to an NPZ.")
    p.add_argument("--filterbank", required=True, metavar="FILE", help="filterbank.json from tune")
    p.add_argument("paths", nargs="+", metavar="PATH", help="waveform files or folders")
    p.add_argument("--out", required=True, metavar="FILE.npz", help="output NPZ file")
    p.add_argument("--windowing", choices=["bursts", "whole", "sliding"],
                   help="how windows are cut (default: the reader's)")
    p.add_argument("--max-windows", type=int, help="cap on the number of windows")
    p.set_defaults(func=run)


def npz_arrays(representation, filterbank, corpus) -> dict:
    """The arrays written to the NPZ (see module docstring)."""
    import numpy as np

    fs = filterbank.sampling_rate_hz
    n = representation.shape[-1]
    meta = list(getattr(corpus, "window_meta", None) or [{}] * representation.shape[0])
    arrays = {"representation": np.asarray(representation, dtype=np.float32),
              "times_s": np.arange(n, dtype=np.float64) / fs,
              "sampling_rate_hz": np.float64(fs),
              "window_offset_s": np.array([float(m.get("offset_s", np.nan)) for m in meta]),
              "window_file": np.array([str(m.get("file", "")) for m in meta], dtype=np.str_),
              "window_trace_id": np.array([str(m.get("trace_id", "")) for m in meta], dtype=np.str_)}
    for name in CHANNEL_TABLE:
        arrays[name] = np.asarray(getattr(filterbank, name), dtype=np.float64)
    return arrays


def run(args: argparse.Namespace) -> int:
    import json
    import os
    import sys

    import numpy as np

    def fail(message: str) -> int:
        print(f"burstlens transform: {message}", file=sys.stderr)
        return 2

    from search.corpus import CorpusError, read_corpus
    from search.filterbank import Filterbank
    from search.transform import transform

    try:
        with open(args.filterbank, encoding="utf-8") as fh:
            fb_json = json.load(fh)
        filterbank = Filterbank.from_json(fb_json)
    except OSError as exc:
        return fail(f"--filterbank {args.filterbank}: {exc.strerror or exc}")
    except (ValueError, json.JSONDecodeError) as exc:
        return fail(f"--filterbank {args.filterbank}: {exc}")
    if args.max_windows is not None and args.max_windows < 1:
        return fail(f"--max-windows {args.max_windows}: must be at least 1")
    missing = [p for p in args.paths if not os.path.exists(p)]
    if missing:
        return fail(f"{missing[0]}: no such file or folder")
    fs = filterbank.sampling_rate_hz
    options = {"sampling_rate_hz": fs}
    window_samples = fb_json.get("window_samples")
    if isinstance(window_samples, int) and window_samples > 0:
        options["window_s"] = window_samples / fs
    for key in ("windowing", "max_windows"):
        if getattr(args, key) is not None:
            options[key] = getattr(args, key)
    try:
        corpus = read_corpus(args.paths, **options)
    except (CorpusError, ValueError, OSError) as exc:
        return fail(str(exc))
    if abs(corpus.sampling_rate_hz - fs) > 1e-9 * fs:
        return fail(f"the windows are at {corpus.sampling_rate_hz:g} Hz but the filterbank "
                    f"is for {fs:g} Hz")
    representation = transform(corpus.windows, filterbank)
    out = args.out if args.out.endswith(".npz") else args.out + ".npz"
    folder = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(folder):
        return fail(f"--out {args.out}: folder {folder} does not exist")
    tmp = out + ".tmp.npz"
    np.savez(tmp, **npz_arrays(representation, filterbank, corpus))
    os.replace(tmp, out)
    print(f"wrote {out}: {representation.shape[0]} windows x {representation.shape[1]} channels "
          f"x {representation.shape[2]} samples at {fs:g} Hz")
    return 0
