"""Three loss streams per image and per object, computed inside the training forward.

One pass gives both the scalar to back-propagate and the per-item records the training log keeps, so
per-image losses cost no second forward (torchvision's detection losses sum over the batch first).

Streams (all computed per anchor with ``reduction='none'`` and then summed):

* **box regression** (``loc``): smooth L1 (Girshick, Fast R-CNN, eq. 3; ``beta = loss.box_beta``) between the
  predicted offsets of each positive anchor and its matched box encoded by :class:`BoxCoder`, summed over
  the 4 coordinates.
* **positive-class** (``pos``): classification loss of each positive anchor, summed over all C sigmoid outputs
  (labelled class -> 1, the others -> 0).
* **background-class** (``neg``): classification loss of background anchors (all C outputs -> 0).
  ``loss.classification: focal`` uses every background anchor with :func:`torchvision.ops.sigmoid_focal_loss`
  (Lin et al., ICCV 2017); ``hard_negative`` uses binary cross-entropy and keeps per image only the
  ``neg_pos_ratio * max(1, num_pos)`` background anchors of highest loss (Liu et al., SSD, ECCV 2016). The
  ``max(1, .)`` is ours: SSD mines nothing in an image without positives, which would hide an image whose
  objects are all unannotated (missing boxes) from the background stream.

Ignored anchors (IoU between ``neg_iou`` and ``pos_iou``) contribute nothing.

Normalisation: every logged ``*_sum`` is a raw sum over anchors of one image (or of the anchors matched to
one object), with the counts ``num_pos`` / ``num_anchors`` beside it, so any later normaliser is possible.
The back-propagated objective normalises each image by its own count, never by batch history::

    total = mean over images b of (loc_sum[b] + pos_sum[b] + neg_sum[b]) / max(1, num_pos[b])

Per-object sums are ``index_add`` s of the same per-anchor values, so an image's object ``loc_sum`` add up to
its ``loc_sum`` and object ``cls_sum`` to its ``pos_sum``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import torch
import torch.nn.functional as F
from torchvision.ops import batched_nms, box_iou, sigmoid_focal_loss

from detdiff.model.anchors import BACKGROUND, AnchorGrid, match_batched, match_near
from detdiff.model.box_coder import BoxCoder, paired_box_iou

#: Candidates per image (highest class scores) considered for unmatched detections, before NMS.
UNMATCHED_PRE_NMS = 200
UNMATCHED_NMS_IOU = 0.5


@dataclass
class LossStreams:
    """Result of :func:`compute_loss_streams`.

    ``total``: scalar with grad. ``image``: ``[B]`` tensors keyed by ``loss_log.IMAGE_FIELDS``.
    ``objects``: ``[T]`` tensors (targets concatenated in batch order) keyed by ``loss_log.OBJECT_FIELDS``
    (``pred_box`` ``[T, 4]`` xyxy view px). ``unmatched``: ``batch_index [U]``, ``box [U, 4]`` xyxy view px,
    ``score [U]``, ``label [U]``. Per-item tensors are detached; ``objects`` / ``unmatched`` are ``None`` when
    computed with ``per_item=False``.
    """

    total: torch.Tensor
    image: dict[str, torch.Tensor]
    objects: dict[str, torch.Tensor] | None = None
    unmatched: dict[str, torch.Tensor] | None = None


def _check_targets(targets: list[dict[str, torch.Tensor]], batch: int, num_classes: int) -> None:
    if len(targets) != batch:
        raise ValueError(f"compute_loss_streams: {len(targets)} targets for a batch of {batch} images")
    for b, t in enumerate(targets):
        boxes, labels = t["boxes"], t["labels"]
        if boxes.dim() != 2 or boxes.shape[-1] != 4 or labels.shape != boxes.shape[:1]:
            raise ValueError(f"targets[{b}]: 'boxes' must be [n, 4] and 'labels' [n], got "
                             f"{list(boxes.shape)} and {list(labels.shape)}")
        if len(labels) and (int(labels.min()) < 0 or int(labels.max()) >= num_classes):
            raise ValueError(f"targets[{b}]['labels']: category indices must lie in 0..{num_classes - 1}, "
                             f"got {labels.tolist()}")


def box_regression_loss(pred_deltas: torch.Tensor, target_deltas: torch.Tensor,
                        loss_cfg: dict[str, Any]) -> torch.Tensor:
    """Smooth L1 of encoded offsets summed over the 4 coordinates: ``[..., 4], [..., 4] -> [...]``."""
    return F.smooth_l1_loss(pred_deltas, target_deltas, beta=loss_cfg["box_beta"], reduction="none").sum(-1)


def classification_loss(logits: torch.Tensor, target: torch.Tensor, loss_cfg: dict[str, Any]) -> torch.Tensor:
    """Per-anchor classification loss summed over the C sigmoid outputs: ``[..., C], [..., C] -> [...]``.

    ``loss.classification``: ``focal`` (torchvision's sigmoid focal loss) or ``hard_negative`` (plain binary
    cross-entropy here; the mining happens in :func:`compute_loss_streams`).
    """
    kind = loss_cfg["classification"]
    if kind == "focal":
        return sigmoid_focal_loss(logits, target, alpha=loss_cfg["focal_alpha"], gamma=loss_cfg["focal_gamma"],
                                  reduction="none").sum(-1)
    if kind == "hard_negative":
        return F.binary_cross_entropy_with_logits(logits, target, reduction="none").sum(-1)
    raise ValueError(f"loss.classification: expected 'focal' or 'hard_negative', got {kind!r}")


def _mined_negatives(logits: torch.Tensor, background: torch.Tensor, num_mined: torch.Tensor) -> torch.Tensor:
    """Flat ``image * N + anchor`` indices of each image's ``num_mined [B]`` background anchors of highest loss
    (SSD's hard negative mining).

    Only the ranking looks at every anchor, without gradient, with the cross-entropy against "no class" written as
    ``relu(x) + log(1 + exp(-|x|))``: the same function as :func:`torch.nn.functional.binary_cross_entropy_with_logits`
    at target 0 (relative difference under 1e-5: tests/test_losses.py), at a fifth of its time on CPU, where
    ``log1p`` is not vectorised (measured over 16 x 16,128 anchors x 24 classes: 35 ms -> 8 ms). The loss is then
    taken with torch's function and with gradient on the mined anchors only."""
    with torch.no_grad():
        magnitude = logits.abs()                                      # one B x N x C buffer, then in place
        relu_sum = (logits.sum(-1) + magnitude.sum(-1)) / 2           # sum of relu(x) = (x + |x|) / 2
        ranked = magnitude.neg_().exp_().add_(1.0).log_().sum(-1) + relu_sum
        ranked = ranked.masked_fill_(~background, -1.0)
        top = min(ranked.shape[1], int(num_mined.max()))
        order = ranked.topk(top, dim=1).indices                                                   # [B, top]
        keep = (torch.arange(top, device=logits.device)[None, :] < num_mined[:, None]) & background.gather(1, order)
        neg_b, neg_k = keep.nonzero(as_tuple=True)
    return neg_b * logits.shape[1] + order[neg_b, neg_k]


def compute_loss_streams(outputs: dict[str, Any], anchors: torch.Tensor, targets: list[dict[str, torch.Tensor]],
                         loss_cfg: dict[str, Any], log_cfg: dict[str, Any], *, per_item: bool = True,
                         grid: AnchorGrid | None = None) -> LossStreams:
    """Match anchors, compute the three streams per anchor and reduce them per image and per object.

    Parameters
    ----------
    outputs : ``Detector.forward`` result (``cls_logits [B, N, C]``, ``box_deltas [B, N, 4]``).
    anchors : ``[N, 4]`` xyxy view px.
    targets : per image ``{"boxes": [n_b, 4] xyxy view px, "labels": int64 [n_b]}`` (``n_b`` may be 0).
    loss_cfg, log_cfg : ``config['loss']`` and ``config['log']``.
    per_item : also compute the detached per-object records and unmatched detections.
    grid : the layout of ``anchors`` (``Detector.anchor_grid``). With it each box is compared with the anchors near
        it only (:func:`detdiff.model.anchors.match_near`, the same matching); without it, with every anchor.
    """
    logits, deltas = outputs["cls_logits"], outputs["box_deltas"]
    batch, num_anchors, num_classes = logits.shape
    device = logits.device
    _check_targets(targets, batch, num_classes)
    coder = BoxCoder(loss_cfg["box_variances"])

    counts = torch.tensor([t["boxes"].shape[0] for t in targets], dtype=torch.int64, device=device)   # [B]
    max_gt = int(counts.max()) if batch else 0
    gt_boxes = torch.cat([t["boxes"] for t in targets]).to(device=device, dtype=torch.float32)   # [T, 4]
    gt_labels = torch.cat([t["labels"] for t in targets]).to(device=device, dtype=torch.int64)   # [T]
    num_obj = gt_boxes.shape[0]
    obj_image = torch.repeat_interleave(torch.arange(batch, device=device), counts)             # [T]
    offsets = torch.cumsum(counts, 0) - counts                                                   # [B]
    obj_slot = torch.arange(num_obj, device=device) - offsets[obj_image]                         # [T]

    # Boxes padded to the batch maximum [B, G] (the unmatched detections are compared with them).
    gt_pad = torch.zeros((batch, max_gt, 4), device=device)
    gt_pad[obj_image, obj_slot] = gt_boxes
    gt_valid = torch.zeros((batch, max_gt), dtype=torch.bool, device=device)
    gt_valid[obj_image, obj_slot] = True
    match = dict(min_anchors=int(loss_cfg["min_anchors"]), min_anchor_iou=float(loss_cfg["min_anchor_iou"]))
    if grid is not None and match["min_anchor_iou"] > 0 and loss_cfg["neg_iou"] > 0:
        matched, best_anchor = match_near(anchors, grid, gt_boxes, obj_image, obj_slot, batch, loss_cfg["pos_iou"],
                                          loss_cfg["neg_iou"], **match)
    else:                               # every image with one IoU call: [B, N, G]
        iou = box_iou(anchors, gt_pad.reshape(-1, 4)).reshape(num_anchors, batch, max_gt).permute(1, 0, 2)
        matched, gt_best_anchor = match_batched(iou, gt_valid, loss_cfg["pos_iou"], loss_cfg["neg_iou"], **match)
        best_anchor = gt_best_anchor[obj_image, obj_slot]

    positive = matched >= 0                                                                       # [B, N]
    background = matched == BACKGROUND
    pos_b, pos_n = positive.nonzero(as_tuple=True)                                                # [P]
    pos_obj = offsets[pos_b] + matched[pos_b, pos_n]                                              # [P] object index
    num_pos = positive.sum(1)                                                                     # [B]

    # Box regression stream, per positive anchor.
    loc_anchor = box_regression_loss(deltas[pos_b, pos_n], coder.encode(gt_boxes[pos_obj], anchors[pos_n]),
                                     loss_cfg)                                                    # [P]

    # Classification, per anchor and class, then summed over classes.
    zeros = torch.zeros(batch, device=device, dtype=logits.dtype)
    if loss_cfg["classification"] == "focal":
        cls_target = torch.zeros_like(logits)
        cls_target[pos_b, pos_n, gt_labels[pos_obj]] = 1.0
        cls_anchor = classification_loss(logits, cls_target, loss_cfg)                            # [B, N]
        pos_anchor = cls_anchor[pos_b, pos_n]                                                     # [P]
        neg_sum = (cls_anchor * background).sum(1)
    else:
        pos_target = F.one_hot(gt_labels[pos_obj], num_classes).to(logits.dtype)
        pos_anchor = classification_loss(logits[pos_b, pos_n], pos_target, loss_cfg)            # [P]
        mined = _mined_negatives(logits, background, loss_cfg["neg_pos_ratio"] * num_pos.clamp(min=1))
        mined_logits = logits.reshape(-1, num_classes).index_select(0, mined)                   # [M, C]
        neg_anchor = classification_loss(mined_logits, torch.zeros_like(mined_logits), loss_cfg)
        neg_sum = zeros.index_add(0, mined // num_anchors, neg_anchor)

    loc_sum = zeros.index_add(0, pos_b, loc_anchor)
    pos_sum = zeros.index_add(0, pos_b, pos_anchor)
    total = ((loc_sum + pos_sum + neg_sum) / num_pos.clamp(min=1)).mean()
    image = {"loc_sum": loc_sum.detach(), "pos_sum": pos_sum.detach(), "neg_sum": neg_sum.detach(),
             "num_pos": num_pos}
    if not per_item:
        return LossStreams(total=total, image=image)

    with torch.no_grad():
        objects = _object_records(logits.detach(), deltas.detach(), anchors, coder, gt_boxes, gt_labels,
                                  obj_image, best_anchor, pos_b, pos_n, pos_obj,
                                  loc_anchor.detach(), pos_anchor.detach(), loss_cfg, log_cfg)
        unmatched = _unmatched_detections(logits.detach(), deltas.detach(), anchors, coder, gt_pad, gt_valid,
                                          log_cfg)
    return LossStreams(total=total, image=image, objects=objects, unmatched=unmatched)


def _object_records(logits: torch.Tensor, deltas: torch.Tensor, anchors: torch.Tensor, coder: BoxCoder,
                    gt_boxes: torch.Tensor, gt_labels: torch.Tensor, obj_image: torch.Tensor,
                    best_anchor: torch.Tensor, pos_b: torch.Tensor, pos_n: torch.Tensor, pos_obj: torch.Tensor,
                    loc_anchor: torch.Tensor, pos_anchor: torch.Tensor, loss_cfg: dict[str, Any],
                    log_cfg: dict[str, Any]) -> dict[str, torch.Tensor]:
    """Per-object fields (see ``loss_log.OBJECT_FIELDS``) from the per-anchor values, all ``[T]`` or ``[T, 4]``.

    Logits and the predicted box come from the object's matched anchors; an object that lost all its anchors
    to another box (``num_anchors == 0``) takes them from its highest-IoU anchor instead, so no field is empty.
    The "kept" anchor is the matched anchor with the highest top-class score, the one a detector would keep:
    ``pred_box`` is its decoded box, and ``loc_kept`` / ``cls_kept`` are the box and class losses there.
    (A mean over all matched anchors also weighs the low-IoU anchors that ``loss.min_anchors`` adds, whose
    loss says more about the anchor grid than about the label: on the demo, planted loose boxes ranked at
    AUROC 0.82 by that mean and 0.87 by the kept anchor's loss.)
    """
    num_obj, num_classes = gt_boxes.shape[0], logits.shape[-1]
    device = logits.device
    loc_sum = torch.zeros(num_obj, device=device).index_add_(0, pos_obj, loc_anchor)
    cls_sum = torch.zeros(num_obj, device=device).index_add_(0, pos_obj, pos_anchor)
    num_anchors = torch.bincount(pos_obj, minlength=num_obj)

    orphan = (num_anchors == 0).nonzero(as_tuple=True)[0]
    orphan_b = obj_image[orphan]
    att_b = torch.cat((pos_b, orphan_b))                                       # [Q] attributed anchors
    att_n = torch.cat((pos_n, best_anchor[orphan]))
    att_obj = torch.cat((pos_obj, orphan))
    att_logits = logits[att_b, att_n]                                          # [Q, C]
    att_count = torch.bincount(att_obj, minlength=num_obj).clamp(min=1)
    mean_logits = torch.zeros((num_obj, num_classes), device=device).index_add_(0, att_obj, att_logits)
    mean_logits /= att_count[:, None]
    logit_label = mean_logits.gather(1, gt_labels[:, None])[:, 0]
    if num_classes > 1:
        logit_other, other_label = mean_logits.scatter(1, gt_labels[:, None], float("-inf")).max(1)
    else:
        logit_other = torch.full((num_obj,), float("nan"), device=device)
        other_label = torch.full((num_obj,), -1, dtype=torch.int64, device=device)

    att_score, att_label = att_logits.sigmoid().max(1)                         # [Q]
    best_score = torch.zeros(num_obj, device=device).scatter_reduce_(0, att_obj, att_score, "amax",
                                                                      include_self=False)
    q_index = torch.arange(att_obj.shape[0], device=device)
    candidate = torch.where(att_score == best_score[att_obj], q_index, att_obj.shape[0])
    kept_q = torch.full((num_obj,), att_obj.shape[0], dtype=torch.int64, device=device)
    kept_q = kept_q.scatter_reduce_(0, att_obj, candidate, "amin").clamp(max=max(att_obj.shape[0] - 1, 0))
    kept_b, kept_n = att_b[kept_q], att_n[kept_q]
    pred_box = coder.decode(deltas[kept_b, kept_n], anchors[kept_n])
    loc_kept = box_regression_loss(deltas[kept_b, kept_n], coder.encode(gt_boxes, anchors[kept_n]), loss_cfg)
    cls_kept = classification_loss(logits[kept_b, kept_n], F.one_hot(gt_labels, num_classes).to(logits.dtype),
                                   loss_cfg)
    pred_iou = paired_box_iou(pred_box, gt_boxes)
    pred_label = att_label[kept_q]
    pred_score = att_score[kept_q]
    detected = (pred_label == gt_labels) & (pred_iou >= log_cfg["detect_iou"]) & (pred_score >= log_cfg["detect_score"])
    return {"loc_sum": loc_sum, "cls_sum": cls_sum, "num_anchors": num_anchors, "loc_kept": loc_kept,
            "cls_kept": cls_kept, "logit_label": logit_label,
            "logit_other": logit_other, "other_label": other_label, "pred_box": pred_box, "pred_iou": pred_iou,
            "pred_label": pred_label, "pred_score": pred_score, "detected": detected}


def _unmatched_detections(logits: torch.Tensor, deltas: torch.Tensor, anchors: torch.Tensor, coder: BoxCoder,
                          gt_pad: torch.Tensor, gt_valid: torch.Tensor,
                          log_cfg: dict[str, Any]) -> dict[str, torch.Tensor]:
    """Confident detections that overlap no box of their image, up to ``unmatched_per_image`` per image.

    Only (anchor, class) pairs scoring at least ``unmatched_min_score`` are looked at (one comparison over the
    logits), at most the ``UNMATCHED_PRE_NMS`` highest per image are decoded, then one class-aware
    :func:`torchvision.ops.batched_nms` runs over the whole batch (groups = image x class).
    """
    batch, num_anchors, num_classes = logits.shape
    flat = logits.reshape(batch, -1)
    min_score = min(max(float(log_cfg["unmatched_min_score"]), 1e-6), 1 - 1e-6)
    min_logit = math.log(min_score / (1 - min_score))
    anchor_b, anchor_n = (logits.amax(-1) >= min_logit).nonzero(as_tuple=True)    # anchors with any confident class
    hit_anchor, hit_class = (logits[anchor_b, anchor_n] >= min_logit).nonzero(as_tuple=True)
    cand_b, flat_index = anchor_b[hit_anchor], anchor_n[hit_anchor] * num_classes + hit_class
    if cand_b.shape[0] > 8 * UNMATCHED_PRE_NMS * batch:     # an untrained or diverging model: bound the sort
        top_logit, top_index = flat.topk(min(UNMATCHED_PRE_NMS, flat.shape[1]), dim=1)
        cand_b, cand_k = (top_logit >= min_logit).nonzero(as_tuple=True)
        flat_index = top_index[cand_b, cand_k]
    cand_logit = flat[cand_b, flat_index]
    by_score = torch.argsort(cand_logit, descending=True)
    by_image = by_score[torch.argsort(cand_b[by_score], stable=True)]             # image-major, score-descending
    cand_b, flat_index, cand_logit = cand_b[by_image], flat_index[by_image], cand_logit[by_image]
    per_image = torch.bincount(cand_b, minlength=batch)
    rank = torch.arange(cand_b.shape[0], device=logits.device) - (torch.cumsum(per_image, 0) - per_image)[cand_b]
    top = rank < UNMATCHED_PRE_NMS
    cand_b, flat_index, score = cand_b[top], flat_index[top], cand_logit[top].sigmoid()
    cand_n, cand_label = flat_index // num_classes, flat_index % num_classes
    boxes = coder.decode(deltas[cand_b, cand_n], anchors[cand_n])
    keep = batched_nms(boxes, score, cand_b * num_classes + cand_label, UNMATCHED_NMS_IOU)   # by score, descending
    cand_b, boxes, score, cand_label = cand_b[keep], boxes[keep], score[keep], cand_label[keep]
    if gt_pad.shape[1]:
        overlap = paired_box_iou(boxes[:, None, :], gt_pad[cand_b]).masked_fill(~gt_valid[cand_b], 0.0).amax(1)
        far = overlap < log_cfg["unmatched_max_iou"]
        cand_b, boxes, score, cand_label = cand_b[far], boxes[far], score[far], cand_label[far]
    order = torch.argsort(cand_b, stable=True)                                  # score order kept within an image
    cand_b, boxes, score, cand_label = cand_b[order], boxes[order], score[order], cand_label[order]
    per_image = torch.bincount(cand_b, minlength=batch)
    rank = torch.arange(cand_b.shape[0], device=logits.device) - (torch.cumsum(per_image, 0) - per_image)[cand_b]
    top = rank < log_cfg["unmatched_per_image"]
    return {"batch_index": cand_b[top], "box": boxes[top], "score": score[top], "label": cand_label[top]}
