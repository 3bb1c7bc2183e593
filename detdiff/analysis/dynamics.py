"""Learning dynamics of each object over epochs: when it was learned, how often forgotten, data maps, AUM.

Pure, vectorised functions over ``[E, A]`` arrays (epochs x objects). ``valid [E, A]`` marks the epochs an
object was trained on (``object.num_anchors >= 0``); other epochs are skipped, never counted as wrong.

- Forgetting events (Toneva et al., "An Empirical Study of Example Forgetting during Deep Neural Network
  Learning", ICLR 2019): an event is an epoch t+1 at which the object is *not* detected although it was
  detected at the previous valid epoch t. "Never learned" = not detected at any valid epoch.
- Data maps (Swayamdipta et al., "Dataset Cartography", EMNLP 2020): confidence = mean over epochs of
  p(labelled class) = sigmoid(logit_label); variability = its *population* std; correctness = share of
  epochs detected.
- Area under the margin (Pleiss et al., "Identifying Mislabeled Data using the Area Under the Margin
  Ranking", NeurIPS 2020): mean over epochs of (labelled-class logit - largest other-class logit); low or
  negative AUM points at a wrong label.
- Other-class lead (ours, after the "normalized margin" ranking of confident learning, Northcutt et al.,
  JAIR 2021): mean over the late epochs of p(strongest other class) - p(labelled class), sigmoid
  probabilities in [-1, 1]; positive = the detector sees another class on the box. Unlike the logit margin
  it stays small where both probabilities are small: a box the detector cannot judge is not accused.
- Box disagreement (ours): 1 - mean over the late epochs of the IoU between the detector's best matched
  box and the annotation. A loose or shifted box keeps it high after the detector has learned where the
  object's edges are; on the demo it ranked planted loose boxes at AUROC 0.88 (300 images) and 0.91
  (1,000) where the accumulated box loss reached 0.82 and 0.86.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from detdiff.train.loss_log import LossLog

#: Data-map regions by terciles (common practice, after the 33% subsets selected in Swayamdipta et al.):
#: the third of objects with the highest variability is "ambiguous" (strictly above the 2/3 quantile, so
#: equal variabilities never make anyone ambiguous); the rest split at their median
#: confidence into "easy" (above) and "hard" (below). Relative to the dataset, so a detector's overall
#: calibration (focal loss keeps probabilities low) does not move the regions.
AMBIGUOUS_SHARE = 1.0 / 3.0
REGIONS: tuple[str, str, str] = ("easy", "ambiguous", "hard")


def _valid_or_all(correct: np.ndarray, valid: np.ndarray | None) -> np.ndarray:
    return np.ones(np.shape(correct), dtype=bool) if valid is None else np.asarray(valid, dtype=bool)


def first_learned(correct: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """Index of the first valid epoch at which each object is correct ``[A]`` int64; -1 if never."""
    hit = np.asarray(correct, dtype=bool) & _valid_or_all(correct, valid)
    return np.where(hit.any(axis=0), hit.argmax(axis=0), -1).astype(np.int64)


def forgetting_events(correct: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """Number of correct -> wrong transitions between consecutive valid epochs ``[A]`` int64."""
    correct = np.asarray(correct, dtype=bool)
    valid = _valid_or_all(correct, valid)
    epochs = np.arange(correct.shape[0])[:, None]
    last_valid = np.maximum.accumulate(np.where(valid, epochs, -1), axis=0)      # [E, A] latest valid <= t
    previous = np.vstack([np.full((1, correct.shape[1]), -1), last_valid[:-1]])   # latest valid < t
    cols = np.broadcast_to(np.arange(correct.shape[1]), correct.shape)
    was_correct = (previous >= 0) & correct[np.maximum(previous, 0), cols]
    return (valid & was_correct & ~correct).sum(axis=0).astype(np.int64)


def never_learned(correct: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """True where an object has valid epochs but is correct at none of them ``[A]``."""
    valid = _valid_or_all(correct, valid)
    return valid.any(axis=0) & ~(np.asarray(correct, dtype=bool) & valid).any(axis=0)


def data_map(prob_label: np.ndarray, correct: np.ndarray,
             valid: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Confidence, variability (population std, ddof 0) and correctness over valid epochs, each ``[A]``.

    ``prob_label [E, A]``: p(labelled class) per epoch. NaN where an object has no valid epoch.
    """
    valid = _valid_or_all(correct, valid) & np.isfinite(prob_label)
    n = valid.sum(axis=0)
    p = np.where(valid, prob_label, 0.0).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        confidence = np.where(n > 0, p.sum(axis=0) / n, np.nan)
        variability = np.sqrt(np.where(valid, (p - confidence) ** 2, 0.0).sum(axis=0) / n)
        correctness = np.where(n > 0, (np.asarray(correct, dtype=bool) & valid).sum(axis=0) / n, np.nan)
    return confidence, variability, correctness


