"""``burstlens submit PATH... --server URL``: upload a corpus, queue a job, follow it, fetch
results.

Once a followed job succeeds, the held-out gain and any warnings (``service.verdict``) are printed
first, on stderr, before the saved paths or the summary JSON on stdout.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from tqdm import tqdm

from burstlens.search.corpus import folder_files, is_waveform_file
from burstlens.service import verdict
from burstlens.service.client import Client, ServiceError
from burstlens.service.commands.options import (add_corpus_options, add_job_settings, add_paths,
                                                settings_from_args, settings_json_from_args)
from burstlens.service.energy_channels import lines_or_note, sample_windows


def register(p) -> None:
    p.description = ("Upload waveform files as a corpus, queue a filterbank search on a burstlens "
                     "server, and (with --wait) follow its progress and download filterbank.json, "
                     "diagnostics.json and report.html into --out.")
    add_paths(p)
    p.add_argument("--server", required=True, metavar="URL", help="e.g. http://127.0.0.1:8000")
    p.add_argument("--token", help="bearer token (default: $BURSTLENS_TOKEN)")
    p.add_argument("--wait", action="store_true",
                   help="follow the job until it ends (default: print the job id and return)")
    p.add_argument("--out", metavar="DIR", help="download the results here (implies --wait; "
                                                "default none: they stay on the server)")
    add_corpus_options(p)
    add_job_settings(p)
    p.set_defaults(func=run)


def expand(paths: list[str]) -> list:
    """Files as given; folders expanded to the files the corpus reader reads in them (hidden
    entries and non-waveform files such as a README skipped, by the reader's own
    ``search.corpus.folder_files`` and ``is_waveform_file``), so the upload holds what the job
    reads. ``FileNotFoundError`` for a missing path, ``OSError`` for an unreadable file."""
    files = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            files += [Path(f) for f in folder_files(path) if is_waveform_file(f)]
        elif path.is_file():
            files.append(path)
        else:
            raise FileNotFoundError(f"{raw}: no such file or folder")
    return files


def follow(client, job_id: str, *, stream=None) -> dict:
    """Poll the job with a tqdm bar driven by its progress ``fraction``; returns the final job."""
    bar = tqdm(total=1000, unit="‰", file=stream, bar_format="{desc} {percentage:3.0f}%|{bar}| "
               "{elapsed}<{remaining}{postfix}", desc=f"job {job_id[:8]}")

    # imported here: the tune command loads the engine, which following a job does not need
    from burstlens.service.commands.tune import ProgressWords

    words = ProgressWords()  # the fit's best kept apart from the judgement, as `tune` shows it

    def show(job: dict) -> None:
        prog = job.get("progress") or {}
        fraction = prog.get("fraction")
        if isinstance(fraction, (int, float)):
            bar.n = int(round(1000 * min(max(fraction, 0.0), 1.0)))
        text = job["state"]
        if prog.get("stage"):
            best = prog.get("best_objective")
            text += ": " + words.during({
                "stage": prog["stage"], "round": prog.get("round") or 0,
                "evaluations": prog.get("evaluations") or 0, "budget": prog.get("budget") or "?",
                "best_objective": best if isinstance(best, (int, float)) else None})
        bar.set_postfix_str(text, refresh=False)
        bar.refresh()

    try:
        job = client.wait(job_id, on_progress=show, poll_s=1.0)
        if job["state"] == "done":
            bar.n = 1000
            bar.set_postfix_str("done" + words.fit_best_words(), refresh=False)
            bar.refresh()
        return job
    finally:
        bar.close()


def run(args: argparse.Namespace) -> int:
    token = args.token or os.environ.get("BURSTLENS_TOKEN")
    settings = settings_json_from_args(args)  # what the job records: the flags given
    try:
        corpus_options = settings_from_args(args).read_options()
    except ValueError as exc:  # the server's own checks, before any upload
        print(f"burstlens submit: {exc}", file=sys.stderr)
        return 2
    try:
        files = expand(args.paths)
    except OSError as exc:  # a missing path, or a file in a folder that cannot be read
        print(f"burstlens submit: {exc}", file=sys.stderr)
        return 2
    if not files:
        print("burstlens submit: no files found", file=sys.stderr)
        return 2
    with Client(args.server, token) as client:
        try:
            # the upload check reads the corpus as the job will
            corpus = client.upload_corpus(files, **corpus_options)
            print(f"corpus {corpus['id']}: {len(files)} file(s), "
                  f"{corpus['summary'].get('n_windows', '?')} window(s)", file=sys.stderr)
            job = client.submit_job(corpus["id"], settings)
            print(f"job {job['id']} {job['state']}", file=sys.stderr)
            if not (args.wait or args.out):
                print(job["id"])
                return 0
            job = follow(client, job["id"], stream=sys.stderr)
            if job["state"] != "done":
                print(f"job {job['id']} {job['state']}: {job.get('error') or job.get('stop_reason')}",
                      file=sys.stderr)
                return 1
            # the verdict goes to stderr with the other messages for people, so stdout stays
            # the machine-readable part (saved paths or the summary JSON)
            print("\n".join(verdict.lines(client.diagnostics(job["id"]))), file=sys.stderr)
            filterbank = client.filterbank(job["id"])
            print("\n".join(lines_or_note(filterbank, sample_windows(files, filterbank))),
                  file=sys.stderr)
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
