"""The evaluation's two fast paths against their references: pycocotools' own ``COCOeval.evaluateImg`` loop
(cocodataset/cocoapi, PythonAPI/pycocotools/cocoeval.py) and torchvision's ``batched_nms``."""

from __future__ import annotations

import contextlib
import copy
import io

import numpy as np
import pytest
import torch
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval
from torchvision.ops import batched_nms

from detdiff.model.postprocess import grouped_nms
from detdiff.train import cocoeval_arrays
from detdiff.train.cocoeval_arrays import ArrayCOCOeval


def _crowded_scene(seed: int) -> tuple[dict, list[dict]]:
    """Ground truth with crowds, ignore flags and boxes of every COCO area range; detections that jitter, repeat
    and miss them, with tied scores and tied IoUs (repeated boxes)."""
    rng = np.random.default_rng(seed)
    images, annotations, detections = [], [], []
    for image_id in range(1, 13):
        images.append({"id": image_id, "width": 640, "height": 480})
        count = int(rng.integers(0, 40))
        side = np.exp(rng.uniform(np.log(3), np.log(200), count))       # small, medium and large (COCOeval areas)
        xy = rng.uniform(0, 440, (count, 2))
        wh = np.stack([side, side * rng.uniform(0.5, 2, count)], axis=1)
        labels = rng.integers(1, 4, count)
        for box, label in zip(np.concatenate([xy, wh], axis=1), labels):
            ann = {"id": len(annotations) + 1, "image_id": image_id, "category_id": int(label),
                   "bbox": [float(v) for v in box], "area": float(box[2] * box[3]),
                   "iscrowd": int(rng.random() < 0.06)}
            if rng.random() < 0.05:
                ann["ignore"] = 1
            annotations.append(ann)
            for _ in range(int(rng.integers(0, 4))):          # 0-3 detections per box, some of them repeats
                jitter = box + rng.normal(0, 0.08, 4) * box[[2, 3, 2, 3]]
                jitter[2:] = np.maximum(jitter[2:], 1.0)
                label_out = int(label) if rng.random() < 0.85 else int(rng.integers(1, 4))
                score = round(float(rng.random()), 2)            # two decimals: ties
                detections.append({"image_id": image_id, "category_id": label_out,
                                   "bbox": [float(v) for v in jitter], "score": score})
                if rng.random() < 0.1:
                    detections.append(dict(detections[-1]))
        for _ in range(int(rng.integers(0, 15))):                  # false positives
            box = np.concatenate([rng.uniform(0, 500, 2), rng.uniform(2, 120, 2)])
            detections.append({"image_id": image_id, "category_id": int(rng.integers(1, 4)),
                               "bbox": [float(v) for v in box], "score": round(float(rng.random()), 2)})
    categories = [{"id": k, "name": f"c{k}"} for k in (1, 2, 3)]
    return {"images": images, "annotations": annotations, "categories": categories}, detections


def _evaluated(cls, gt_dict: dict, detections: list[dict], use_cats: int) -> COCOeval:
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = copy.deepcopy(gt_dict)
        gt.createIndex()
        ev = cls(gt, gt.loadRes(copy.deepcopy(detections)), "bbox")
        ev.params.maxDets = [1, 10, 100]
        ev.params.useCats = use_cats
        ev.evaluate()
        ev.accumulate()
    return ev


@pytest.mark.parametrize("seed,use_cats", [(0, 1), (1, 1), (2, 0)])
def test_array_matching_gives_pycocotools_results(seed, use_cats, monkeypatch) -> None:
    # Reference: pycocotools COCOeval.evaluateImg, run on the same objects; every image-category pair goes through
    # the arrays here (ARRAY_MIN_STEPS 0), so crowds, ignored boxes, area ranges, maxDets 1/10 and ties are covered.
    monkeypatch.setattr(cocoeval_arrays, "ARRAY_MIN_STEPS", 0)
    gt_dict, detections = _crowded_scene(seed)
    ours, reference = (_evaluated(cls, gt_dict, detections, use_cats) for cls in (ArrayCOCOeval, COCOeval))
    assert len(ours.evalImgs) == len(reference.evalImgs)
    compared = 0
    for mine, theirs in zip(ours.evalImgs, reference.evalImgs):
        assert (mine is None) == (theirs is None)
        if mine is not None:
            assert mine.keys() == theirs.keys()
            for key in mine:
                np.testing.assert_array_equal(np.asarray(mine[key]), np.asarray(theirs[key]), err_msg=key)
            compared += int(np.asarray(theirs["dtMatches"]).any())
    assert compared >= 40                               # many pairs with matches were compared
    for key in ("precision", "recall", "scores"):
        np.testing.assert_array_equal(ours.eval[key], reference.eval[key])


def test_grouped_nms_keeps_batched_nms_set() -> None:
    # Reference: torchvision.ops.batched_nms (its per-group loop above 4,000 boxes on CPU, its coordinate trick
    # below); boxes with negative corners too.
    gen = torch.Generator().manual_seed(0)
    for count, groups in ((6000, 300), (800, 40), (1, 1)):
        xy = torch.rand(count, 2, generator=gen) * 600 - 50
        boxes = torch.cat([xy, xy + 5 + torch.rand(count, 2, generator=gen) * 80], dim=1)
        scores = torch.rand(count, generator=gen)
        group = torch.randint(0, groups, (count,), generator=gen) * 7 + 3         # sparse group ids
        ours, theirs = grouped_nms(boxes, scores, group, 0.5), batched_nms(boxes, scores, group, 0.5)
        assert set(ours.tolist()) == set(theirs.tolist())
        assert torch.all(scores[ours][:-1] >= scores[ours][1:])                     # best first
    assert grouped_nms(torch.zeros(0, 4), torch.zeros(0), torch.zeros(0, dtype=torch.int64), 0.5).numel() == 0
