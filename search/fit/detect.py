"""The detection criterion: a filterbank judged by how weak a burst its energy detector finds.

Where the other criteria score an image's sharpness, this one scores the job that follows: the
bursts of the stage-1 subset of the fit windows are injected at a range of gains into the
site's noise windows, and the objective is the gain (amplitude dB) at which a fixed energy
detector on the image separates them from the noise windows at ROC AUC 0.9
(``search.scorecard.detection_threshold_db``; lower is better). It is a property of a corpus,
not of one window, so the per-channel refinement (which rescores one (window, channel) row at a
time) does not apply and is skipped; the family search and the baselines use it directly. The
positivity ceiling still applies (the shares come from the ordinary scoring). Needs noise
windows: 'whole' windows (event files) have none.
"""
from __future__ import annotations

import math

import numpy as np

from burstlens.search.fit.evaluate import make_filterbank
from burstlens.search.scorecard import detection_threshold_db, filterbank_representation
from burstlens.search.spectrogram import spectrogram_representation

NAME = "detection"


def applies(ctx) -> bool:
    """Whether the run's criterion is the detection criterion."""
    return ctx.spec["name"] == NAME


def bursts(ctx) -> np.ndarray:
    """The stage-1 subset of the fit windows: the bursts the criterion injects."""
    return ctx.windows[np.asarray(ctx.state.subset, dtype=np.int64)]


def threshold(ctx, representation) -> float:
    """Detection threshold (dB) of ``representation`` on :func:`bursts` and the noise windows."""
    return detection_threshold_db(representation, bursts(ctx), ctx.noise_windows)


def filterbank_threshold(ctx, params) -> float:
    """:func:`threshold` of the filterbank with per-channel arrays ``params``."""
    fb = make_filterbank(*params, ctx.space.fs)
    return threshold(ctx, filterbank_representation("candidate", fb, ctx.s["eps"]))


def spectrogram_threshold(ctx, sigma: float) -> float:
    """:func:`threshold` of the plain Gaussian spectrogram of time spread ``sigma`` (s)."""
    return threshold(ctx, spectrogram_representation(sigma, ctx.space.fs, ctx.s["band_hz"],
                                                     ctx.windows.shape[1], ctx.s["eps"]))


def objectives(ctx, params: list, scored: list) -> list[float]:
    """Objectives of filterbanks ``params`` whose ordinary scores ``scored``
    (``Evaluator.score``) give the negative shares: their detection thresholds, +inf above the
    positivity ceiling."""
    out = []
    for p, r in zip(params, scored, strict=True):
        ceiling = ctx.ceiling(r.scores, r.shares)
        out.append(math.inf if not math.isfinite(ceiling) else filterbank_threshold(ctx, p))
    return out
