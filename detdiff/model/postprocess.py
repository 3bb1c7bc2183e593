"""Detections from the head outputs (decode + class-aware NMS) and pooled per-object features.

Both work on whole batches: one class-aware NMS over all images (groups = image x class, :func:`grouped_nms`),
one :func:`torchvision.ops.roi_align` per pyramid level.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import torch
from torchvision.ops import nms, roi_align

from detdiff.model.box_coder import BoxCoder

#: Highest-scoring (anchor, class) pairs per image decoded before NMS (keeps NMS cheap).
PRE_NMS_TOP = 1000


#: :func:`grouped_nms` suppresses within blocks of whole groups of about this many boxes: the NMS kernel compares each
#: kept box with every later box of its call, so one call over everything costs boxes x kept.
NMS_BLOCK = 2000


def grouped_nms(boxes: torch.Tensor, scores: torch.Tensor, groups: torch.Tensor, iou_threshold: float) -> torch.Tensor:
    """Indices kept by NMS within each group (boxes of different groups never suppress each other), by score
    descending: the kept set of :func:`torchvision.ops.batched_nms`.

    On CPU ``batched_nms`` falls back, above 4,000 boxes, to a loop over the groups that scans every box once per
    group: on the final pass of an 800-image aerial audit (up to 32,000 candidates and 480 groups a batch) it took
    9.6 of the pass's 94 s under cProfile. Here the boxes are sorted by group once and cut into blocks of whole groups of about
    :data:`NMS_BLOCK` boxes; within a block each group is moved by its own offset so that no two groups overlap
    (torchvision's "coordinate trick", in float64 so that the offsets keep the boxes' precision) and one
    :func:`torchvision.ops.nms` call suppresses the block.
    """
    if boxes.numel() == 0:
        return torch.zeros(0, dtype=torch.int64, device=boxes.device)
    order = torch.argsort(groups, stable=True)
    dense = torch.unique_consecutive(groups[order], return_inverse=True)[1]
    sizes = torch.bincount(dense)
    block_of_group = (torch.cumsum(sizes, 0) - sizes) // NMS_BLOCK
    ends = torch.cumsum(torch.bincount(block_of_group[dense]), 0).tolist()
    wide = boxes.to(torch.float64)[order]
    span = float(wide.max() - wide.min()) + 1.0
    shifted = wide + (dense.to(torch.float64) * span)[:, None]
    ranked = scores.to(torch.float64)[order]
    kept, start = [], 0
    for end in ends:
        if end > start:
            kept.append(order[start + nms(shifted[start:end], ranked[start:end], iou_threshold)])
        start = end
    keep = torch.cat(kept)
    return keep[torch.argsort(scores[keep], descending=True, stable=True)]


def postprocess_detections(outputs: dict[str, Any], anchors: torch.Tensor, *, score_threshold: float,
                           max_detections: int, nms_iou: float = 0.5,
                           box_variances: Sequence[float] = (0.1, 0.1, 0.2, 0.2),
                           image_size: int | None = None) -> list[dict[str, torch.Tensor]]:
    """Per image ``{"boxes": [k, 4] xyxy view px, "scores": [k], "labels": int64 [k]}``, scores descending.

    Scores are sigmoid class probabilities; each (anchor, class) pair above ``score_threshold`` is a candidate.
    Boxes are clipped to ``[0, image_size]`` when ``image_size`` is given.
    """
    logits, deltas = outputs["cls_logits"].detach(), outputs["box_deltas"].detach()
    batch, _, num_classes = logits.shape
    coder = BoxCoder(box_variances)
    flat = logits.reshape(batch, -1)
    top_logit, top_index = flat.topk(min(PRE_NMS_TOP, flat.shape[1]), dim=1)          # [B, K]
    top_score = top_logit.sigmoid()
    cand_b, cand_k = (top_score >= score_threshold).nonzero(as_tuple=True)
    flat_index = top_index[cand_b, cand_k]
    cand_n, labels = flat_index // num_classes, flat_index % num_classes
    scores = top_score[cand_b, cand_k]
    boxes = coder.decode(deltas[cand_b, cand_n], anchors[cand_n])
    if image_size is not None:
        boxes = boxes.clamp(min=0, max=float(image_size))
    keep = grouped_nms(boxes, scores, cand_b * num_classes + labels, nms_iou)         # scores descending
    cand_b, boxes, scores, labels = cand_b[keep], boxes[keep], scores[keep], labels[keep]
    order = torch.argsort(cand_b, stable=True)
    cand_b, boxes, scores, labels = cand_b[order], boxes[order], scores[order], labels[order]
    per_image = torch.bincount(cand_b, minlength=batch).tolist()
    results = []
    for b_boxes, b_scores, b_labels in zip(boxes.split(per_image), scores.split(per_image), labels.split(per_image)):
        results.append({"boxes": b_boxes[:max_detections], "scores": b_scores[:max_detections],
                        "labels": b_labels[:max_detections]})
    return results


def feature_level(boxes_xyxy: torch.Tensor, strides: Sequence[int]) -> torch.Tensor:
    """Pyramid level ``[n]`` for each box: boxes of side < 8 cells of level 1 go to level 0, and so on.

    Level ``k`` takes boxes whose side ``sqrt(w*h)`` is in ``[8 * s_k / 2, 8 * s_k)`` (clamped at both ends),
    i.e. a box spans roughly 4 to 8 cells of its level (in the spirit of FPN's scale-to-level rule, Lin et al. 2017).
    """
    side = ((boxes_xyxy[:, 2] - boxes_xyxy[:, 0]).clamp(min=1e-3)
            * (boxes_xyxy[:, 3] - boxes_xyxy[:, 1]).clamp(min=1e-3)).sqrt()
    level = torch.floor(torch.log2(side / (8.0 * strides[0])) + 1)
    return level.clamp(0, len(strides) - 1).to(torch.int64)


def pooled_object_features(features: Sequence[torch.Tensor], boxes_xyxy_view: torch.Tensor,
                           batch_index: torch.Tensor, *, strides: Sequence[int] = (8, 16, 32),
                           output_size: int = 2) -> torch.Tensor:
    """One feature vector ``[n, D]`` per box (``D`` = pyramid channels) for the 2-D object map.

    Each box is pooled with :func:`torchvision.ops.roi_align` (``output_size x output_size`` bins, averaged)
    from the level chosen by :func:`feature_level`. ``features`` is ``[P3, P4, P5]``, each ``[B, D, H, W]``;
    ``batch_index [n]`` names each box's image in the batch.
    """
    if len(features) != len(strides):
        raise ValueError(f"pooled_object_features: {len(features)} feature maps but {len(strides)} strides")
    n = boxes_xyxy_view.shape[0]
    channels = features[0].shape[1]
    out = features[0].new_zeros((n, channels))
    if n == 0:
        return out
    boxes = boxes_xyxy_view.to(features[0].dtype)
    rois = torch.cat((batch_index.to(boxes.dtype)[:, None], boxes), dim=1)        # [n, 5]
    level = feature_level(boxes, strides)
    for k, (feat, stride) in enumerate(zip(features, strides)):
        rows = (level == k).nonzero(as_tuple=True)[0]
        if len(rows):
            pooled = roi_align(feat, rois[rows], output_size, spatial_scale=1.0 / stride, sampling_ratio=2,
                               aligned=True)                                      # [r, D, o, o]
            out[rows] = pooled.mean((2, 3))
    return out
