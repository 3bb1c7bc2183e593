"""A small fake run folder for the report tests, built from scratch (no training, no pipeline).

It holds every file ``detdiff audit`` writes that the report reads (DEVELOPERS.md "Run folder"): tiny PNG
images drawn with OpenCV, the analysis CSVs with their contract columns, metrics/findings/run/detections
JSON, and a 3-epoch training log written with :class:`detdiff.train.loss_log.LossLogWriter`. Scores in the
CSVs are the log's per-image / per-object losses summed over epochs, so the two agree.

Hostile strings on purpose: a category named ``<script>alert(1)</script>``, an image file name with quotes
and ``<``, a lint message with markup, and one listed image whose file is missing.
"""

from __future__ import annotations

import json
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

from detdiff.train.loss_log import LossLogWriter

HOSTILE_CATEGORY = "<script>alert(1)</script>"
HOSTILE_FILE_NAME = "shelf \"a\" 'b' <c>.png"
CATEGORIES = [(1, "can", "container"), (2, "tape_roll", "supply"), (7, HOSTILE_CATEGORY, "<b>bold</b>")]
IMAGE_SIDE = (96, 72)  # width, height of every fixture image, px


def _percentile_rank(values: np.ndarray) -> np.ndarray:
    """0-100 rank of each finite value within its array (NaN stays NaN); float64 [n]."""
    out = np.full(len(values), np.nan)
    finite = np.isfinite(values)
    if finite.sum():
        ranks = pd.Series(values[finite]).rank(pct=True).to_numpy()
        out[finite] = 100.0 * ranks
    return out


