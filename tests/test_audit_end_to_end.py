"""The whole audit on real images and on the demo: planted label faults rank above clean boxes.

Real-image case: scikit-learn's bundled handwritten digits (UCI "Optical Recognition of Handwritten
Digits", Alpaydin & Kaynak 1998) pasted on scikit-image's CC0 textures, with confusable labels swapped.
AUROC is computed with scikit-learn's roc_auc_score. Floors are modest (measured values are in the
issue notes) because the detector trains for seconds. Both runs use the ci config with the default
model width: with fewer than ~400 digit scenes the detector memorises the swapped labels within a dozen
epochs and their loss falls back to that of clean boxes (measured: AUROC 0.72 at 160 scenes, 0.93 at 400).
The digits run trains without flips: a mirrored digit is not the same digit (with horizontal flips the
AUROC fell to 0.86), which is the README's rule for train.flips.
"""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
from pycocotools.coco import COCO
from sklearn.metrics import roc_auc_score
import torch
from torchvision.ops import box_convert, box_iou

from detdiff.analysis.validity import score_against_truth
from detdiff.api import open_run
from detdiff.data.scenarios import generate_demo
from detdiff.pipeline import run_audit
from digits_scene import build_digit_scenes

pytestmark = pytest.mark.slow
MODEL = {"model": {"width": 32, "head_width": 64}}     # the default width, at the ci view size


@pytest.fixture(scope="module")
def digits_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("digits")
    ann, images, swapped = build_digit_scenes(root, num_images=400, seed=0)
    run_audit(ann, images, root / "run", config_path="ci",
              overrides={**MODEL, "train": {"epochs": 12, "flips": "none"}}, progress=False, make_report=False)
    return open_run(root / "run"), swapped


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    demo = generate_demo(root / "data", num_images=300, seed=1, progress=False)
    run_audit(demo.annotations, demo.images_dir, root / "run", config_path="ci",
              overrides={**MODEL, "data": {"image_size": 160}, "train": {"epochs": 16},
                         "crossfit": {"epochs": "auto"}}, progress=False,
              make_report=True)
    return open_run(root / "run"), demo


def test_swapped_digit_labels_rank_near_the_top(digits_run) -> None:
    run, swapped = digits_run
    objects = run.objects[~run.objects["probe"]]        # left-out probe boxes have no loss-based scores
    positive = objects["annotation_id"].isin(swapped).to_numpy()
    auroc = roc_auc_score(positive, objects["pos_score"].to_numpy())
    assert auroc > 0.85, auroc                          # measured 0.93
    assert objects.loc[positive, "pos_pct"].median() > 80   # measured 94


def test_swapped_digits_are_suspected_with_the_true_class(digits_run) -> None:
    run, swapped = digits_run
    wrong = run.suspects[run.suspects["kind"] == "wrong_class"]
    found = wrong[wrong["annotation_id"].isin(swapped)]
    assert len(found) >= len(swapped) // 3


def test_demo_planted_wrong_classes_rank_above_clean_boxes(demo_run) -> None:
    run, demo = demo_run
    scores = score_against_truth(run.rundir, demo.truth)
    # the evidence behind the list (cross-fitted crop models, 30 epochs here): measured 0.973
    assert scores["wrong_class"]["auroc_evidence"] > 0.9, scores["wrong_class"]
    # the list is the top of the evidence's ranking, cut: its top-k precision cannot beat the uncut ranking's
    assert scores["wrong_class"]["precision_at_k"] <= scores["wrong_class"]["precision_at_k_ranking"] + 1e-9
    # the in-sample positive-class stream is a difficulty score, weaker as evidence: measured 0.76 with the
    # recipe's dimension-cluster anchors (0.85 with the fixed grid anchors, at a 160 px view)
    assert scores["wrong_class"]["auroc"] > 0.65, scores["wrong_class"]
    assert scores["wrong_class"]["auroc"] > scores["wrong_class"]["auroc_random"]


def test_demo_detector_learned_something(demo_run) -> None:
    run, _ = demo_run
    assert run.metrics["AP50"] > 0.4, run.metrics                        # measured 0.62


def test_review_file_loads_in_pycocotools(demo_run) -> None:
    run, _ = demo_run
    coco = COCO(str(run.rundir / "review.json"))  # reference loader: pycocotools coco.py
    suggestions = [a for a in coco.anns.values() if a.get("suggestion")]
    assert suggestions and len(coco.imgs) > 0


def test_tables_follow_the_contract(demo_run) -> None:
    run, _ = demo_run
    for name, required in {
        "images": ["image_id", "file_name", "loc_score", "pos_score", "neg_score", "why"],
        "objects": ["annotation_id", "image_id", "category_id", "loc_score", "pos_score", "first_learned",
                    "forgetting_events", "confidence", "variability", "aum", "why"],
        "suspects": ["kind", "image_id", "annotation_id", "x", "y", "w", "h", "suggested_category_id",
                     "score", "evidence"],
    }.items():
        frame: pd.DataFrame = getattr(run, name)
        assert set(required) <= set(frame.columns), name
    assert set(run.suspects["kind"]) <= {"wrong_class", "missing_box", "loose_box", "duplicate_box"}
    assert run.report_path.exists()
    assert np.isfinite(run.images["loc_score"]).mean() > 0.95
    probes = run.objects[run.objects["probe"].to_numpy(dtype=bool)]
    assert len(probes) and probes["pos_score"].isna().all()      # left out of training: no loss-based score
    # no missing-box suspect points at a probe (reference IoU: torchvision.ops.box_iou)
    missing = run.suspects[run.suspects["kind"] == "missing_box"].merge(probes[["image_id", "x", "y", "w", "h"]],
                                                                        on="image_id", suffixes=("", "_probe"))
    if len(missing):
        a = torch.tensor(missing[["x", "y", "w", "h"]].to_numpy(), dtype=torch.float64)
        b = torch.tensor(missing[["x_probe", "y_probe", "w_probe", "h_probe"]].to_numpy(), dtype=torch.float64)
        iou = box_iou(box_convert(a, "xywh", "xyxy"), box_convert(b, "xywh", "xyxy")).diagonal()
        assert float(iou.max()) < 0.5
