"""pycocotools' ``COCOeval`` with its per-image greedy matching done over arrays.

``COCOeval.evaluateImg`` (cocodataset/cocoapi, ``PythonAPI/pycocotools/cocoeval.py``) matches each detection,
best score first, to the best still-free ground truth at each IoU threshold in three nested Python loops
(thresholds x detections x ground truths). On crowded images that loop is most of an audit's evaluation: 40 of
the 94 s of an aerial validity audit's final pass under cProfile (800 images, 42k boxes, 145k detections; 67 s
in the audit). :class:`ArrayCOCOeval` keeps everything else of ``COCOeval`` (IoUs, area ranges, ``accumulate``) and
replaces only that loop by one over detections, the thresholds and ground truths of each step taken as arrays, with
the same rules: a ground truth already matched is skipped unless it is a crowd; among the free ones at IoU >= the
threshold (capped at 1 - 1e-10) the highest IoU wins, the later one on a tie; ground truths that are not ignored
are preferred to ignored ones. Small image-category pairs go to the original loop, which is faster there.
``tests/test_cocoeval_arrays.py`` checks that both give the same ``evalImgs`` and the same ``eval`` arrays.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from pycocotools.cocoeval import COCOeval

#: Image-category pairs with fewer threshold x detection x ground-truth steps than this use the original loop
#: (its per-step cost is below the arrays' per-detection overhead there).
ARRAY_MIN_STEPS = 100


def greedy_matches(ious: np.ndarray, thresholds: np.ndarray, gt_ignore: np.ndarray, iscrowd: np.ndarray,
                   gt_ids: np.ndarray, dt_ids: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``dtm [T, D]``, ``gtm [T, G]`` (matched ids, 0 for none) and ``dtIg [T, D]`` (matched to an ignored ground
    truth) of ``COCOeval.evaluateImg`` for ``ious [D, G]`` with detections best first and ground truths sorted
    ignored last."""
    num_t, (num_d, num_g) = len(thresholds), ious.shape
    gtm = np.zeros((num_t, num_g))
    dtm = np.zeros((num_t, num_d))
    dt_ig = np.zeros((num_t, num_d))
    limit = np.minimum(thresholds, 1 - 1e-10)[:, None]
    crowd = iscrowd.astype(bool)[None, :]
    regular = (gt_ignore == 0)[None, :]
    reversed_columns = np.arange(num_g)[::-1]
    steps = np.arange(num_t)
    reachable = ious.max(axis=1, initial=-1.0) >= limit.min()
    for d in np.flatnonzero(reachable):
        row = ious[d][None, :]
        free = ((gtm == 0) | crowd) & (row >= limit)
        first = free & regular
        usable = np.where(first.any(axis=1, keepdims=True), first, free)
        found = usable.any(axis=1)
        if not found.any():
            continue
        scored = np.where(usable, row, -np.inf)[:, reversed_columns]
        best = num_g - 1 - scored.argmax(axis=1)
        t, g = steps[found], best[found]
        dt_ig[t, d] = gt_ignore[g]
        dtm[t, d] = gt_ids[g]
        gtm[t, g] = dt_ids[d]
    return dtm, gtm, dt_ig


class ArrayCOCOeval(COCOeval):
    """``COCOeval`` whose ``evaluateImg`` matches with :func:`greedy_matches` (module docstring)."""

    def evaluateImg(self, imgId: int, catId: int, aRng: list[float], maxDet: int) -> dict[str, Any] | None:
        p = self.params
        if p.useCats:
            gt, dt = self._gts[imgId, catId], self._dts[imgId, catId]
        else:
            gt = [g for c in p.catIds for g in self._gts[imgId, c]]
            dt = [d for c in p.catIds for d in self._dts[imgId, c]]
        if not gt or not dt or len(p.iouThrs) * min(len(dt), maxDet) * len(gt) < ARRAY_MIN_STEPS:
            return super().evaluateImg(imgId, catId, aRng, maxDet)
        ignore = np.array([g["ignore"] or g["area"] < aRng[0] or g["area"] > aRng[1] for g in gt], dtype=np.int64)
        for g, flag in zip(gt, ignore):
            g["_ignore"] = int(flag)
        gtind = np.argsort(ignore, kind="mergesort")
        gt = [gt[i] for i in gtind]
        dtind = np.argsort([-d["score"] for d in dt], kind="mergesort")
        dt = [dt[i] for i in dtind[0:maxDet]]
        ious = self.ious[imgId, catId]
        ious = np.asarray(ious)[:len(dt)][:, gtind]      # computeIoU kept maxDets[-1] rows, best score first
        gt_ignore = ignore[gtind]
        dtm, gtm, dt_ig = greedy_matches(ious, np.asarray(p.iouThrs), gt_ignore,
                                         np.array([int(g["iscrowd"]) for g in gt]),
                                         np.array([g["id"] for g in gt], dtype=np.float64),
                                         np.array([d["id"] for d in dt], dtype=np.float64))
        outside = np.array([d["area"] < aRng[0] or d["area"] > aRng[1] for d in dt]).reshape((1, len(dt)))
        dt_ig = np.logical_or(dt_ig, np.logical_and(dtm == 0, np.repeat(outside, len(p.iouThrs), 0)))
        return {"image_id": imgId, "category_id": catId, "aRng": aRng, "maxDet": maxDet,
                "dtIds": [d["id"] for d in dt], "gtIds": [g["id"] for g in gt], "dtMatches": dtm, "gtMatches": gtm,
                "dtScores": [d["score"] for d in dt], "gtIgnore": gt_ignore, "dtIgnore": dt_ig}
