"""``burstlens transform --filterbank FILE PATH... --out FILE.npz``: apply a tuned filterbank.

``--continuous`` (with ``--out OUT.zarr``) transforms every trace whole instead, read as the
tuning read its corpus, into a Zarr v3 store with UTC times (``search.continuous``), sampled at
the step the kernels allow (``search.timestep``) or ``--time-step S``; a run over a store resumes
it (after a failure, or with later files of the same traces); the bar counts the chunks.

The files are cut into windows as the filterbank's tuning cut its corpus: its rate and window
length, and the corpus options its job recorded (``FilterbankDocument.reading_options``);
``--windowing`` and ``--max-windows`` override. The NPZ (docs/design.md §8) has the members of
``search.documents.npz_members``, the same as ``POST /v1/transform``; it is written a chunk of
windows at a time (``search.npz_stream``), so memory holds the windows and one chunk of images,
never the whole (M, C, N) image; a progress bar on stderr counts the windows (``--quiet``: none).
"""
from __future__ import annotations

import argparse
import json
import os
import sys

from tqdm import tqdm

from burstlens.search.continuous import transform_continuous
from burstlens.search.corpus import CorpusError, read_corpus
from burstlens.search.documents import FilterbankDocument
from burstlens.search.npz_stream import write_transform_npz
from burstlens.service.commands.options import add_corpus_option, corpus_options_from_args


def register(p) -> None:
    p.description = ("Cut windows from the waveform files as the tuning did and write the learned "
                     "representation (windows x channels x samples) with its axes to an NPZ.")
    p.add_argument("--filterbank", required=True, metavar="FILE", help="filterbank.json from tune")
    p.add_argument("paths", nargs="+", metavar="PATH", help="waveform files or folders")
    p.add_argument("--out", required=True, metavar="FILE.npz", help="output NPZ file")
    p.add_argument("--windowing", choices=["bursts", "whole", "sliding"],
                   help="how windows are cut (one of %(choices)s; default: as the filterbank's "
                        "tuning recorded, else the reader's)")
    add_corpus_option(p, "max_windows")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--continuous", action="store_true",
                   help="transform every trace whole into a Zarr v3 store (--out OUT.zarr) with UTC times")
    p.add_argument("--time-step", type=float, metavar="S",
                   help="with --continuous: output step in seconds (default: the finest step the "
                        "kernels need, see the store's time_step attribute)")
    p.add_argument("--jobs", type=int, metavar="N",
                   help="with --continuous: processes computing the chunks (default 1; -1: every core)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    def fail(message: str) -> int:
        print(f"burstlens transform: {message}", file=sys.stderr)
        return 2

    try:  # --max-windows, checked as tune checks it; None when not given
        args.max_windows = corpus_options_from_args(args).get("max_windows")
    except ValueError as exc:
        return fail(f"--max-windows: {exc}")
    try:
        with open(args.filterbank, encoding="utf-8") as fh:
            document = FilterbankDocument.read(json.load(fh))
        filterbank = document.filterbank
        options = document.reading_options()
    except OSError as exc:
        return fail(f"--filterbank {args.filterbank}: {exc.strerror or exc}")
    except (ValueError, json.JSONDecodeError) as exc:
        return fail(f"--filterbank {args.filterbank}: {exc}")
    missing = [p for p in args.paths if not os.path.exists(p)]
    if missing:
        return fail(f"{missing[0]}: no such file or folder")
    fs = filterbank.sampling_rate_hz
    if args.continuous:
        return _run_continuous(args, document, options, fail)
    if args.time_step is not None:
        return fail(f"--time-step {args.time_step:g}: only with --continuous")
    if args.jobs is not None:
        return fail(f"--jobs {args.jobs}: only with --continuous")
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
    out = args.out if args.out.endswith(".npz") else args.out + ".npz"
    folder = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(folder):
        return fail(f"--out {args.out}: folder {folder} does not exist")
    bar = None
    if not args.quiet:
        bar = tqdm(total=corpus.windows.shape[0], desc="transform", unit="window", file=sys.stderr)
    try:
        m, c, n = write_transform_npz(out, corpus.windows, filterbank, corpus.window_meta,
                                      progress=None if bar is None else bar.update)
    except OSError as exc:  # e.g. a full disk: nothing was written (the writer removes its temp)
        return fail(f"--out {out}: {exc.strerror or exc}")
    finally:
        if bar is not None:
            bar.close()
    print(f"wrote {out}: {m} windows x {c} channels x {n} samples at {fs:g} Hz")
    return 0


def _run_continuous(args, document, options, fail) -> int:
    if not args.out.endswith(".zarr"):
        return fail(f"--out {args.out}: with --continuous the output is a Zarr store named *.zarr")
    folder = os.path.dirname(os.path.abspath(args.out))
    if not os.path.isdir(folder):
        return fail(f"--out {args.out}: folder {folder} does not exist")
    if args.windowing is not None or args.max_windows is not None:
        return fail("--windowing and --max-windows cut windows; --continuous transforms whole traces")
    jobs = 1 if args.jobs is None else args.jobs
    if jobs == 0 or jobs < -1:
        return fail(f"--jobs {jobs}: must be at least 1, or -1 for all CPUs")
    bar = None
    if not args.quiet:
        bar = tqdm(total=0, desc="transform", unit="chunk", file=sys.stderr)

    def plan(total):
        if bar is not None:
            bar.reset(total=total)

    def progress(done):
        if bar is not None:
            bar.update(done - bar.n)

    try:
        result = transform_continuous(args.paths, document, args.out, step_s=args.time_step,
                                      reading=options, progress=progress, on_plan=plan, jobs=jobs)
    except (CorpusError, ValueError) as exc:
        return fail(str(exc))
    except OSError as exc:
        return fail(f"--out {args.out}: {exc.strerror or exc}")
    finally:
        if bar is not None:
            bar.close()
    step = result.step
    appended = sum(p.appended for p in result.parts)
    print(f"wrote {args.out}: {len(result.parts)} part(s)"
          f"{f' ({appended} continuing the store)' if appended else ''}, {len(document.filterbank)} channels, "
          f"time step {step.seconds:g} s ({step.samples} samples, aliasing ≤ {step.aliasing:.1e})")
    return 0