def data_map_regions(confidence: np.ndarray, variability: np.ndarray) -> np.ndarray:
    """Region per object ``[A]`` (object dtype): "easy" | "ambiguous" | "hard", "" where NaN (terciles,
    see :data:`AMBIGUOUS_SHARE`)."""
    out = np.full(len(confidence), "", dtype=object)
    ok = np.isfinite(confidence) & np.isfinite(variability)
    if not ok.any():
        return out
    ambiguous = ok & (variability > np.quantile(variability[ok], 1.0 - AMBIGUOUS_SHARE))
    rest = ok & ~ambiguous
    cut = np.median(confidence[rest]) if rest.any() else np.inf
    out[rest & (confidence >= cut)] = "easy"
    out[rest & (confidence < cut)] = "hard"
    out[ambiguous] = "ambiguous"
    return out


def area_under_margin(logit_label: np.ndarray, logit_other: np.ndarray,
                      valid: np.ndarray | None = None) -> np.ndarray:
    """Mean over valid epochs of ``logit_label - logit_other`` ``[A]``; NaN without a valid epoch."""
    return mean_over_valid(np.asarray(logit_label, dtype=np.float64) - np.asarray(logit_other, dtype=np.float64),
                           valid)


def mean_over_valid(values: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """``[E, A] -> [A]``: mean over the epochs that are valid and finite; NaN where there is none."""
    values = np.asarray(values, dtype=np.float64)
    ok = _valid_or_all(values, valid) & np.isfinite(values)
    n = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, np.where(ok, values, 0.0).sum(axis=0) / n, np.nan)


def sigmoid(x: np.ndarray) -> np.ndarray:
    """Logistic function, overflow-safe (p(class) from a sigmoid classifier's logit)."""
    x = np.asarray(x, dtype=np.float64)
    with np.errstate(invalid="ignore"):                 # NaN logits (epochs not trained) stay NaN
        return np.exp(-np.logaddexp(0.0, -x))


def other_class_lead(logit_label: np.ndarray, logit_other: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """Mean over valid epochs of ``sigmoid(logit_other) - sigmoid(logit_label)`` ``[E, A] -> [A]``; NaN if none."""
    return mean_over_valid(sigmoid(logit_other) - sigmoid(logit_label), valid)


def box_disagreement(pred_iou: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
    """``1 - mean over valid epochs of pred_iou`` ``[E, A] -> [A]``; NaN where no valid epoch."""
    return 1.0 - mean_over_valid(pred_iou, valid)


def learning_dynamics(log: LossLog) -> pd.DataFrame:
    """Per object (rows = annotation index): first_learned (epoch number from the log, -1 never),
    forgetting_events, never_learned, confidence, variability, correctness, region, aum."""
    valid = log.object_field("num_anchors") >= 0
    correct = log.object_field("detected")
    logit_label = log.object_field("logit_label")
    first = first_learned(correct, valid)
    epochs = np.asarray(log.epochs, dtype=np.int64)
    confidence, variability, correctness = data_map(sigmoid(logit_label), correct, valid)
    return pd.DataFrame({
        "first_learned": np.where(first >= 0, epochs[np.maximum(first, 0)], -1),
        "forgetting_events": forgetting_events(correct, valid),
        "never_learned": never_learned(correct, valid),
        "confidence": confidence,
        "variability": variability,
        "correctness": correctness,
        "region": data_map_regions(confidence, variability),
        "aum": area_under_margin(logit_label, log.object_field("logit_other"), valid),
    })
