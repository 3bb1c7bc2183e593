"""SSD-style box encoding: centre/size offsets of a box relative to an anchor, scaled by variances.

``encode`` turns ground-truth boxes into the regression targets of the anchors they are matched to, and
``decode`` turns predicted offsets back into boxes. Both work on ``[..., 4]`` tensors in ``xyxy`` view
pixels. Offsets (Liu et al., "SSD", ECCV 2016; variances from its reference implementation)::

    dx = (gx - ax) / aw / v0      dy = (gy - ay) / ah / v1
    dw = log(gw / aw) / v2        dh = log(gh / ah) / v3
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import torch

#: Largest log-scale a decoded box may grow by (as in torchvision's detection BoxCoder): exp() never overflows.
MAX_LOG_SCALE = math.log(1000.0 / 16)
_MIN_SIDE = 1e-3


def xyxy_to_cxcywh(boxes: torch.Tensor) -> torch.Tensor:
    """``[..., 4]`` corners -> ``[..., 4]`` centre x, centre y, width, height."""
    x1, y1, x2, y2 = boxes.unbind(-1)
    return torch.stack(((x1 + x2) * 0.5, (y1 + y2) * 0.5, x2 - x1, y2 - y1), dim=-1)


class BoxCoder:
    """Encode boxes as variance-scaled offsets from anchors and decode them back.

    Parameters
    ----------
    variances : four scales for centre x, centre y, width, height (config ``loss.box_variances``).
    """

    def __init__(self, variances: Sequence[float] = (0.1, 0.1, 0.2, 0.2)) -> None:
        if len(variances) != 4 or any(v <= 0 for v in variances):
            raise ValueError(f"loss.box_variances: expected four positive numbers, got {list(variances)}")
        self.variances = tuple(float(v) for v in variances)

    def __repr__(self) -> str:
        return f"BoxCoder(variances={list(self.variances)})"

    def encode(self, gt_xyxy: torch.Tensor, anchors_xyxy: torch.Tensor) -> torch.Tensor:
        """Offsets ``[n, 4]`` that move each anchor ``[n, 4]`` onto its ground-truth box ``[n, 4]``."""
        g = xyxy_to_cxcywh(gt_xyxy)
        a = xyxy_to_cxcywh(anchors_xyxy)
        v0, v1, v2, v3 = self.variances
        gw = g[..., 2].clamp(min=_MIN_SIDE)
        gh = g[..., 3].clamp(min=_MIN_SIDE)
        return torch.stack((
            (g[..., 0] - a[..., 0]) / a[..., 2] / v0,
            (g[..., 1] - a[..., 1]) / a[..., 3] / v1,
            torch.log(gw / a[..., 2]) / v2,
            torch.log(gh / a[..., 3]) / v3,
        ), dim=-1)

    def decode(self, deltas: torch.Tensor, anchors: torch.Tensor) -> torch.Tensor:
        """Boxes ``[..., 4]`` xyxy from offsets ``[..., 4]`` and anchors broadcastable to them."""
        a = xyxy_to_cxcywh(anchors)
        v0, v1, v2, v3 = self.variances
        cx = a[..., 0] + deltas[..., 0] * v0 * a[..., 2]
        cy = a[..., 1] + deltas[..., 1] * v1 * a[..., 3]
        half_w = 0.5 * a[..., 2] * torch.exp((deltas[..., 2] * v2).clamp(max=MAX_LOG_SCALE))
        half_h = 0.5 * a[..., 3] * torch.exp((deltas[..., 3] * v3).clamp(max=MAX_LOG_SCALE))
        return torch.stack((cx - half_w, cy - half_h, cx + half_w, cy + half_h), dim=-1)


def paired_box_iou(boxes1: torch.Tensor, boxes2: torch.Tensor) -> torch.Tensor:
    """IoU of corresponding xyxy boxes, broadcasting leading dims: ``[..., 4], [..., 4] -> [...]``.

    The element-wise counterpart of :func:`torchvision.ops.box_iou` (which gives all pairs), with its operations in
    its order: for boxes of positive area each value equals that function's bit for bit (anchor matching relies
    on it, :func:`detdiff.model.anchors.match_near`).
    """
    lt = torch.maximum(boxes1[..., :2], boxes2[..., :2])
    rb = torch.minimum(boxes1[..., 2:], boxes2[..., 2:])
    inter = (rb - lt).clamp(min=0).prod(-1)
    area1 = (boxes1[..., 2:] - boxes1[..., :2]).clamp(min=0).prod(-1)
    area2 = (boxes2[..., 2:] - boxes2[..., :2]).clamp(min=0).prod(-1)
    union = area1 + area2 - inter
    return torch.where(union > 0, inter / union.clamp(min=1e-12), torch.zeros_like(inter))