def make_run_folder(root: str | Path, *, num_images: int = 10, epochs: int = 3, seed: int = 0) -> Path:
    """Build ``root/run`` (the RUNDIR) and ``root/images`` (its images_dir); return the RUNDIR.

    Image 0 uses :data:`HOSTILE_FILE_NAME`, image 1 sits in a sub-folder, and the last image is listed but
    has no file on disk (unusable, no scores).
    """
    root = Path(root)
    rng = np.random.default_rng(seed)
    images_dir = root / "images"
    rundir = root / "run"
    (images_dir / "sub").mkdir(parents=True, exist_ok=True)
    rundir.mkdir(parents=True, exist_ok=True)
    width, height = IMAGE_SIDE

    file_names = [HOSTILE_FILE_NAME, "sub/second.png"] + [f"img_{k:03d}.png" for k in range(2, num_images)]
    image_ids = np.arange(100, 100 + num_images, dtype=np.int64)
    usable = np.ones(num_images, dtype=bool)
    usable[-1] = False

    # Annotations: 1-4 boxes per image, image-major order (the dataset order of objects.csv).
    boxes_per_image = rng.integers(1, 5, size=num_images)
    boxes_per_image[0] = 4
    ann_image_index = np.repeat(np.arange(num_images), boxes_per_image)
    num_objects = len(ann_image_index)
    sides = rng.uniform(12, 30, size=(num_objects, 2))
    corners = rng.uniform(0, 1, size=(num_objects, 2)) * (np.array([width, height]) - sides)
    boxes = np.round(np.concatenate([corners, sides], axis=1), 1)          # xywh [A, 4]
    category_rows = rng.integers(0, len(CATEGORIES), size=num_objects)
    category_rows[:3] = [0, 1, 2]
    category_ids = np.array([c[0] for c in CATEGORIES])[category_rows]
    category_names = np.array([c[1] for c in CATEGORIES], dtype=object)[category_rows]
    annotation_ids = np.arange(1, num_objects + 1, dtype=np.int64)

    colours = np.array([[60, 60, 70], [150, 170, 185], [30, 90, 120]], dtype=np.uint8)   # BGR greys / brown
    for i, name in enumerate(file_names[:-1]):
        canvas = np.full((height, width, 3), 200, np.uint8)
        canvas[:, :, 0] = np.linspace(120, 220, width, dtype=np.uint8)[None, :]
        for j in np.flatnonzero(ann_image_index == i):
            x, y, w, h = boxes[j].astype(int)
            canvas[y:y + h, x:x + w] = colours[category_rows[j]]
        assert cv2.imwrite(str(images_dir / name), canvas), name

    # Training log: three epochs, losses shrink with the epoch except for a few stubborn items.
    writer = LossLogWriter(rundir / "log", num_images, num_objects)
    trained = np.flatnonzero(usable)
    trained_objects = np.flatnonzero(usable[ann_image_index])
    base_image = rng.gamma(2.0, 1.0, size=(num_images, 3))
    base_object = rng.gamma(2.0, 1.0, size=(num_objects, 2))
    for epoch in range(epochs):
        decay = 1.0 / (1.0 + epoch)
        num_pos = (boxes_per_image * 3).astype(np.int32)
        image_streams = base_image * decay * num_pos[:, None]
        object_streams = base_object * decay
        writer.reset(epoch)
        writer.process(
            trained,
            {"loc_sum": image_streams[trained, 0].astype(np.float32),
             "pos_sum": image_streams[trained, 1].astype(np.float32),
             "neg_sum": image_streams[trained, 2].astype(np.float32),
             "num_pos": num_pos[trained]},
            trained_objects,
            {"loc_sum": object_streams[trained_objects, 0].astype(np.float32),
             "cls_sum": object_streams[trained_objects, 1].astype(np.float32),
             "num_anchors": np.full(len(trained_objects), 3, np.int32),
             "loc_kept": object_streams[trained_objects, 0].astype(np.float32),
             "cls_kept": object_streams[trained_objects, 1].astype(np.float32),
             "logit_label": rng.normal(1, 1, len(trained_objects)).astype(np.float32),
             "logit_other": rng.normal(0, 1, len(trained_objects)).astype(np.float32),
             "other_label": rng.integers(0, len(CATEGORIES), len(trained_objects)).astype(np.int32),
             "pred_box": (boxes[trained_objects] + rng.normal(0, 2, (len(trained_objects), 4))).astype(np.float32),
             "pred_iou": rng.uniform(0.3, 0.95, len(trained_objects)).astype(np.float32),
             "pred_label": category_rows[trained_objects].astype(np.int32),
             "pred_score": rng.uniform(0.2, 0.9, len(trained_objects)).astype(np.float32),
             "detected": rng.uniform(size=len(trained_objects)) > 0.4})
        writer.finalize()

    # Scores = per-image losses normalised by positives, summed over epochs (higher = harder).
    decay_sum = sum(1.0 / (1.0 + e) for e in range(epochs))
    image_scores = np.where(usable[:, None], base_image * decay_sum * 3 * boxes_per_image[:, None]
                            / np.maximum(1, 3 * boxes_per_image[:, None]), np.nan)
    object_scores = np.where(usable[ann_image_index, None], base_object * decay_sum, np.nan)

    images = pd.DataFrame({
        "image_id": image_ids, "file_name": file_names, "width": width, "height": height, "usable": usable,
        "loc_score": image_scores[:, 0], "pos_score": image_scores[:, 1], "neg_score": image_scores[:, 2],
        "loc_pct": _percentile_rank(image_scores[:, 0]), "pos_pct": _percentile_rank(image_scores[:, 1]),
        "neg_pct": _percentile_rank(image_scores[:, 2]), "box_count": boxes_per_image,
        "crowding": rng.uniform(0, 1, num_images), "blur_laplacian_var": rng.uniform(50, 900, num_images),
        "brightness": rng.uniform(80, 200, num_images), "contrast": rng.uniform(20, 70, num_images),
        "clutter_edge_density": rng.uniform(0, 0.2, num_images), "resolution": width * height,
        "why": np.where(boxes_per_image >= 3, "crowded;cluttered", "dark"),
    })
    images.loc[~usable, "why"] = ""
    # the strongest unannotated place per image (images 2 and 3 only), as the analysis writes it
    images["missing_box_score"] = np.where(usable, 0.0, np.nan)
    images.loc[[2, 3], "missing_box_score"] = [0.4, 0.7]
    for column, values in zip(("x", "y", "w", "h"), ([5.0, 40.0], [6.0, 30.0], [14.0, 20.0], [12.0, 16.0])):
        images[f"missing_box_{column}"] = np.nan
        images.loc[[2, 3], f"missing_box_{column}"] = values
    images["missing_box_category_id"] = pd.array([pd.NA] * num_images, dtype="Int64")
    images.loc[3, "missing_box_category_id"] = CATEGORIES[1][0]
    images.to_csv(rundir / "images.csv", index=False)

    map_xy = rng.normal(0, 1, (num_objects, 2))
    objects = pd.DataFrame({
        "annotation_id": annotation_ids, "image_id": image_ids[ann_image_index], "category_id": category_ids,
        "category_name": category_names, "x": boxes[:, 0], "y": boxes[:, 1], "w": boxes[:, 2], "h": boxes[:, 3],
        "loc_score": object_scores[:, 0], "pos_score": object_scores[:, 1],
        "loc_pct": _percentile_rank(object_scores[:, 0]), "pos_pct": _percentile_rank(object_scores[:, 1]),
        "loc_z": rng.normal(0, 1, num_objects), "pos_z": rng.normal(0, 1, num_objects),
        "first_learned": rng.integers(-1, epochs, num_objects), "forgetting_events": rng.integers(0, 2, num_objects),
        "never_learned": rng.uniform(size=num_objects) > 0.8, "confidence": rng.uniform(0, 1, num_objects),
        "variability": rng.uniform(0, 0.3, num_objects), "correctness": rng.uniform(0, 1, num_objects),
        "region": rng.choice(["easy", "ambiguous", "hard"], num_objects), "aum": rng.normal(0, 1, num_objects),
        "area": boxes[:, 2] * boxes[:, 3], "size_bin": "small", "rel_size": rng.uniform(0, 0.2, num_objects),
        "aspect": boxes[:, 3] / boxes[:, 2], "max_iou": rng.uniform(0, 0.5, num_objects),
        "occlusion": rng.uniform(0, 0.5, num_objects), "truncation": rng.uniform(0, 0.3, num_objects),
        "class_freq": rng.uniform(0.1, 0.6, num_objects), "feature_dist": rng.uniform(0, 3, num_objects),
        "map_x": map_xy[:, 0], "map_y": map_xy[:, 1],
        "why": rng.choice(["small;occluded", "rare_class", ""], num_objects),
    })
    objects.to_csv(rundir / "objects.csv", index=False)

    suspects = pd.DataFrame([
        # wrong_class: the annotation of the hostile category, suggested 'can'
        {"kind": "wrong_class", "image_id": image_ids[0], "annotation_id": 3, **dict(zip("xywh", boxes[2])),
         "suggested_category_id": 1, "score": 0.91,
         "evidence": f"detector says 'can' in 3/3 late epochs; labelled {HOSTILE_CATEGORY}"},
        {"kind": "wrong_class", "image_id": image_ids[0], "annotation_id": 2, **dict(zip("xywh", boxes[1])),
         "suggested_category_id": 1, "score": 0.55, "evidence": "detector says 'can' in 2/3 late epochs"},
        {"kind": "missing_box", "image_id": image_ids[1], "annotation_id": np.nan,
         "x": np.nan, "y": np.nan, "w": np.nan, "h": np.nan, "suggested_category_id": 2,
         "suggested_x": 5.0, "suggested_y": 6.0, "suggested_w": 20.0, "suggested_h": 18.0, "score": 0.8,
         "evidence": "confident detection (0.80) with IoU < 0.3 to every box in 3/3 late epochs"},
        {"kind": "loose_box", "image_id": image_ids[2], "annotation_id": int(annotation_ids[ann_image_index == 2][0]),
         **dict(zip("xywh", boxes[ann_image_index == 2][0])), "suggested_category_id": np.nan,
         **dict(zip(["suggested_x", "suggested_y", "suggested_w", "suggested_h"],
                    boxes[ann_image_index == 2][0] + [2, 2, -4, -4])),
         "score": 0.6, "evidence": "predicted box IoU 0.71 with the label, stable over late epochs"},
        {"kind": "duplicate_box", "image_id": image_ids[0], "annotation_id": 4, **dict(zip("xywh", boxes[3])),
         "suggested_category_id": np.nan, "score": 0.95, "evidence": "IoU 0.96 with annotation 1, same class"},
    ])
    for column in ["suggested_x", "suggested_y", "suggested_w", "suggested_h"]:
        if column not in suspects:
            suspects[column] = np.nan
    suspects = suspects[["kind", "image_id", "annotation_id", "x", "y", "w", "h", "suggested_category_id",
                         "suggested_x", "suggested_y", "suggested_w", "suggested_h", "score", "evidence"]]
    suspects.to_csv(rundir / "suspects.csv", index=False)

    classes = pd.DataFrame({
        "category_id": [c[0] for c in CATEGORIES], "category_name": [c[1] for c in CATEGORIES],
        "images": [(objects.groupby("category_id")["image_id"].nunique()).get(c[0], 0) for c in CATEGORIES],
        "objects": [int((category_ids == c[0]).sum()) for c in CATEGORIES],
        "median_loc_score": [objects.loc[objects.category_id == c[0], "loc_score"].median() for c in CATEGORIES],
        "median_pos_score": [objects.loc[objects.category_id == c[0], "pos_score"].median() for c in CATEGORIES],
        "suspects": [2, 1, 1], "suspect_share": [0.2, 0.1, 0.25],
    })
    classes.to_csv(rundir / "classes.csv", index=False)

    cause_rows = []
    for stream, level in [("loc", "image"), ("pos", "object"), ("neg", "image")]:
        cause_rows += [
            {"stream": stream, "level": level, "descriptor": "box_count" if level == "image" else "rel_size",
             "test": "spearman", "bin": "", "effect": 0.42, "ci_low": 0.2, "ci_high": 0.6, "p_value": 0.001,
             "q_value": 0.004, "significant": True, "n": num_images, "top_rate": np.nan, "base_rate": np.nan},
            {"stream": stream, "level": level, "descriptor": "box_count" if level == "image" else "area",
             "test": "lift", "bin": ">= 12 boxes" if level == "image" else "small", "effect": 3.4, "ci_low": 1.6,
             "ci_high": 6.1, "p_value": 0.002, "q_value": 0.006, "significant": True, "n": num_images,
             "top_rate": 0.31, "base_rate": 0.09},
            {"stream": stream, "level": level, "descriptor": "brightness", "test": "lift", "bin": "96.5 to < 130",
             "effect": 1.3, "ci_low": 0.7, "ci_high": 2.2, "p_value": 0.3, "q_value": 0.4, "significant": False,
             "n": num_images, "top_rate": 0.2, "base_rate": 0.15},
            {"stream": stream, "level": level, "descriptor": "contrast", "test": "spearman", "bin": "",
             "effect": -0.1, "ci_low": -0.4, "ci_high": 0.2, "p_value": 0.5, "q_value": 0.6, "significant": False,
             "n": num_images, "top_rate": np.nan, "base_rate": np.nan},
        ]
    # a binary descriptor (Mann-Whitney: effect = P(flagged scores higher)), labels as causes.py writes them
    cause_rows.append({"stream": "pos", "level": "object", "descriptor": "truncation", "test": "mannwhitney",
                       "bin": "at the border", "effect": 0.62, "ci_low": 0.55, "ci_high": 0.69, "p_value": 0.003,
                       "q_value": 0.008, "significant": True, "n": num_objects, "top_rate": np.nan,
                       "base_rate": np.nan})
    pd.DataFrame(cause_rows).to_csv(rundir / "causes.csv", index=False)

    (rundir / "metrics.json").write_text(json.dumps({
        "AP": 0.061, "AP50": 0.123, "AP75": 0.04, "AP_small": 0.05, "AP_medium": 0.08, "AP_large": -1.0,
        "AP50_small": 0.1, "AP50_medium": 0.15, "AP50_large": -1.0,
        "per_category": {str(c[0]): {"name": c[1], "AP": 0.05, "AP50": 0.12} for c in CATEGORIES},
        "trustworthy": False, "min_ap50": 0.2,
        "warning": "AP50 0.123 is below 0.2: the detector learned too little for its scores to mean much.",
    }))
    findings = [
        {"severity": "error", "code": "box_outside_image", "message": "box <x> leaves the image",
         "file": "annotations.json", "record": "annotations[4]", "record_id": 5, "field": "bbox"},
        {"severity": "warning", "code": "tiny_box", "message": "box smaller than 2 px",
         "file": "annotations.json", "record": "annotations[7]", "record_id": 8, "field": "bbox"},
        {"severity": "warning", "code": "tiny_box", "message": "box smaller than 2 px",
         "file": "annotations.json", "record": "annotations[9]", "record_id": 10, "field": "bbox"},
    ]
    # shaped like detdiff.data.lint's to_json: counts = what was checked, totals per severity, codes
    (rundir / "findings.json").write_text(json.dumps({
        "counts": {"images": num_images, "annotations": num_objects, "categories": len(CATEGORIES)},
        "totals": {"error": 1, "warning": 2, "info": 0},
        "codes": {"box_outside_image": {"severity": "error", "count": 1, "listed": 1},
                  "tiny_box": {"severity": "warning", "count": 2, "listed": 2}},
        "findings": findings}))
    (rundir / "run.json").write_text(json.dumps({
        "detdiff_version": "0.1.0", "annotations": str(root / "annotations.json"), "images_dir": str(images_dir),
        "num_images": num_images, "num_annotations": num_objects, "num_categories": len(CATEGORIES),
        "num_usable_images": int(usable.sum()),
        "unusable_images": [{"image_id": int(image_ids[-1]), "file_name": file_names[-1], "reason": "file not found"}],
        "config": {"data": {"image_size": 128}, "train": {"epochs": epochs, "batch_size": 4},
                   "log": {"detect_score": 0.3}, "analysis": {"top_fraction": 0.1}},
        "device": "cpu", "epochs_done": epochs, "train_seconds": 12.5, "images_per_second": 2.4,
    }))
    detections = []
    for j in trained_objects:
        box = boxes[j] + rng.normal(0, 1.5, 4)
        detections.append({"image_id": int(image_ids[ann_image_index[j]]), "category_id": int(category_ids[j]),
                           "bbox": [round(float(v), 2) for v in box],
                           "score": round(float(rng.uniform(0.35, 0.95)), 3)})
    detections.append({"image_id": int(image_ids[1]), "category_id": 2, "bbox": [5.0, 6.0, 20.0, 18.0], "score": 0.8})
    (rundir / "detections.json").write_text(json.dumps(detections))
    return rundir
