"""The crop model: a small CNN that reads one annotated object from a crop and predicts its class and its box.

It is the second instrument of the audit. The detector's losses measure how hard each item is; this model,
trained on other images than the one it judges (:mod:`detdiff.crossfit.folds`), says what the object
looks like to a model that never saw its label: the class it would give (evidence for a wrong class) and
the box it would draw around it (evidence for a loose box).

Input: a window of twice the annotated box around its centre, resampled to ``input_size`` px from the
stored crop (:mod:`detdiff.crossfit.crops`), plus four numbers on the box's geometry (log width and height
relative to the image, log aspect, log side), standardised. In training the window is shifted and scaled at
random (:func:`sample_windows`), so the model learns to find the object's true extent inside any window
near it; at prediction time the window is centred on the annotated box (three window sizes and their mirrors
averaged: :data:`detdiff.crossfit.folds.TEST_SCALES`).

Precision: ``crossfit.precision`` (resolved by the recipe, :func:`detdiff.recipe.choose_crop_precision`) runs
the training forward pass in bfloat16 (convolutions and linear layers; batch norm, the loss and the weights stay
float32: ``torch.autocast``) where a timed step is clearly faster than in float32, as on CPUs with AVX512-BF16.
Predictions are always float32.

Outputs: ``C`` class logits, the box as ``(x1, y1, x2, y2)`` in window units (0..1) and an objectness logit
(is an object centred in the window at all). Losses: cross-entropy with label smoothing 0.05 (common practice
against noisy labels) and smooth L1 on the box (Girshick, Fast R-CNN, eq. 3) on the annotated windows; binary
cross-entropy of the objectness on those (1) and on background windows beside them (0,
:func:`background_windows`). The objectness judges the detector's unannotated detections out of sample (a
missing box is an object the fold model never saw labelled as background).

Tried and not kept: the small-loss trick against noisy labels (Han et al., Co-teaching, NeurIPS 2018): each
batch's 10% largest class losses and 10% largest box losses left out of the gradient, ramped in over the
first third of the steps. Cross-fitted again on the same crops, wrong-class AUROC / top-k precision
(k = planted) and loose-box AUROC, before -> after: warehouse 1 0.995 / 0.830, 0.941 -> 0.994 / 0.837, 0.935;
streetcam 1 0.989 / 0.839, 0.903 -> 0.983 / 0.774, 0.903; aerial 1 0.973 / 0.730, 0.816 -> 0.967 / 0.699,
0.811; digits 1 0.973 / 0.713, 0.879 -> 0.968 / 0.679, 0.863; digits 2 0.975 / 0.695, 0.876 -> 0.970 / 0.642,
0.893. At about 5% wrong labels the boxes it leaves out are mostly hard clean ones (small, hidden, cut),
which are then judged worse.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torchvision.ops import roi_align

from detdiff.model.precision import training_autocast as precision_autocast

#: Window side in units of the annotated box (the box fills the middle half).
WINDOW = 2.0
#: Training jitter of the window: centre shift up to this share of the box side, per axis...
SHIFT = 0.2
#: ...and its side scaled by exp(U(-SCALE, SCALE)) per axis (covers boxes off by IoU 0.45 and more).
SCALE = 0.25
#: Geometry features fed beside the pixels.
GEOMETRY_FEATURES = 4
LABEL_SMOOTHING = 0.05
BOX_LOSS_WEIGHT = 4.0
BOX_BETA = 0.05
#: Background windows drawn per annotated window in a training batch.
BACKGROUND_SHARE = 0.25
#: A background window's box has IoU below this with its own annotated box.
BACKGROUND_MAX_IOU = 0.2
#: Candidate background boxes drawn per window (the first that fits is kept).
BACKGROUND_TRIES = 8


def conv_bn_relu(cin: int, cout: int, stride: int) -> nn.Sequential:
    """3x3 conv (no bias) + BatchNorm + ReLU."""
    return nn.Sequential(nn.Conv2d(cin, cout, 3, stride, 1, bias=False), nn.BatchNorm2d(cout), nn.ReLU(inplace=True))


class CropModel(nn.Module):
    """``forward(pixels [B,3,S,S] in 0..1, geometry [B,4]) -> (logits [B,C], box [B,4], objectness [B])`` (see
    module docstring)."""

    def __init__(self, num_classes: int, *, width: int = 24, input_size: int = 32) -> None:
        super().__init__()
        if input_size % 8:
            raise ValueError(f"crossfit.input_size must be a multiple of 8, got {input_size}")
        w = int(width)
        self.num_classes, self.input_size = int(num_classes), int(input_size)
        self.body = nn.Sequential(conv_bn_relu(3, w, 2), conv_bn_relu(w, 2 * w, 1), conv_bn_relu(2 * w, 3 * w, 2),
                                  conv_bn_relu(3 * w, 4 * w, 1), conv_bn_relu(4 * w, 6 * w, 2))
        cells = (input_size // 8) ** 2
        self.neck = nn.Sequential(nn.Linear(6 * w * cells + GEOMETRY_FEATURES, 192), nn.ReLU(inplace=True))
        self.classify = nn.Linear(192, num_classes)
        self.locate = nn.Linear(192, 4)
        self.objectness = nn.Linear(192, 1)
        self.to(memory_format=torch.channels_last)

    def forward(self, pixels: torch.Tensor, geometry: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        features = self.body((pixels - 0.5) * 4.0).flatten(1)
        features = self.neck(torch.cat([features, geometry], dim=1))
        return self.classify(features), self.locate(features), self.objectness(features)[:, 0]


def training_autocast(precision: str) -> torch.autocast:
    """The autocast context of a crop-model training forward pass at ``crossfit.precision`` (module docstring)."""
    return precision_autocast(precision, "crossfit.precision")


def centred_windows(n: int) -> np.ndarray:
    """``[n, 4]`` windows in box units (the box is ``[0, 0, 1, 1]``): :data:`WINDOW` times the box, centred."""
    half = WINDOW / 2
    return np.tile([0.5 - half, 0.5 - half, 0.5 + half, 0.5 + half], (n, 1)).astype(np.float32)


def sample_windows(rng: np.random.Generator, n: int) -> np.ndarray:
    """``[n, 4]`` training windows in box units: centred windows shifted and scaled at random."""
    centre = 0.5 + rng.uniform(-SHIFT, SHIFT, (n, 2))
    side = WINDOW * np.exp(rng.uniform(-SCALE, SCALE, (n, 2)))
    return np.concatenate([centre - side / 2, centre + side / 2], axis=1).astype(np.float32)


def background_boxes(rng: np.random.Generator, n: int, extent: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """``[n, 4]`` xyxy boxes in box units beside the annotated box ``[0, 0, 1, 1]`` (IoU below
    :data:`BACKGROUND_MAX_IOU`), of the object's own size (each side scaled by ``exp(U(-SCALE, 0))``), whose
    training-size windows (:data:`WINDOW` times the box) lie inside the stored crop's ``extent``: so a background
    window has the resolution and the grey padding of an annotated one, and no edge of the crop tells them apart.
    Returns the boxes and ``ok bool [n]`` (False where no candidate fitted)."""
    low, high = extent
    side = np.exp(rng.uniform(-SCALE, 0.0, (n, BACKGROUND_TRIES, 2)))
    half = side * WINDOW / 2
    centre = low + half + rng.random((n, BACKGROUND_TRIES, 2)) * np.maximum(high - low - 2 * half, 0.0)
    x1y1, x2y2 = centre - side / 2, centre + side / 2
    inter = np.prod(np.clip(np.minimum(x2y2, 1.0) - np.maximum(x1y1, 0.0), 0.0, None), axis=-1)
    iou = inter / (np.prod(side, axis=-1) + 1.0 - inter)
    fits = iou < BACKGROUND_MAX_IOU
    first = fits.argmax(axis=1)
    pick = np.arange(n)
    return np.concatenate([x1y1[pick, first], x2y2[pick, first]], axis=1).astype(np.float32), fits.any(axis=1)


def box_in_window(windows: np.ndarray) -> np.ndarray:
    """Where the box ``[0, 0, 1, 1]`` lies inside each window ``[n, 4]``, in window units (0..1 inside)."""
    side = windows[:, 2:] - windows[:, :2]
    return np.concatenate([-windows[:, :2] / side, (1.0 - windows[:, :2]) / side], axis=1).astype(np.float32)


def window_to_box_units(boxes: np.ndarray, windows: np.ndarray) -> np.ndarray:
    """Inverse of :func:`box_in_window` for predicted boxes ``[n, 4]`` in window units -> box units."""
    side = np.concatenate([windows[:, 2:] - windows[:, :2]] * 2, axis=1)
    return boxes * side + np.concatenate([windows[:, :2]] * 2, axis=1)


def resample(crops: np.ndarray, windows: np.ndarray, input_size: int, *, extent: tuple[float, float]) -> torch.Tensor:
    """Pixels ``float [n, 3, S, S]`` in 0..1 of ``windows [n, 4]`` (box units) cut from stored ``crops
    uint8 [n, H, H, 3]`` that cover ``extent = (low, high)`` box units on both axes (torchvision roi_align)."""
    stored = torch.from_numpy(np.ascontiguousarray(crops)).permute(0, 3, 1, 2).float().div_(255.0)
    low, high = extent
    px = (torch.from_numpy(windows).float() - low) / (high - low) * crops.shape[1]
    rois = torch.cat([torch.arange(len(windows), dtype=torch.float32)[:, None], px], dim=1)
    out = roi_align(stored, rois, (input_size, input_size), spatial_scale=1.0, sampling_ratio=2, aligned=True)
    return out.contiguous(memory_format=torch.channels_last)


def flip_batch(pixels: torch.Tensor, boxes: torch.Tensor, flips: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    """Apply per-item ``flips bool [n, 3]`` (horizontal, vertical, transpose) to pixels and window-unit boxes;
    the transpose first, then the mirrors (the order of :mod:`detdiff.train.batches`)."""
    f = torch.from_numpy(flips)
    t, h, v = f[:, 2], f[:, 0], f[:, 1]
    pixels = torch.where(t[:, None, None, None], pixels.transpose(-1, -2), pixels)
    boxes = torch.where(t[:, None], boxes[:, [1, 0, 3, 2]], boxes)
    pixels = torch.where(h[:, None, None, None], pixels.flip(-1), pixels)
    boxes = torch.where(h[:, None], torch.stack([1 - boxes[:, 2], boxes[:, 1], 1 - boxes[:, 0], boxes[:, 3]], 1), boxes)
    pixels = torch.where(v[:, None, None, None], pixels.flip(-2), pixels)
    boxes = torch.where(v[:, None], torch.stack([boxes[:, 0], 1 - boxes[:, 3], boxes[:, 2], 1 - boxes[:, 1]], 1), boxes)
    return pixels.contiguous(memory_format=torch.channels_last), boxes


def crop_loss(logits: torch.Tensor, boxes: torch.Tensor, labels: torch.Tensor, target_boxes: torch.Tensor,
              objectness: torch.Tensor | None = None, is_object: torch.Tensor | None = None) -> torch.Tensor:
    """Mean cross-entropy (label smoothing) + weighted smooth L1 of the box over the annotated windows (the first
    ``len(labels)`` rows), + the objectness's binary cross-entropy against ``is_object`` over every row."""
    n = len(labels)
    cls = F.cross_entropy(logits[:n], labels, label_smoothing=LABEL_SMOOTHING)
    box = F.smooth_l1_loss(boxes[:n], target_boxes, beta=BOX_BETA)
    obj = F.binary_cross_entropy_with_logits(objectness, is_object) if objectness is not None else 0.0
    return cls + BOX_LOSS_WEIGHT * box + obj


def geometry_raw(boxes_xywh: np.ndarray, widths: np.ndarray, heights: np.ndarray) -> np.ndarray:
    """``float64 [n, 4]``: log(w / W), log(h / H), log(w / h), log(sqrt(w h)) of boxes in images of ``W x H``."""
    w = np.maximum(boxes_xywh[:, 2], 1.0)
    h = np.maximum(boxes_xywh[:, 3], 1.0)
    return np.stack([np.log(w / np.maximum(widths, 1)), np.log(h / np.maximum(heights, 1)), np.log(w / h),
                     0.5 * np.log(w * h)], axis=1)


def geometry_stats(raw: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation (plus 1e-6) of raw geometry features, for :func:`standardise`."""
    if not len(raw):
        return np.zeros(GEOMETRY_FEATURES), np.ones(GEOMETRY_FEATURES)
    return raw.mean(0), raw.std(0) + 1e-6


def standardise(raw: np.ndarray, mean: np.ndarray, std: np.ndarray) -> np.ndarray:
    """``float32`` standardised features."""
    return ((raw - mean) / std).astype(np.float32)
