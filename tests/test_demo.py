"""The demo scenario generator, checked against pycocotools, torchvision and OpenCV."""

from __future__ import annotations

import contextlib
import io
import json
import time
from pathlib import Path

import cv2
import numpy as np
import pytest
import torch
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval
from torchvision.ops import box_convert, box_iou

from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.scenarios import DEFAULT_FAULT_RATES, DemoPaths, generate_demo

HIGH_RATES = {"wrong_class": 0.08, "missing_box": 0.06, "loose_box": 0.08, "duplicate_box": 0.06}


def _quiet_coco(path: Path) -> COCO:
    with contextlib.redirect_stdout(io.StringIO()):   # pycocotools prints while indexing
        return COCO(str(path))


def _xyxy(boxes: list[list[float]]) -> torch.Tensor:
    # COCO bbox is [x, y, width, height] (COCO data format, cocodataset.org); torchvision converts it
    return box_convert(torch.tensor(boxes, dtype=torch.float64).reshape(-1, 4), "xywh", "xyxy")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[DemoPaths, dict, dict, float]:
    out = tmp_path_factory.mktemp("demo")
    start = time.perf_counter()
    paths = generate_demo(out, num_images=40, seed=3, fault_rates=HIGH_RATES, progress=False)
    seconds = time.perf_counter() - start
    coco = json.loads(paths.annotations.read_text())
    truth = json.loads(paths.truth.read_text())
    return paths, coco, truth, seconds


def test_forty_images_are_quick(demo):
    # common practice: the brief asks for a few hundred images in 30 s; 40 images get a quarter of that
    assert demo[3] < 7.5


def test_pycocotools_counts_match_truth(demo):
    paths, _, truth, _ = demo
    api = _quiet_coco(paths.annotations)   # source: pycocotools coco.py (COCO.createIndex)
    written = [o for o in truth["objects"] if o["annotation_id"] is not None]
    duplicates = [f for f in truth["faults"] if f["kind"] == "duplicate_box"]
    assert len(api.imgs) == len(truth["images"]) == truth["counts"]["images"] == 40
    assert len(api.anns) == len(written) + len(duplicates) == truth["counts"]["annotations"]
    assert len(api.cats) == len(truth["categories"]) == truth["counts"]["categories"] == 6
    assert all((paths.images_dir / img["file_name"]).is_file() for img in api.imgs.values())


def test_ids_are_not_contiguous_and_never_zero(demo):
    _, coco, _, _ = demo
    cat_ids = sorted(c["id"] for c in coco["categories"])
    img_ids = sorted(i["id"] for i in coco["images"])
    ann_ids = sorted(a["id"] for a in coco["annotations"])
    assert cat_ids != list(range(cat_ids[0], cat_ids[0] + len(cat_ids))) and cat_ids[0] > 1
    assert img_ids[0] > 1 and np.any(np.diff(img_ids) > 1)
    # an annotation id 0 breaks COCOeval matching (pycocotools cocoeval.py, evaluateImg)
    assert ann_ids[0] > 1 and np.any(np.diff(ann_ids) > 1)
    assert len(set(ann_ids)) == len(ann_ids) and len(set(img_ids)) == len(img_ids)


def test_boxes_are_inside_their_images_and_area_is_w_times_h(demo):
    _, coco, _, _ = demo
    size = {i["id"]: (i["width"], i["height"]) for i in coco["images"]}
    for ann in coco["annotations"]:
        x, y, w, h = ann["bbox"]
        width, height = size[ann["image_id"]]
        assert w > 0 and h > 0 and x >= 0 and y >= 0 and x + w <= width + 1e-9 and y + h <= height + 1e-9, ann
        assert ann["area"] == pytest.approx(w * h) and ann["iscrowd"] == 0


def test_loose_boxes_have_iou_in_the_stated_range(demo):
    _, coco, truth, _ = demo
    by_id = {a["id"]: a for a in coco["annotations"]}
    loose = [f for f in truth["faults"] if f["kind"] == "loose_box"]
    assert loose
    lo, hi = truth["loose_box_iou_range"]
    written = _xyxy([by_id[f["annotation_id"]]["bbox"] for f in loose])
    clean = _xyxy([f["clean_bbox"] for f in loose])
    iou = box_iou(written, clean).diagonal()   # source: torchvision.ops.box_iou
    assert torch.all((iou >= lo) & (iou <= hi)), iou
    assert torch.allclose(iou, torch.tensor([f["iou"] for f in loose], dtype=torch.float64), atol=1e-3)


def test_duplicates_overlap_their_original(demo):
    _, coco, truth, _ = demo
    by_id = {a["id"]: a for a in coco["annotations"]}
    dups = [f for f in truth["faults"] if f["kind"] == "duplicate_box"]
    assert dups
    added = [by_id[f["annotation_id"]] for f in dups]
    original = [by_id[f["duplicate_of"]] for f in dups]
    iou = box_iou(_xyxy([a["bbox"] for a in added]), _xyxy([a["bbox"] for a in original])).diagonal()
    assert torch.all(iou > truth["duplicate_min_iou"]), iou   # source: torchvision.ops.box_iou
    assert all(a["category_id"] == o["category_id"] and a["image_id"] == o["image_id"]
               for a, o in zip(added, original))


