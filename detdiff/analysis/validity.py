"""Score an audit against planted truth (the demo's ``truth.json``): does it find what was planted?

Used by the validity benchmark and the end-to-end tests. Rankings are compared with baselines in the
same run: random scores, the image's box count, and the last epoch's loss instead of the accumulated one.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from sklearn.metrics import roc_auc_score
import torch
from torchvision.ops import box_iou

from detdiff.analysis.accumulate import object_epoch_loss
from detdiff.boxes import xywh_to_xyxy
from detdiff.train.loss_log import LossLog


def auroc(scores: np.ndarray, positive: np.ndarray) -> float:
    """Area under the ROC curve (scikit-learn); NaN scores count as the lowest."""
    scores = np.asarray(scores, dtype=np.float64)
    finite = np.isfinite(scores)
    scores = np.where(finite, scores, scores[finite].min() - 1.0 if finite.any() else 0.0)
    positive = np.asarray(positive, dtype=bool)
    if positive.all() or not positive.any():
        return float("nan")
    return float(roc_auc_score(positive, scores))


def _precision_recall_at_k(hits: np.ndarray, k: int, planted: int) -> tuple[float, float]:
    top = hits[:k]
    found = int(top.sum())
    return (found / k if k else float("nan"), found / planted if planted else float("nan"))


def score_against_truth(rundir: str | Path, truth_path: str | Path, seed: int = 0) -> dict:
    """AUROCs and precision/recall@k of the audit in ``rundir`` against ``truth.json``, with baselines."""
    rundir = Path(rundir)
    truth = json.loads(Path(truth_path).read_text())
    faults = pd.DataFrame(truth["faults"])
    objects = pd.read_csv(rundir / "objects.csv")
    images = pd.read_csv(rundir / "images.csv")
    suspects = pd.read_csv(rundir / "suspects.csv")
    rng = np.random.default_rng(seed)
    log = LossLog.open(rundir / "log")
    last_obj_cls, last_obj_loc = object_epoch_loss(log, "pos")[-1], object_epoch_loss(log, "loc")[-1]
    last_img_neg = log.image_field("neg_sum")[-1]
    box_count = images.set_index("image_id")["box_count"]

    def ids(kind: str, col: str = "annotation_id") -> set[int]:
        rows = faults[faults["kind"] == kind] if len(faults) else faults
        return set(int(v) for v in rows[col].dropna()) if len(rows) else set()

    faulty_ann = ids("wrong_class") | ids("loose_box") | ids("duplicate_box")
    out: dict[str, dict] = {}
    for kind, score_col, last in (("wrong_class", "pos_score", last_obj_cls), ("loose_box", "loc_score", last_obj_loc)):
        planted = ids(kind)
        mask = objects["annotation_id"].isin(planted) | ~objects["annotation_id"].isin(faulty_ann)
        sub = objects[mask]
        pos = sub["annotation_id"].isin(planted).to_numpy()
        out[kind] = {
            "planted": len(planted), "stream": score_col,
            "auroc": auroc(sub[score_col].to_numpy(), pos),
            "auroc_last_epoch": auroc(np.asarray(last)[mask.to_numpy()], pos),
            "auroc_box_count": auroc(box_count.reindex(sub["image_id"]).to_numpy(), pos),
            "auroc_random": auroc(rng.random(len(sub)), pos),
        }
    evidence_columns = {"wrong_class": "wrong_class_score", "loose_box": "loose_box_score"}
    for kind, column in evidence_columns.items():          # the cross-fitted evidence behind the lists
        if column in objects:
            planted = ids(kind)
            sub = objects[objects["annotation_id"].isin(planted) | ~objects["annotation_id"].isin(faulty_ann)]
            hits = sub["annotation_id"].isin(planted).to_numpy()
            out[kind]["auroc_evidence"] = auroc(sub[column].to_numpy(), hits)
            order = np.argsort(-np.nan_to_num(sub[column].to_numpy(np.float64), nan=-np.inf), kind="stable")
            # the evidence's own ranking, uncut: against the list's precision_at_k it shows what the cut costs
            out[kind]["precision_at_k_ranking"] = _precision_recall_at_k(hits[order], len(planted), len(planted))[0]
    if "class_freq" in objects:                            # class rarity alone: rarer = more suspicious
        planted = ids("wrong_class")
        sub = objects[objects["annotation_id"].isin(planted) | ~objects["annotation_id"].isin(faulty_ann)]
        out["wrong_class"]["auroc_rarity"] = auroc(-sub["class_freq"].to_numpy(),
                                                   sub["annotation_id"].isin(planted).to_numpy())
    if "other_class_lead" in objects:          # the ranking behind the wrong_class suspects, all objects
        planted = ids("wrong_class")
        mask = objects["annotation_id"].isin(planted) | ~objects["annotation_id"].isin(faulty_ann)
        sub = objects[mask]
        out["wrong_class"]["auroc_other_class_lead"] = auroc(sub["other_class_lead"].to_numpy(),
                                                             sub["annotation_id"].isin(planted).to_numpy())
    if "box_disagreement" in objects:          # late-epoch 1 - IoU(predicted box, annotation), all objects
        planted = ids("loose_box")
        sub = objects[objects["annotation_id"].isin(planted) | ~objects["annotation_id"].isin(faulty_ann)]
        out["loose_box"]["auroc_box_disagreement"] = auroc(sub["box_disagreement"].to_numpy(),
                                                           sub["annotation_id"].isin(planted).to_numpy())
    missing_images = ids("missing_box", "image_id")
    pos = images["image_id"].isin(missing_images).to_numpy()
    out["missing_box"] = {
        "planted": int((faults["kind"] == "missing_box").sum()) if len(faults) else 0, "stream": "neg_score",
        "auroc": auroc(images["neg_score"].to_numpy(), pos),
        "auroc_last_epoch": auroc(np.asarray(last_img_neg), pos),
        "auroc_box_count": auroc(images["box_count"].to_numpy(), pos),
        "auroc_random": auroc(rng.random(len(images)), pos),
    }
    if "missing_box_score" in images:
        out["missing_box"]["auroc_evidence"] = auroc(images["missing_box_score"].to_numpy(), pos)
    out["duplicate_box"] = {"planted": len(ids("duplicate_box"))}

    for kind in ("wrong_class", "loose_box", "duplicate_box", "missing_box"):
        ranked = suspects[suspects["kind"] == kind].sort_values("score", ascending=False)
        planted = out[kind]["planted"]
        if kind == "missing_box":
            truth_rows = faults[faults["kind"] == "missing_box"] if len(faults) else faults
            hits = np.zeros(len(ranked), dtype=bool)
            for i, (_, s) in enumerate(ranked.iterrows()):
                same = truth_rows[truth_rows["image_id"] == s["image_id"]]
                if len(same):
                    iou = box_iou(torch.from_numpy(xywh_to_xyxy([[s["x"], s["y"], s["w"], s["h"]]])),
                                  torch.from_numpy(xywh_to_xyxy(np.stack(same["bbox"].to_list()))))
                    hits[i] = bool((iou >= 0.5).any())
        else:
            hits = ranked["annotation_id"].isin(ids(kind)).to_numpy()
        p, r = _precision_recall_at_k(hits, planted, planted)
        out[kind].update({"suspects": len(ranked), "precision_at_k": p, "recall_at_k": r,
                          "list_precision": float(hits.mean()) if len(hits) else float("nan"),
                          "list_to_planted": len(ranked) / planted if planted else float("nan")})
        if kind == "wrong_class" and planted:
            correct = ranked.merge(faults[faults["kind"] == kind][["annotation_id", "true_category_id"]],
                                   on="annotation_id")
            agree = correct["suggested_category_id"] == correct["true_category_id"]
            out[kind]["suggestion_accuracy"] = float(agree.mean()) if len(correct) else float("nan")
    check_path = rundir / "self_check.json"
    if check_path.is_file():                   # the audit's own figures beside the truth
        checks = json.loads(check_path.read_text())
        for kind in ("wrong_class", "loose_box", "missing_box"):
            own = checks.get(kind, {})
            out[kind]["self_auroc"] = own.get("auroc")
            out[kind]["self_expected_precision"] = own.get("expected_precision")
            out[kind]["self_fault_share"] = own.get("fault_share")
            if kind == "missing_box":
                out[kind]["self_image_auroc"] = own.get("image_auroc")
    return out
