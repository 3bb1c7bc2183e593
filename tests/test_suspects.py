"""analyze_run on a hand-built run folder: planted label errors are found with the right fix, the CSVs
follow the column contract and review.json is a COCO file pycocotools loads."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from pycocotools.coco import COCO
from torchvision.ops import box_convert, box_iou

from detdiff.analysis.suspects import (add_final_sightings, final_unmatched, late_epochs, read_detections,
                                       required_epochs)
from detdiff.analysis.tables import (CLASS_COLUMNS, IMAGE_COLUMNS, OBJECT_COLUMNS, analyze_run, review_coco,
                                     write_tables)
from detdiff.config import load_config
from detdiff.data.coco import CocoDataset, build_dataset
from detdiff.data.pixel_descriptors import PIXEL_DESCRIPTOR_NAMES
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLogWriter

EPOCHS = 6
CAT, DOG, CUP = 5, 9, 17          # non-contiguous COCO category ids on purpose
MISSING_BOX = [120.0, 110.0, 40.0, 30.0]


def _coco() -> dict:
    """Eight 200x160 images, four boxes each on a grid, plus one duplicate (annotation 900)."""
    images = [{"id": 100 + i, "file_name": f"img{i}.jpg", "width": 200, "height": 160} for i in range(8)]
    cats = [{"id": CAT, "name": "cat"}, {"id": DOG, "name": "dog"}, {"id": CUP, "name": "cup"}]
    anns, aid = [], 1
    for i in range(8):
        for k in range(4):
            x, y = 10 + 45 * k, 10 + 20 * (k % 2)
            w, h = 30 + 3 * i, 40 + 2 * k
            anns.append({"id": aid, "image_id": 100 + i, "category_id": (CAT, DOG, CUP)[(i + k) % 3],
                         "bbox": [x, y, w, h], "area": w * h, "iscrowd": 0})
            aid += 1
    dup = dict(anns[9], id=900, bbox=[anns[9]["bbox"][0] + 0.5, *anns[9]["bbox"][1:]])   # same box, later id
    return {"images": images, "annotations": anns + [dup], "categories": cats}


def _write_log(rundir: Path, ds: CocoDataset, plant: dict[str, int]) -> None:
    """Six epochs of a well-learned dataset, with the planted signals of ``plant`` (annotation rows)."""
    rng = np.random.default_rng(0)
    num_i, num_a = ds.num_images, ds.num_annotations
    writer = LossLogWriter(rundir / "log", num_i, num_a)
    wrong, loose = plant["wrong_class"], plant["loose_box"]
    missing_image = plant["missing_image"]
    for epoch in range(EPOCHS):
        writer.reset(epoch)
        obj = {name: np.full((num_a, *shape), fill, dtype=dt) for name, (dt, shape, fill) in OBJECT_FIELDS.items()}
        obj["num_anchors"][:] = 3
        obj["loc_sum"][:] = rng.uniform(0.1, 0.3, num_a)
        obj["cls_sum"][:] = rng.uniform(0.1, 0.3, num_a)
        obj["logit_label"][:] = 2.0
        obj["logit_other"][:] = -2.0
        obj["other_label"][:] = (ds.labels + 1) % 3
        obj["pred_box"][:] = ds.boxes
        obj["pred_iou"][:] = 0.92
        obj["pred_label"][:] = ds.labels
        obj["pred_score"][:] = 0.8
        obj["detected"][:] = True
        # wrong class: the detector calls the box a dog with IoU 0.85 every epoch, and the class loss is high
        obj["cls_sum"][wrong] = 3.0
        obj["pred_label"][wrong] = 1
        obj["other_label"][wrong] = 1
        obj["logit_label"][wrong], obj["logit_other"][wrong] = -1.0, 1.5
        obj["pred_iou"][wrong] = 0.85
        obj["detected"][wrong] = False
        # loose box: the prediction is a tighter box inside the annotation, IoU about 0.7, high box loss
        x, y, w, h = ds.boxes[loose]
        obj["pred_box"][loose] = [x + 0.1 * w, y + 0.1 * h, 0.8 * w, 0.8 * h + epoch * 0.01]
        obj["pred_iou"][loose] = 0.64
        obj["loc_sum"][loose] = 3.0
        obj["loc_kept"][:], obj["cls_kept"][:] = obj["loc_sum"] / 3, obj["cls_sum"] / 3   # 3 like anchors
        image = {name: np.full(num_i, fill, dtype=dt) for name, (dt, shape, fill) in IMAGE_FIELDS.items()}
        image["num_pos"][:] = np.bincount(ds.ann_image_index, minlength=num_i) * 3
        image["loc_sum"][:] = np.bincount(ds.ann_image_index, weights=obj["loc_sum"], minlength=num_i)
        image["pos_sum"][:] = np.bincount(ds.ann_image_index, weights=obj["cls_sum"], minlength=num_i)
        image["neg_sum"][:] = rng.uniform(1.0, 2.0, num_i)
        jitter = rng.uniform(-2, 2, 4)
        unmatched = {"image_index": np.array([missing_image, 1 + epoch], dtype=np.int64),   # 2nd: never repeats
                     "box": np.array([np.add(MISSING_BOX, jitter), [5, 120, 20, 20]], dtype=np.float32),
                     "score": np.array([0.7, 0.5], dtype=np.float32), "label": np.array([2, 0], dtype=np.int32)}
        writer.process(np.arange(num_i), image, np.arange(num_a), obj, unmatched)
        writer.finalize()


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    rundir = tmp_path_factory.mktemp("run")
    ds = build_dataset(_coco())
    row = {int(a): j for j, a in enumerate(ds.ann_ids)}
    plant = {"wrong_class": row[4], "loose_box": row[14], "duplicate": row[900], "missing_image": 5}
    assert ds.labels[plant["wrong_class"]] == 0                     # a cat that the detector calls a dog
    _write_log(rundir, ds, plant)
    (rundir / "cache").mkdir()
    pixel = np.tile(np.array([150.0, 120.0, 40.0, 0.05], dtype=np.float32), (ds.num_images, 1))
    usable = np.ones(ds.num_images, dtype=bool)
    usable[7] = False
    np.savez(rundir / "cache" / "meta.npz", pixel=pixel, usable=usable, scale=np.ones(ds.num_images))
    features = np.random.default_rng(1).normal(size=(ds.num_annotations, 6)).astype(np.float32)
    features[0] = np.nan
    np.save(rundir / "object_features.npy", features)
    config = load_config()
    tables = analyze_run(rundir, ds, config)
    paths = write_tables(tables, rundir, ds)
    return ds, plant, tables, paths


def _kind(tables, kind: str):
    return tables.suspects[tables.suspects["kind"] == kind]


def test_wrong_class_suggests_the_persistent_other_class(run) -> None:
    ds, plant, tables, _ = run
    found = _kind(tables, "wrong_class")
    assert found["annotation_id"].tolist() == [4]
    assert found["suggested_category_id"].tolist() == [DOG]      # real COCO id, not the index
    assert "'dog'" in found["evidence"].iloc[0] and "3 of 3 late epochs" in found["evidence"].iloc[0]
    # score: confident learning's normalized margin (Northcutt et al., JAIR 2021), p(other) - p(label) from
    # the logits 1.5 and -1.0 planted above; the sigmoid reference is torch.sigmoid
    expected = float(torch.sigmoid(torch.tensor(1.5)) - torch.sigmoid(torch.tensor(-1.0)))
    assert found["score"].iloc[0] == pytest.approx(expected, abs=1e-6)


def test_missing_box_is_the_median_of_the_persistent_detections(run) -> None:
    ds, plant, tables, _ = run
    found = _kind(tables, "missing_box")
    assert len(found) == 1                                          # the one-epoch detections are not kept
    rec = found.iloc[0]
    assert rec["image_id"] == ds.image_ids[plant["missing_image"]] and rec["suggested_category_id"] == CUP
    assert rec[["annotation_id"]].isna().all()
    # suspects.csv contract: x, y, w, h hold the proposed box for missing_box (the suggested box too)
    for cols in (["x", "y", "w", "h"], ["suggested_x", "suggested_y", "suggested_w", "suggested_h"]):
        np.testing.assert_allclose(rec[cols].astype(float), MISSING_BOX, atol=3.0)


def test_loose_box_suggests_the_tighter_predicted_box(run) -> None:
    ds, plant, tables, _ = run
    found = _kind(tables, "loose_box")
    assert found["annotation_id"].tolist() == [int(ds.ann_ids[plant["loose_box"]])]
    x, y, w, h = ds.boxes[plant["loose_box"]]
    got = found.iloc[0][["suggested_x", "suggested_y", "suggested_w", "suggested_h"]].astype(float).to_numpy()
    np.testing.assert_allclose(got[:3], [x + 0.1 * w, y + 0.1 * h, 0.8 * w], atol=1e-3)
    # score = share of late epochs (3 of 3) x (1 - IoU(annotation, suggestion)) x detector confidence (0.8
    # planted); the IoU reference is torchvision.ops.box_iou
    iou = box_iou(box_convert(torch.tensor([[x, y, w, h]], dtype=torch.float64), "xywh", "xyxy"),
                  box_convert(torch.from_numpy(got[None].astype(np.float64)), "xywh", "xyxy"))
    assert found.iloc[0]["score"] == pytest.approx(1.0 * (1 - float(iou)) * 0.8, abs=1e-5)


def test_duplicate_flags_the_later_id(run) -> None:
    _, _, tables, _ = run
    found = _kind(tables, "duplicate_box")
    assert found["annotation_id"].tolist() == [900] and found["duplicate_of"].tolist() == [10]
    assert found["score"].iloc[0] > 0.9


def test_csv_columns_follow_the_contract(run) -> None:
    _, _, _, paths = run
    contract = {  # DEVELOPERS.md, "Run folder" column contracts
        "images": IMAGE_COLUMNS, "objects": OBJECT_COLUMNS, "classes": CLASS_COLUMNS,
        "suspects": ["kind", "image_id", "annotation_id", "x", "y", "w", "h", "suggested_category_id",
                     "suggested_x", "suggested_y", "suggested_w", "suggested_h", "score", "evidence"],
        "causes": ["stream", "level", "descriptor", "test", "bin", "effect", "ci_low", "ci_high", "p_value",
                   "q_value", "significant", "n", "top_rate", "base_rate"],
    }
    for name, columns in contract.items():
        with open(paths[name], newline="") as fh:
            header = next(csv.reader(fh))
        assert header[:len(columns)] == columns, name


def test_tables_carry_real_ids_and_pixel_descriptors(run) -> None:
    ds, _, tables, _ = run
    images, objects = tables.images, tables.objects
    assert set(objects["category_id"]) == {CAT, DOG, CUP}
    assert images["usable"].tolist() == [True] * 7 + [False]
    assert np.isnan(images.loc[7, "blur_laplacian_var"]) and images.loc[0, "blur_laplacian_var"] == 150.0
    assert list(PIXEL_DESCRIPTOR_NAMES) == IMAGE_COLUMNS[13:17]
    assert np.isnan(objects.loc[0, "feature_dist"]) and np.isfinite(objects.loc[1:, "feature_dist"]).all()
    classes = tables.classes.set_index("category_id")
    assert classes["objects"].sum() == ds.num_annotations
    assert classes.loc[CAT, "suspects"] >= 1                      # the wrong-class cat


def test_review_json_loads_in_pycocotools(run) -> None:
    ds, plant, tables, paths = run
    coco = COCO(str(paths["review"]))                              # reference loader: pycocotools coco.py
    suggestions = [a for a in coco.dataset["annotations"] if a["suggestion"]]
    assert len(suggestions) == len(tables.suspects)
    ids = [a["id"] for a in coco.dataset["annotations"]]
    assert len(set(ids)) == len(ids) and min(a["id"] for a in suggestions) > int(ds.ann_ids.max())
    by_kind = {a["suggestion_kind"]: a for a in suggestions}
    assert by_kind["wrong_class"]["suggested_for"] == 4 and by_kind["wrong_class"]["category_id"] == DOG
    assert by_kind["missing_box"]["suggested_for"] is None
    assert set(coco.getImgIds()) == set(tables.suspects["image_id"].tolist())
    json.dumps(review_coco(tables, ds), allow_nan=False)           # strict JSON: no NaN anywhere


def test_late_epochs_are_the_last_fraction() -> None:
    assert late_epochs([0, 1, 2, 3], 0.5) == [2, 3]
    assert late_epochs([0, 1, 2], 0.5) == [1, 2]
    assert late_epochs([7], 0.1) == [7]
    with pytest.raises(ValueError, match="late_fraction"):
        late_epochs([0, 1], 0.0)


def test_run_without_cache_or_features(tmp_path) -> None:
    ds = build_dataset(_coco())
    row = {int(a): j for j, a in enumerate(ds.ann_ids)}
    _write_log(tmp_path, ds, {"wrong_class": row[4], "loose_box": row[14], "missing_image": 5})
    tables = analyze_run(tmp_path, ds, load_config())
    assert tables.images["blur_laplacian_var"].isna().all() and tables.images["usable"].all()  # all covered
    assert tables.objects[["feature_dist", "map_x", "map_y"]].isna().all().all()
    assert set(tables.suspects["kind"]) == {"wrong_class", "missing_box", "loose_box", "duplicate_box"}


def test_persistent_needs_half_and_at_least_two_epochs() -> None:
    assert required_epochs(np.array([1, 2, 3, 4, 8]), 0.5).tolist() == [1, 2, 2, 2, 4]
    assert required_epochs(np.array([0, 4]), 0.75).tolist() == [0, 3]


def test_features_of_another_dataset_are_refused(tmp_path) -> None:
    ds = build_dataset(_coco())
    row = {int(a): j for j, a in enumerate(ds.ann_ids)}
    _write_log(tmp_path, ds, {"wrong_class": row[4], "loose_box": row[14], "missing_image": 5})
    np.save(tmp_path / "object_features.npy", np.zeros((5, 3), np.float32))
    with pytest.raises(ValueError, match=r"object_features\.npy: object features have shape \(5, 3\)"):
        analyze_run(tmp_path, ds, load_config())


def test_final_pass_detections_that_match_no_annotation(run, tmp_path) -> None:
    ds, plant, tables, _ = run
    image2 = [a["bbox"] for a in _coco()["annotations"] if a["image_id"] == 102]
    records = [{"image_id": 102, "category_id": DOG, "bbox": image2[0], "score": 0.9},          # an annotated box
               {"image_id": 102, "category_id": CUP, "bbox": [150, 120, 30, 30], "score": 0.6},  # nothing there
               {"image_id": 102, "category_id": CAT, "bbox": [152, 121, 30, 30], "score": 0.4},  # same place, lower
               {"image_id": 105, "category_id": CUP, "bbox": MISSING_BOX, "score": 0.5}]         # the log's proposal
    records += [{"image_id": 103, "category_id": CAT, "bbox": [150, 100 + 12 * k, 10, 10], "score": 0.3 - 0.01 * k}
                for k in range(5)]
    path = tmp_path / "detections.json"
    path.write_text(json.dumps(records))
    detections = read_detections(path, ds)
    final = final_unmatched(ds, detections, np.arange(ds.num_annotations), max_iou=0.3, per_image=3)
    # reference: torchvision's box_iou against every annotation of the image
    for img, box in zip(final["image"], final["box"]):
        anns = box_convert(torch.from_numpy(ds.boxes[ds.ann_image_index == img]), "xywh", "xyxy")
        assert box_iou(torch.from_numpy(box[None]), anns).max() < 0.3
    kept = sorted(zip(ds.image_ids[final["image"]].tolist(), np.round(final["score"], 2).tolist()))
    assert kept == [(102, 0.6), (103, 0.28), (103, 0.29), (103, 0.3), (105, 0.5)]   # one per place, 3 per image
    proposals = _kind(tables, "missing_box")
    seen_twice, final_only = add_final_sightings(ds, proposals, final)
    assert len(seen_twice) == len(proposals)
    np.testing.assert_allclose(seen_twice["score"], (proposals["score"].to_numpy() + 0.5) / 2)
    assert "after training the detector scores it 0.50" in seen_twice["evidence"].iat[0]
    assert sorted(final_only["image_id"].tolist()) == [102, 103, 103, 103]
    np.testing.assert_allclose(sorted(final_only["score"]), sorted([0.3, 0.15, 0.145, 0.14]))
    path.write_text(json.dumps([{"image_id": 999, "category_id": CAT, "bbox": [0, 0, 5, 5], "score": 0.5}]))
    with pytest.raises(ValueError, match=r"detections\.json: record 0 names image_id 999"):
        read_detections(path, ds)
    # the cross-fit's objectness joins each place by image and box, whatever the order, and makes every place
    # listable, scored by the objectness with the detector's score as a small second term; a place the fold models
    # did not judge reads objectness 0
    from detdiff.analysis.self_check import PLACE_DETECTOR_WEIGHT, judged_places, place_objectness
    from detdiff.crossfit.folds import CrossFitResult
    everything = pd.concat([seen_twice, final_only], ignore_index=True)
    boxes = everything[["suggested_x", "suggested_y", "suggested_w", "suggested_h"]].to_numpy(np.float64)
    judged = np.arange(len(everything))[::-1][:-1]                      # reversed, the first place left out
    object_p = np.linspace(0.1, 0.9, len(everything))
    empty = np.zeros(0)
    prediction = CrossFitResult(empty, empty, empty, empty, empty, empty, 0.0,
                                everything["image_index"].to_numpy()[judged], boxes[judged], object_p[judged])
    expected = np.r_[np.nan, object_p[1:]]
    np.testing.assert_array_equal(place_objectness(everything, prediction), expected)
    covering = np.arange(ds.num_annotations)
    listable, image_only = judged_places(ds, seen_twice, final_only, prediction, covering, 0.3)
    assert image_only is None and len(listable) == len(everything)
    w = PLACE_DETECTOR_WEIGHT
    np.testing.assert_allclose(listable["score"], (np.nan_to_num(expected) + w * everything["score"]) / (1 + w))
    assert listable["evidence"].str.contains("sees an object there with probability").all()
    assert "detection of the trained detector matching no annotation" in listable["evidence"].iat[-1]
    # the class to add is the crop model's where it judged the place (its own category id, non-contiguous), the
    # detector's where it did not (the first place); the evidence names it
    num_classes = ds.num_classes
    probs = np.full((len(judged), num_classes), 0.1 / max(num_classes - 1, 1))
    probs[:, num_classes - 1] = 0.9
    prediction.place_probs = probs
    classed, _ = judged_places(ds, seen_twice, final_only, prediction, covering, 0.3)
    assert (classed["suggested_category_id"].iloc[1:] == ds.category_ids[-1]).all()
    assert classed["suggested_category_id"].iat[0] == everything["suggested_category_id"].iat[0]
    assert classed["evidence"].iloc[1:].str.contains(f"most like a '{ds.category_names[-1]}' \\(0.90\\)").all()
    np.testing.assert_allclose(classed["score"], listable["score"])        # the class does not change the ranking


def test_refined_places_take_the_crop_models_box_and_drop_annotated_and_duplicate_places() -> None:
    # The crop model's box replaces a place's detector box (clipped to the image); a place whose box now lies on an
    # annotation (IoU >= 0.3, the rule that made it unannotated) is dropped, and places that now overlap at IoU >= 0.5
    # in one image keep the highest-scored: the kept set of torchvision.ops.batched_nms (groups = images).
    from torchvision.ops import batched_nms

    from detdiff.analysis.self_check import PLACE_DUPLICATE_IOU, refine_places

    ds = build_dataset(_coco())
    cols = ["suggested_x", "suggested_y", "suggested_w", "suggested_h"]
    places = pd.DataFrame({"image_index": [0, 0, 0, 0, 1, 1], "score": [0.9, 0.8, 0.7, 0.6, 0.5, 0.4],
                           "suggested_x": 100.0, "suggested_y": 100.0, "suggested_w": 20.0, "suggested_h": 20.0,
                           "x": 100.0, "y": 100.0, "w": 20.0, "h": 20.0, "evidence": "seen"})
    annotated = ds.boxes[0]                                  # image 0's first annotation, xywh
    refined = np.array([[150.0, 120.0, 30.0, 30.0],          # free: kept as drawn
                        annotated,                           # on an annotation: dropped
                        [151.0, 121.0, 30.0, 30.0],          # a duplicate of the first, lower score: dropped
                        [np.nan] * 4,                        # not judged: keeps its detector box
                        [190.0, 150.0, 30.0, 30.0],          # runs past the 200x160 image: clipped
                        [60.0, 100.0, 20.0, 20.0]])          # another image: never suppressed by image 0's places
    out = refine_places(ds, places, refined, np.arange(ds.num_annotations), 0.3)
    boxes = out[cols].to_numpy()
    np.testing.assert_allclose(boxes[0], [150, 120, 30, 30])
    np.testing.assert_allclose(boxes[1], [100, 100, 20, 20])
    np.testing.assert_allclose(boxes[2], [190, 150, 10, 10])
    np.testing.assert_allclose(out[["x", "y", "w", "h"]].to_numpy(), boxes)        # what the lists show
    assert out["evidence"].tolist() == ["seen; it draws the object at [150, 120, 30, 30]", "seen",
                                        "seen; it draws the object at [190, 150, 10, 10]",
                                        "seen; it draws the object at [60, 100, 20, 20]"]
    assert out["score"].tolist() == [0.9, 0.6, 0.5, 0.4]
    # the same kept set from torchvision's batched_nms over the places that are not on an annotation
    free = places.drop(index=1)
    drawn = np.where(np.isfinite(refined).all(axis=1)[:, None], refined, places[cols].to_numpy())[[0, 2, 3, 4, 5]]
    drawn[3] = [190, 150, 10, 10]
    xyxy = box_convert(torch.from_numpy(drawn), "xywh", "xyxy")
    keep = batched_nms(xyxy, torch.tensor(free["score"].to_numpy()), torch.tensor(free["image_index"].to_numpy()),
                       PLACE_DUPLICATE_IOU)
    assert sorted(free["score"].to_numpy()[keep.numpy()].tolist(), reverse=True) == out["score"].tolist()
    # the annotated place lay on the annotation: its IoU with it is at least 0.3 (torchvision.ops.box_iou)
    assert float(box_iou(box_convert(torch.from_numpy(annotated[None]), "xywh", "xyxy"),
                         box_convert(torch.from_numpy(refined[1:2]), "xywh", "xyxy"))) >= 0.3
