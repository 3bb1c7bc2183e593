"""Difficulty scores: the training log's loss streams accumulated over epochs. Higher = harder.

Per image (rows = image index ``[I]``), from ``image.<field> [E, I]``:
    loc_score = sum_e loc_sum / max(1, num_pos)     box regression (smooth L1) per positive anchor
    pos_score = sum_e pos_sum / max(1, num_pos)     positive-class loss per positive anchor
    neg_score = sum_e neg_sum [/ max(1, num_pos)]   background-class loss
How the background stream is normalised follows what it sums. With focal loss over *all* background
anchors (``loss.classification: focal``) it is not divided: every image is letterboxed to the same S x S
view, so every image has the same anchor set and raw sums compare. With hard-negative mining
(``hard_negative``) the sum covers ``3 x num_pos`` mined anchors, so it grows with the object count and is
divided by ``max(1, num_pos)`` like the training objective: the mean loss of the mined negatives.

Per object (rows = annotation index ``[A]``), from ``object.<field> [E, A]``:
    loc_score = sum_e loc_kept,  pos_score = sum_e cls_kept
the box regression and positive-class loss of the object's kept anchor: the matched anchor of highest class
score, whose box the detector would output (see ``detdiff.model.losses``). The mean over all matched anchors
(``*_sum / num_anchors``) also weighs the low-IoU anchors that small boxes are given, and ranked the demo's
planted faults worse (loose boxes AUROC 0.82 vs 0.87, wrong classes 0.92 vs 0.93; issue notes).

Epochs an item was not trained on hold NaN and are skipped: the score is the mean over covered epochs
times the number of epochs, so a score stays comparable with items seen every epoch. Items never covered
(unusable images, crowd annotations) score NaN. ``*_raw`` keeps the plain sums over covered epochs of the
un-normalised ``*_sum`` fields (all anchors of the item); ``*_pct`` is the percentile rank within the
stream (0-100) and, for objects, ``*_z`` the z-score within the object's class.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.stats

from detdiff.train.loss_log import LossLog


def accumulate_over_epochs(per_epoch: np.ndarray) -> np.ndarray:
    """``[E, N] -> [N]``: sum over epochs where uncovered (NaN) epochs count as the item's covered mean.

    Equals ``nanmean(per_epoch, 0) * E``; NaN where an item was never covered.
    """
    values = np.asarray(per_epoch, dtype=np.float64)
    covered = np.isfinite(values)
    n = covered.sum(axis=0)
    total = np.where(covered, values, 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, total / n * values.shape[0], np.nan)


def percentile_rank(values: np.ndarray) -> np.ndarray:
    """Percentile rank (0-100) of each finite value among the finite values ``[N]``; NaN stays NaN.

    Ties share their mean rank: the result equals ``scipy.stats.percentileofscore(finite, v, kind="mean")``
    (share of values below plus half the share equal), so the hardest item of n scores 100 - 50/n.
    """
    values = np.asarray(values, dtype=np.float64)
    out = np.full(values.shape, np.nan)
    finite = np.isfinite(values)
    n = int(finite.sum())
    if n:
        out[finite] = (scipy.stats.rankdata(values[finite]) - 0.5) / n * 100.0
    return out


def within_group_zscore(values: np.ndarray, groups: np.ndarray, num_groups: int) -> np.ndarray:
    """z-score of each value within its group (population std) ``[N]``; groups ``0..num_groups-1``.

    NaN values are left out of their group's mean and std and stay NaN; a group with zero spread gives 0.
    """
    values = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(values)
    g = np.asarray(groups)[finite]
    v = values[finite]
    count = np.bincount(g, minlength=num_groups)
    mean = np.bincount(g, weights=v, minlength=num_groups) / np.maximum(count, 1)
    var = np.bincount(g, weights=(v - mean[g]) ** 2, minlength=num_groups) / np.maximum(count, 1)
    std = np.sqrt(var)
    out = np.full(values.shape, np.nan)
    out[finite] = np.divide(v - mean[g], std[g], out=np.zeros(len(v)), where=std[g] > 0)
    return out


def _per_count(sums: np.ndarray, counts: np.ndarray) -> np.ndarray:
    return np.asarray(sums, dtype=np.float64) / np.maximum(1, np.asarray(counts))


def image_scores(log: LossLog, *, mined_background: bool = False) -> pd.DataFrame:
    """Accumulated image streams (rows = image index): loc/pos/neg ``_score``, ``_pct``, ``_raw`` and
    ``epochs_covered``. ``mined_background``: the log's background sums cover mined anchors only
    (hard-negative mining), so they are divided by the positives (see module docstring)."""
    num_pos = log.image_field("num_pos")
    table = {}
    for stream, field, normalise in (("loc", "loc_sum", True), ("pos", "pos_sum", True),
                                     ("neg", "neg_sum", mined_background)):
        raw = log.image_field(field)
        per_epoch = _per_count(raw, num_pos) if normalise else raw
        table[f"{stream}_score"] = accumulate_over_epochs(per_epoch)
        table[f"{stream}_raw"] = np.nansum(raw, axis=0, dtype=np.float64)
    for stream in ("loc", "pos", "neg"):
        table[f"{stream}_pct"] = percentile_rank(table[f"{stream}_score"])
    table["epochs_covered"] = log.covered().sum(axis=0)
    return pd.DataFrame(table)


#: object stream -> the per-epoch log field its score accumulates (the kept anchor's loss)
OBJECT_STREAM_FIELDS = {"loc": "loc_kept", "pos": "cls_kept"}


def object_epoch_loss(log: LossLog, stream: str) -> np.ndarray:
    """Per-epoch loss ``[E, A]`` that an object stream (``"loc"`` or ``"pos"``) accumulates; NaN where an
    object was not trained in an epoch."""
    return log.object_field(OBJECT_STREAM_FIELDS[stream]).astype(np.float64)


def object_scores(log: LossLog, labels: np.ndarray, num_classes: int) -> pd.DataFrame:
    """Accumulated object streams (rows = annotation index): loc/pos ``_score``, ``_pct``, ``_z`` (within
    the class of ``labels [A]``), ``_raw`` and ``epochs_covered``."""
    num_anchors = log.object_field("num_anchors")
    table = {}
    for stream, field in (("loc", "loc_sum"), ("pos", "cls_sum")):
        score = accumulate_over_epochs(object_epoch_loss(log, stream))
        table[f"{stream}_score"] = score
        table[f"{stream}_pct"] = percentile_rank(score)
        table[f"{stream}_z"] = within_group_zscore(score, labels, num_classes)
        table[f"{stream}_raw"] = np.nansum(log.object_field(field), axis=0, dtype=np.float64)
    table["epochs_covered"] = (num_anchors >= 0).sum(axis=0)
    return pd.DataFrame(table)
