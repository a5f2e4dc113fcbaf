"""``burstlens submit PATH... --server URL``: upload a corpus, queue a job, follow it, fetch
results.

Once a followed job succeeds, the held-out gain and any warnings (``service.verdict``) are printed
first, on stderr, before the saved paths or the summary JSON on stdout.
"""
from __future__ import annotations

import argparse


def add_settings_flags(p: argparse.ArgumentParser) -> None:
    """The job settings flags (DESIGN §9); unset flags leave the engine's defaults."""
    g = p.add_argument_group("job settings (unset: the engine's default, recorded in the result)")
    g.add_argument("--channels", type=int, help="number of channels")
    g.add_argument("--band", nargs=2, type=float, metavar=("LO", "HI"), help="channel band, Hz")
    g.add_argument("--spacing", choices=["log", "linear"], help="channel centre spacing")
    g.add_argument("--window-s", type=float, help="window length, s")
    g.add_argument("--criterion", choices=["renyi", "concentration", "sparsity"])
    g.add_argument("--alpha", type=float, help="Rényi order (default 3)")
    g.add_argument("--cell-area", nargs=2, type=float, metavar=("MIN", "MAX"),
                   help="cell area bounds (1 = Heisenberg minimum)")
    g.add_argument("--no-chirp", action="store_true", help="chirp rate fixed at 0")
    g.add_argument("--no-refine", action="store_true", help="skip per-channel refinement")
    g.add_argument("--evaluations", type=int, help="evaluation budget")
    g.add_argument("--time-limit", type=float, metavar="S", help="time budget, s")
    g.add_argument("--bootstrap", type=int, help="bootstrap resamples")
    g.add_argument("--seed", type=int)
    g.add_argument("--windowing", choices=["bursts", "whole", "sliding"])
    g.add_argument("--max-windows", type=int)
    g.add_argument("--held-out", type=_share(0.9), metavar="SHARE",
                   help="share of windows kept out of the fit to judge it (0 to 0.9, default "
                        "0.25; 0 judges in-sample)")
    g.add_argument("--max-negative-share", type=_share(1.0), metavar="SHARE",
                   help="largest share of the image's absolute mass that may be negative "
                        "(0 to 1, default 0.01)")
    g.add_argument("--jobs", type=int, help="parallel evaluations on the worker (capped there)")