def test_wrong_class_and_missing_faults_are_in_the_written_file(demo):
    _, coco, truth, _ = demo
    by_id = {a["id"]: a for a in coco["annotations"]}
    wrong = [f for f in truth["faults"] if f["kind"] == "wrong_class"]
    assert wrong and all(by_id[f["annotation_id"]]["category_id"] == f["written_category_id"]
                         != f["true_category_id"] for f in wrong)
    missing = [f for f in truth["faults"] if f["kind"] == "missing_box"]
    assert missing
    for f in missing:
        same_image = [a["bbox"] for a in coco["annotations"] if a["image_id"] == f["image_id"]]
        if same_image:   # source: torchvision.ops.box_iou; nothing written covers the missing object
            assert box_iou(_xyxy([f["bbox"]]), _xyxy(same_image)).max() < 0.9


def test_fault_counts_follow_the_rates(demo):
    _, _, truth, _ = demo
    n = len(truth["objects"])
    for kind, rate in HIGH_RATES.items():
        assert truth["counts"][kind] == sum(f["kind"] == kind for f in truth["faults"]) == round(rate * n)
    assert sum(o["fault"] is not None for o in truth["objects"]) == len(truth["faults"])


def test_zero_fault_rates_write_the_truth(tmp_path):
    rates = dict.fromkeys(DEFAULT_FAULT_RATES, 0.0)
    paths = generate_demo(tmp_path, num_images=8, seed=5, fault_rates=rates, progress=False)
    truth = json.loads(paths.truth.read_text())
    gt = _quiet_coco(paths.annotations)
    detections = [{"image_id": o["image_id"], "category_id": o["category_id"], "bbox": o["clean_bbox"],
                   "score": 1.0} for o in truth["objects"]]
    with contextlib.redirect_stdout(io.StringIO()):
        evaluator = COCOeval(gt, gt.loadRes(detections), "bbox")
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    # source: pycocotools cocoeval.py; clean truth scored against a fault-free file gives AP 1
    # (compared with a tolerance: 1.0 can come out as 0.9999999999999998)
    assert evaluator.stats[0] == pytest.approx(1.0)
    assert truth["faults"] == []


def test_same_seed_same_bytes_other_seed_differs(tmp_path):
    a = generate_demo(tmp_path / "a", num_images=6, seed=11, progress=False)
    b = generate_demo(tmp_path / "b", num_images=6, seed=11, progress=False)
    c = generate_demo(tmp_path / "c", num_images=6, seed=12, progress=False)
    assert a.annotations.read_bytes() == b.annotations.read_bytes()
    assert a.truth.read_bytes() == b.truth.read_bytes()
    names = sorted(p.name for p in a.images_dir.iterdir())
    assert names == sorted(p.name for p in b.images_dir.iterdir())
    assert all((a.images_dir / n).read_bytes() == (b.images_dir / n).read_bytes() for n in names)
    assert a.annotations.read_bytes() != c.annotations.read_bytes()
    first_c = sorted(c.images_dir.iterdir())[0].read_bytes()
    assert (a.images_dir / names[0]).read_bytes() != first_c


def test_image_conditions_show_in_the_pixels(demo):
    paths, _, truth, _ = demo
    records = truth["images"]
    grey = [cv2.imread(str(paths.images_dir / r["file_name"]), cv2.IMREAD_GRAYSCALE) for r in records]
    sharpness = np.array([cv2.Laplacian(g, cv2.CV_64F).var() for g in grey])
    brightness = np.array([g.mean() for g in grey])
    blur = np.array([r["blur"] for r in records])
    dim = np.array([r["dim"] for r in records])
    assert blur.any() and dim.any()
    # variance of the Laplacian falls with blur (Pech-Pacheco et al., ICPR 2000; OpenCV cv2.Laplacian)
    assert np.median(sharpness[blur]) < 0.25 * np.median(sharpness[~blur])
    assert np.median(brightness[dim]) < 0.6 * np.median(brightness[~dim])


def test_object_difficulties_are_recorded(demo):
    _, _, truth, _ = demo
    objects = truth["objects"]
    size = {r["image_id"]: (r["width"], r["height"]) for r in truth["images"]}
    assert any(o["tiny"] for o in objects) and any(o["truncated"] for o in objects)
    for o in objects:
        x, y, w, h = o["clean_bbox"]
        width, height = size[o["image_id"]]
        if o["truncated"]:   # a truncated object's box touches the border it crosses
            assert x == 0 or y == 0 or x + w == width or y + h == height, o
        if o["tiny"]:
            assert max(w, h) <= 24, o
        assert 0.3 <= o["visible_fraction"] <= 1.0
    crowded = {r["image_id"] for r in truth["images"] if r["crowded"]}
    assert any(o["visible_fraction"] < 0.9 and o["image_id"] in crowded for o in objects)


def test_written_file_reads_with_the_dataset_loader(demo):
    paths, coco, _, _ = demo
    dataset = build_dataset(read_coco_json(paths.annotations), ann_path=paths.annotations,
                            images_dir=paths.images_dir)
    assert dataset.num_annotations == len(coco["annotations"]) and dataset.num_classes == 6


def test_bad_fault_rates_are_refused(tmp_path):
    with pytest.raises(ValueError, match="unknown fault kind"):
        generate_demo(tmp_path, num_images=1, fault_rates={"swapped": 0.1}, progress=False)
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        generate_demo(tmp_path, num_images=1, fault_rates={"loose_box": 1.5}, progress=False)
