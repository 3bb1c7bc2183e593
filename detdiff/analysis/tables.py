"""The analysis of one run folder as tables: images, objects, suspects, classes, causes (+ review.json).

:func:`analyze_run` reads the training log (and the cache's pixel descriptors and pooled object features
when present) and returns :class:`AnalysisTables`; :func:`write_tables` writes ``images.csv``,
``objects.csv``, ``suspects.csv``, ``classes.csv``, ``causes.csv`` and ``review.json`` into the run folder,
plus a Parquet copy of the two large tables (``images.parquet``, ``objects.parquet``) when pyarrow is installed
(``pip install detdiff[parquet]``): at 860k objects the Python API reads it about 3x faster than the CSV, and a
few columns of it 30x faster (tests/benchmarks/bench_analysis_scale.py).
Columns are those of DEVELOPERS.md "Run folder" (first, in that order) plus a few extra ones. Category
ids are the real COCO ids (``dataset.category_ids[label]``).
"""

from __future__ import annotations

import importlib.util
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from detdiff.atomic import write_json_atomic
from detdiff.analysis import accumulate, causes, descriptors, dynamics, self_check, suspects
from detdiff.crossfit.folds import load_predictions
from detdiff.data.coco import CocoDataset
from detdiff.data.probes import PROBES_FILE, read_missing_probes
from detdiff.train.loss_log import LossLog

IMAGE_COLUMNS = ["image_id", "file_name", "width", "height", "usable", "loc_score", "pos_score", "neg_score",
                 "loc_pct", "pos_pct", "neg_pct", "box_count", "crowding", "blur_laplacian_var", "brightness",
                 "contrast", "clutter_edge_density", "resolution", "why"]
OBJECT_COLUMNS = ["annotation_id", "image_id", "category_id", "category_name", "x", "y", "w", "h", "loc_score",
                  "pos_score", "loc_pct", "pos_pct", "loc_z", "pos_z", "first_learned", "forgetting_events",
                  "never_learned", "confidence", "variability", "correctness", "region", "aum", "area",
                  "size_bin", "rel_size", "aspect", "max_iou", "occlusion", "truncation", "class_freq",
                  "feature_dist", "map_x", "map_y", "why", "other_class_lead", "box_disagreement"]
CLASS_COLUMNS = ["category_id", "category_name", "images", "objects", "median_loc_score", "median_pos_score",
                 "suspects", "suspect_share"]
CSV_DECIMALS = 6
ROUNDED_TABLES = ("images", "objects")   # causes keeps full precision (p-values far below 1e-6)
TABLE_FILES = {"images": "images.csv", "objects": "objects.csv", "suspects": "suspects.csv",
               "classes": "classes.csv", "causes": "causes.csv"}
SELF_CHECK_FILE = "self_check.json"
#: Tables also written as Parquet (same rows, columns and rounding as the CSV) when pyarrow is installed.
PARQUET_TABLES = ("images", "objects")


def parquet_available() -> bool:
    """Whether pandas can write Parquet here (pyarrow installed)."""
    return importlib.util.find_spec("pyarrow") is not None


@dataclass
class AnalysisTables:
    """One DataFrame per CSV of the run folder; ``images`` / ``objects`` rows follow the dataset's order."""

    images: pd.DataFrame
    objects: pd.DataFrame
    suspects: pd.DataFrame
    classes: pd.DataFrame
    causes: pd.DataFrame
    self_check: dict = field(default_factory=dict)


def _ordered(frame: pd.DataFrame, contract: list[str]) -> pd.DataFrame:
    """Contract columns first, in contract order, then the extra ones."""
    return frame[contract + [c for c in frame.columns if c not in contract]]


def _feature_descriptors(path: Path, dataset: CocoDataset) -> pd.DataFrame:
    """feature_dist / map_x / map_y from ``object_features.npy`` when the run saved one (NaN otherwise)."""
    features = np.load(path, mmap_mode="r") if path.exists() else None
    try:
        return descriptors.feature_descriptors(features, dataset)
    except ValueError as exc:
        raise ValueError(f"{path}: {exc}") from exc


