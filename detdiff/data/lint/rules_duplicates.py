"""Lint rule for duplicate boxes: the same box, or IoU > 0.95, twice in one image and class.

Exact duplicates are found by sorting; near duplicates only pair boxes inside one (image, class) group
(:func:`detdiff.boxes.group_pairs`), so the cost follows the group sizes, not the whole file.
"""

from __future__ import annotations

import numpy as np

from detdiff.boxes import group_offsets, group_pairs, pair_iou, xywh_to_xyxy
from detdiff.data.lint.codes import NEAR_DUPLICATE_IOU, FindingCollector
from detdiff.data.lint.parse import Section, same_as_previous


def lint_duplicates(sec: Section, usable: np.ndarray, image_row: np.ndarray, category_row: np.ndarray,
                    boxes: np.ndarray, out: FindingCollector) -> None:
    """Exact and near-duplicate boxes among the ``usable`` annotations (same image and class).

    ``image_row`` / ``category_row``: int64 [A]; ``boxes``: float64 [A, 4] COCO xywh.
    """
    rows = np.flatnonzero(usable)
    b = boxes[rows]
    order = np.lexsort((b[:, 3], b[:, 2], b[:, 1], b[:, 0], category_row[rows], image_row[rows]))
    rows, b = rows[order], b[order]
    group = image_row[rows] * (int(category_row.max(initial=0)) + 1) + category_row[rows]
    again = same_as_previous((group[1:] == group[:-1]) & (b[1:] == b[:-1]).all(axis=1), len(rows))
    run_start = np.maximum.accumulate(np.where(~again, np.arange(len(rows)), 0))
    dup = np.flatnonzero(again)
    out.add_rows("duplicate_box", sec, rows[dup], "bbox",
                 (f"expected one annotation per object, found the same class and box {b[k].tolist()} as "
                  f"annotation {sec.record_label(rows[run_start[k]])}" for k in dup.tolist()))

    flagged: dict[int, tuple[int, float]] = {}
    xyxy = xywh_to_xyxy(b)
    for left, right in group_pairs(group_offsets(group)):
        later = left < right                             # each unordered pair once
        left, right = left[later], right[later]
        iou = pair_iou(xyxy, left, right)
        near = np.flatnonzero((iou > NEAR_DUPLICATE_IOU) & ~(b[left] == b[right]).all(axis=1))
        for k in near.tolist():
            flagged.setdefault(int(right[k]), (int(left[k]), float(iou[k])))
    picks = sorted(flagged)
    out.add_rows("near_duplicate_box", sec, rows[np.array(picks, dtype=np.int64)], "bbox",
                 (f"expected distinct objects, found IoU {flagged[k][1]:.3f} (> {NEAR_DUPLICATE_IOU}) with "
                  f"annotation {sec.record_label(rows[flagged[k][0]])} of the same class" for k in picks))