def _share(high: float):
    """argparse type: a float in [0, high], so a bad share fails before any upload or fit."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if not 0.0 <= value <= high:
            raise argparse.ArgumentTypeError(f"expected a share from 0 to {high:g}, got {text}")
        return value
    return parse


def settings_from_args(args: argparse.Namespace) -> dict:
    """Flags → the JSON settings of POST /v1/jobs (only the flags given)."""
    settings: dict = {}
    for flag, key in (("channels", "channels"), ("spacing", "spacing"), ("window_s", "window_s"),
                      ("evaluations", "evaluations"), ("time_limit", "time_limit_s"),
                      ("bootstrap", "bootstrap"), ("seed", "seed"), ("windowing", "windowing"),
                      ("max_windows", "max_windows"), ("jobs", "jobs"),
                      ("held_out", "held_out"), ("max_negative_share", "max_negative_share")):
        if getattr(args, flag) is not None:
            settings[key] = getattr(args, flag)
    if args.band is not None:
        settings["band_hz"] = list(args.band)
    if args.cell_area is not None:
        settings["cell_area"] = list(args.cell_area)
    if args.criterion is not None or args.alpha is not None:
        settings["criterion"] = {k: v for k, v in (("name", args.criterion), ("alpha", args.alpha))
                                 if v is not None}
    if args.no_chirp:
        settings["chirp"] = False
    if args.no_refine:
        settings["refine"] = False
    return settings


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "submit", help="tune on a server: upload, queue, follow, download",
        description="Upload waveform files as a corpus, queue a tuning job on a burstlens server, "
                    "and (with --wait) follow its progress and download filterbank.json, "
                    "diagnostics.json and report.html into --out.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="waveform files or folders")
    p.add_argument("--server", required=True, metavar="URL", help="e.g. http://127.0.0.1:8000")
    p.add_argument("--token", help="bearer token (default: $BURSTLENS_TOKEN)")
    p.add_argument("--wait", action="store_true", help="follow the job until it ends")
    p.add_argument("--out", metavar="DIR", help="download the results here (implies --wait)")
    add_settings_flags(p)
    p.set_defaults(func=run)


# Files met in a folder that are documentation or metadata, never waveforms.
NOT_WAVEFORMS = {".md", ".txt", ".json", ".html", ".htm", ".pdf", ".xml", ".yaml", ".yml",
                 ".py", ".png", ".jpg", ".log"}


def expand(paths: list[str]) -> list:
    """Files as given; folders expanded to their files (sorted; hidden files and obvious
    documentation or metadata, by suffix, skipped)."""
    from pathlib import Path

    files = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            files += sorted(p for p in path.rglob("*") if p.is_file()
                            and p.suffix.lower() not in NOT_WAVEFORMS
                            and not any(part.startswith(".") for part in p.relative_to(path).parts))
        elif path.is_file():
            files.append(path)
        else:
            raise FileNotFoundError(f"{raw}: no such file or folder")
    return files


def follow(client, job_id: str, *, stream=None) -> dict:
    """Poll the job with a tqdm bar driven by its progress ``fraction``; returns the final job."""
    from tqdm import tqdm

    bar = tqdm(total=1000, unit="‰", file=stream, bar_format="{desc} {percentage:3.0f}%|{bar}| "
               "{elapsed}<{remaining} {postfix}", desc=f"job {job_id[:8]}")

    def show(job: dict) -> None:
        prog = job.get("progress") or {}
        fraction = prog.get("fraction")
        if isinstance(fraction, (int, float)):
            bar.n = int(round(1000 * min(max(fraction, 0.0), 1.0)))
        best = prog.get("best_objective")
        bar.set_postfix_str(
            f"{job['state']} {prog.get('stage') or ''} round {prog.get('round') or 0} "
            f"evaluations {prog.get('evaluations') or 0} (budget {prog.get('budget') or '?'})"
            + (f" best {best:.4f}" if isinstance(best, (int, float)) else ""), refresh=False)
        bar.refresh()

    try:
        job = client.wait(job_id, on_progress=show, poll_s=1.0)
        if job["state"] == "succeeded":
            bar.n = 1000
            bar.refresh()
        return job
    finally:
        bar.close()


def run(args: argparse.Namespace) -> int:
    import json
    import os
    import sys

    from service import verdict
    from service.client import Client, ServiceError

    token = args.token or os.environ.get("BURSTLENS_TOKEN")
    try:
        files = expand(args.paths)
    except FileNotFoundError as exc:
        print(f"burstlens submit: {exc}", file=sys.stderr)
        return 2
    if not files:
        print("burstlens submit: no files found", file=sys.stderr)
        return 2
    with Client(args.server, token) as client:
        try:
            corpus = client.upload_corpus(files)
            print(f"corpus {corpus['id']}: {len(files)} file(s), "
                  f"{corpus['summary'].get('n_windows', '?')} window(s)", file=sys.stderr)
            job = client.submit_job(corpus["id"], settings_from_args(args))
            print(f"job {job['id']} {job['state']}", file=sys.stderr)
            if not (args.wait or args.out):
                print(job["id"])
                return 0
            job = follow(client, job["id"], stream=sys.stderr)
            if job["state"] != "succeeded":
                print(f"job {job['id']} {job['state']}: {job.get('error') or job.get('stop_reason')}",
                      file=sys.stderr)
                return 1
            # the verdict goes to stderr with the other messages for people, so stdout stays
            # the machine-readable part (saved paths or the summary JSON)
            print("\n".join(verdict.lines(client.diagnostics(job["id"]))), file=sys.stderr)
            if args.out:
                saved = client.download_results(job["id"], args.out)
                for path in saved.values():
                    print(path)
            else:
                print(json.dumps(job.get("summary") or {}, indent=1))
        except ServiceError as exc:
            print(f"burstlens submit: {exc.message} (HTTP {exc.status})", file=sys.stderr)
            return 2 if 400 <= exc.status < 500 else 1
        except OSError as exc:
            print(f"burstlens submit: {exc}", file=sys.stderr)
            return 1
    return 0