def class_table(dataset: CocoDataset, objects: pd.DataFrame, suspect_rows: pd.DataFrame) -> pd.DataFrame:
    """classes.csv: per class the images and non-crowd objects, median scores and suspects (counted by the
    class a suspect concerns: its annotation's, or the proposed one for a missing box)."""
    counted = ~dataset.iscrowd
    labels = dataset.labels[counted]
    num_classes = dataset.num_classes
    objects_per_class = np.bincount(labels, minlength=num_classes)
    pairs = np.unique(dataset.labels[counted] * dataset.num_images + dataset.ann_image_index[counted])
    images_per_class = np.bincount(pairs // dataset.num_images, minlength=num_classes)
    scored = objects.loc[counted, ["loc_score", "pos_score"]].assign(label=labels)
    medians = scored.groupby("label").median().reindex(range(num_classes))
    label_of_id = pd.Series(np.arange(num_classes), index=dataset.category_ids)
    suspect_labels = label_of_id.reindex(suspect_rows["category_id"]).to_numpy() if len(suspect_rows) else []
    suspect_counts = np.bincount(np.asarray(suspect_labels, dtype=np.int64), minlength=num_classes)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(objects_per_class > 0, suspect_counts / np.maximum(objects_per_class, 1), np.nan)
    return pd.DataFrame({
        "category_id": dataset.category_ids, "category_name": dataset.category_names,
        "images": images_per_class, "objects": objects_per_class,
        "median_loc_score": medians["loc_score"].to_numpy(), "median_pos_score": medians["pos_score"].to_numpy(),
        "suspects": suspect_counts, "suspect_share": share,
    })


def analyze_run(rundir: str | Path, dataset: CocoDataset, config: dict) -> AnalysisTables:
    """Every analysis table of a run folder (see module docstring).

    Reads ``rundir/log`` (required), ``rundir/cache/meta.npz`` (pixel descriptors; NaN when absent) and
    ``rundir/object_features.npy`` (``[A, D]`` pooled features; NaN columns when absent).
    """
    rundir = Path(rundir)
    cfg = config["analysis"]
    log = LossLog.open(rundir / "log")
    img_scores = accumulate.image_scores(log, mined_background=config["loss"]["classification"] == "hard_negative")
    obj_scores = accumulate.object_scores(log, dataset.labels, dataset.num_classes)
    if len(img_scores) != dataset.num_images or len(obj_scores) != dataset.num_annotations:
        raise ValueError(f"{rundir / 'log'}: the log has {len(img_scores)} images and {len(obj_scores)} objects, "
                         f"the dataset {dataset.num_images} and {dataset.num_annotations}: not this dataset's run")
    learning = dynamics.learning_dynamics(log)
    late = suspects.late_log(log, float(cfg["late_fraction"]))
    trained = late.object_field("num_anchors") >= 0
    learning["other_class_lead"] = dynamics.other_class_lead(late.object_field("logit_label"),
                                                             late.object_field("logit_other"), trained)
    learning["box_disagreement"] = dynamics.box_disagreement(late.object_field("pred_iou"), trained)
    overlap = descriptors.pairwise_overlap(dataset)
    obj_desc = descriptors.object_descriptors(dataset, overlap)
    obj_desc = pd.concat([obj_desc, _feature_descriptors(rundir / "object_features.npy", dataset)], axis=1)
    pixel, usable = descriptors.read_pixel_descriptors(rundir / "cache" / "meta.npz", dataset.num_images)
    img_desc = descriptors.image_descriptors(dataset, overlap.occlusion, pixel)
    if usable is None:
        usable = img_scores["epochs_covered"].to_numpy() > 0
    found = causes.find_causes(img_scores, img_desc, obj_scores, obj_desc, top_fraction=float(cfg["top_fraction"]),
                               scored_objects=~dataset.iscrowd)

    images = pd.concat([pd.DataFrame({"image_id": dataset.image_ids, "file_name": dataset.file_names,
                                      "width": dataset.widths, "height": dataset.heights, "usable": usable}),
                        img_scores, img_desc], axis=1)
    images["why"] = found.image_why
    labels = dataset.labels
    objects = pd.concat([pd.DataFrame({
        "annotation_id": dataset.ann_ids, "image_id": dataset.image_ids[dataset.ann_image_index],
        "category_id": dataset.category_ids[labels],
        "category_name": np.asarray(dataset.category_names, dtype=object)[labels],
        "x": dataset.boxes[:, 0], "y": dataset.boxes[:, 1], "w": dataset.boxes[:, 2], "h": dataset.boxes[:, 3],
        "iscrowd": dataset.iscrowd}), obj_scores, learning, obj_desc], axis=1)
    objects["why"] = found.object_why
    prediction = load_predictions(rundir)
    if prediction is None:                # no cross-fitted evidence (crossfit off): the in-sample suspects
        suspect_rows, checks = suspects.find_suspects(dataset, log, obj_scores, overlap, cfg), {}
    else:
        missing_rows = read_missing_probes(rundir / PROBES_FILE, dataset)
        objects["probe"] = np.isin(np.arange(dataset.num_annotations), missing_rows)
        scorable = ~dataset.iscrowd & usable[dataset.ann_image_index]
        evidence, wrong_cal, loose_cal = self_check.object_evidence(dataset, prediction, scorable,
                                                                    int(config["train"]["seed"]))
        objects = pd.concat([objects, evidence], axis=1)
        proposals, final_only = self_check.judged_places(
            dataset, *suspects.unannotated_places(dataset, rundir, missing_rows, config), prediction,
            suspects.covering_rows(dataset, missing_rows), float(config["log"]["unmatched_max_iou"]))
        kept, image_evidence, proposal_cal, image_cal = self_check.missing_box_evidence(
            dataset, proposals, missing_rows, usable, image_only=final_only)
        images = pd.concat([images, image_evidence], axis=1)
        level = float(cfg["suspect_level"])
        lists = {"wrong_class": suspects.calibrated_wrong_class_suspects(dataset, evidence, level),
                 "loose_box": suspects.calibrated_loose_box_suspects(dataset, evidence, level),
                 "missing_box": suspects.calibrated_missing_box_suspects(kept, level)}
        suspect_rows = suspects.sort_suspects(
            [*lists.values(), suspects.duplicate_box_suspects(dataset, overlap, min_iou=float(cfg["duplicate_iou"]))],
            dataset)
        counts = {"wrong_class": int(np.isfinite(evidence["wrong_class_score"]).sum()),
                  "loose_box": int(np.isfinite(evidence["loose_box_score"]).sum()), "missing_box": len(kept)}
        cals = {"wrong_class": wrong_cal, "loose_box": loose_cal, "missing_box": proposal_cal}
        checks = {kind: self_check.summary(kind, cals[kind], items=counts[kind],
                                           listed_p=lists[kind]["p_fault"].to_numpy(dtype=np.float64), level=level)
                  for kind in self_check.FAULT_KINDS}
        checks["missing_box"]["probe_proposals"] = checks["missing_box"]["probes"]
        checks["missing_box"]["probes"] = int(len(missing_rows))
        if image_cal is not None:
            checks["missing_box"] |= self_check.image_auroc_fields(image_cal, checks["missing_box"].get("auroc"))
        checks["crossfit_seconds"] = round(float(prediction.seconds), 1)
    return AnalysisTables(
        images=_ordered(images, IMAGE_COLUMNS), objects=_ordered(objects, OBJECT_COLUMNS),
        suspects=_ordered(suspect_rows, suspects.SUSPECT_COLUMNS),
        classes=class_table(dataset, objects, suspect_rows), causes=found.table, self_check=checks)


def review_coco(tables: AnalysisTables, dataset: CocoDataset) -> dict:
    """A COCO dict of the suspect images with all their annotations plus one extra annotation per
    suggested fix (``"suggestion": true``, ``suggestion_kind``, ``suggested_for`` = annotation id or null,
    ``suggested_action``, a fresh id above every dataset id). Original annotations carry
    ``"suggestion": false``. pycocotools' ``COCO`` loads it."""
    sus = tables.suspects
    image_rows = np.unique(sus["image_index"].to_numpy(dtype=np.int64))
    ann_rows = np.flatnonzero(np.isin(dataset.ann_image_index, image_rows))
    categories = [{"id": int(c), "name": n, "supercategory": s}
                  for c, n, s in zip(dataset.category_ids, dataset.category_names, dataset.supercategories)]
    images = [{"id": int(dataset.image_ids[i]), "file_name": dataset.file_names[i],
               "width": int(dataset.widths[i]), "height": int(dataset.heights[i])} for i in image_rows]
    annotations = [{"id": int(dataset.ann_ids[j]), "image_id": int(dataset.image_ids[dataset.ann_image_index[j]]),
                    "category_id": int(dataset.category_ids[dataset.labels[j]]),
                    "bbox": [float(v) for v in dataset.boxes[j]], "area": float(dataset.areas[j]),
                    "iscrowd": int(dataset.iscrowd[j]), "suggestion": False} for j in ann_rows]
    next_id = int(dataset.ann_ids.max()) + 1 if dataset.num_annotations else 1
    for k, rec in enumerate(sus.itertuples(index=False)):
        own = (rec.x, rec.y, rec.w, rec.h)
        suggested = (rec.suggested_x, rec.suggested_y, rec.suggested_w, rec.suggested_h)
        bbox = [float(v) for v in (suggested if np.isfinite(suggested).all() else own)]
        category = rec.suggested_category_id if not pd.isna(rec.suggested_category_id) else rec.category_id
        annotations.append({
            "id": next_id + k, "image_id": int(rec.image_id), "category_id": int(category), "bbox": bbox,
            "area": bbox[2] * bbox[3], "iscrowd": 0, "suggestion": True, "suggestion_kind": rec.kind,
            "suggested_for": None if pd.isna(rec.annotation_id) else int(rec.annotation_id),
            "suggested_action": rec.suggested_action, "score": float(rec.score), "evidence": rec.evidence,
        })
    return {"info": {"description": "detdiff review: suspect images, their annotations and suggested fixes"},
            "images": images, "annotations": annotations, "categories": categories}


def write_tables(tables: AnalysisTables, rundir: str | Path, dataset: CocoDataset) -> dict[str, Path]:
    """Write the five CSVs, their Parquet copies (:data:`PARQUET_TABLES`, when pyarrow is installed) and
    ``review.json`` into ``rundir``; returns name -> path. A Parquet copy that cannot be rewritten is removed."""
    rundir = Path(rundir)
    rundir.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    for name, file_name in TABLE_FILES.items():
        path = rundir / file_name
        frame = getattr(tables, name)
        if name in ROUNDED_TABLES:      # 6 decimals: shorter numbers write about twice as fast at 860k rows
            frame = frame.round(CSV_DECIMALS)
        parquet = path.with_suffix(".parquet")
        parquet.unlink(missing_ok=True)                # never a copy older than its CSV
        tmp = path.with_name(path.name + ".tmp")       # write, then rename: never half a table on disk
        frame.to_csv(tmp, index=False)
        tmp.replace(path)
        written[name] = path
        if name in PARQUET_TABLES and parquet_available():
            tmp = parquet.with_name(parquet.name + ".tmp")
            frame.to_parquet(tmp, index=False)
            tmp.replace(parquet)
            written[f"{name}_parquet"] = parquet
    path = rundir / "review.json"
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(review_coco(tables, dataset)))
    tmp.replace(path)
    written["review"] = path
    if tables.self_check:
        written["self_check"] = write_json_atomic(rundir / SELF_CHECK_FILE, tables.self_check)
    return written
