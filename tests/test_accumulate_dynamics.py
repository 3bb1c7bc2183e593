"""Accumulated scores from a hand-written log, and learning dynamics against the papers' definitions."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import torch

from detdiff.analysis.accumulate import (accumulate_over_epochs, image_scores, object_scores, percentile_rank,
                                         within_group_zscore)
from detdiff.analysis.dynamics import (area_under_margin, box_disagreement, data_map, data_map_regions,
                                       first_learned, forgetting_events, learning_dynamics, never_learned,
                                       other_class_lead, sigmoid)
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLog, LossLogWriter


def _write(log_dir, epochs: list[dict], num_images: int, num_objects: int) -> LossLog:
    """Write one epoch per dict: {"images": rows, "objects": rows, field: values, ...}."""
    writer = LossLogWriter(log_dir, num_images, num_objects)
    for e, spec in enumerate(epochs):
        writer.reset(10 + e)                       # epoch numbers need not start at 0
        imgs, objs = np.asarray(spec["images"]), np.asarray(spec["objects"])
        image = {k: np.asarray(spec.get(f"image.{k}", np.zeros(len(imgs))), dtype=dt)
                 for k, (dt, _, _) in IMAGE_FIELDS.items()}
        objects = {k: np.asarray(spec.get(f"object.{k}", np.zeros((len(objs), *shape))), dtype=dt)
                   for k, (dt, shape, _) in OBJECT_FIELDS.items()}
        writer.process(imgs, image, objs, objects)
        writer.finalize()
    return LossLog.open(log_dir)


def test_accumulate_skips_uncovered_epochs() -> None:
    per_epoch = np.array([[1.0, 2.0, np.nan], [np.nan, 4.0, np.nan], [3.0, np.nan, np.nan]])
    out = accumulate_over_epochs(per_epoch)
    # mean over covered epochs x number of epochs
    np.testing.assert_allclose(out[:2], [(1 + 3) / 2 * 3, (2 + 4) / 2 * 3])
    assert np.isnan(out[2])


def test_image_scores_normalise_by_positives_but_not_background(tmp_path) -> None:
    log = _write(tmp_path, [
        {"images": [0, 1], "objects": [], "image.loc_sum": [4.0, 3.0], "image.pos_sum": [2.0, 1.0],
         "image.neg_sum": [10.0, 20.0], "image.num_pos": [4, 0]},
        {"images": [0], "objects": [], "image.loc_sum": [2.0], "image.pos_sum": [2.0],
         "image.neg_sum": [6.0], "image.num_pos": [2]},
    ], num_images=3, num_objects=0)
    t = image_scores(log)
    np.testing.assert_allclose(t["loc_score"][:2], [4 / 4 + 2 / 2, 3.0 / 1 * 2])   # max(1, num_pos); image 1 once
    np.testing.assert_allclose(t["pos_score"][:2], [2 / 4 + 2 / 2, 1.0 * 2])
    np.testing.assert_allclose(t["neg_score"][:2], [16.0, 40.0])                  # raw sums, same anchor set
    np.testing.assert_allclose(t["neg_raw"][:2], [16.0, 20.0])
    assert t["epochs_covered"].tolist() == [2, 1, 0]
    assert t.loc[2, ["loc_score", "pos_score", "neg_score", "loc_pct"]].isna().all()   # never covered


def test_object_scores_percentiles_and_class_z(tmp_path) -> None:
    rng = np.random.default_rng(3)
    num = 40
    labels = rng.integers(0, 3, num)
    epochs = [{"images": [0], "objects": np.arange(num), "object.loc_sum": rng.uniform(0, 2, num),
               "object.cls_sum": rng.uniform(0, 2, num), "object.num_anchors": rng.integers(0, 5, num),
               "object.loc_kept": rng.uniform(0, 1, num), "object.cls_kept": rng.uniform(0, 1, num)}
              for _ in range(3)]
    log = _write(tmp_path, epochs, num_images=1, num_objects=num)
    t = object_scores(log, labels, 3)
    # scores: the kept anchor's losses summed over epochs; *_raw: the all-anchor sums summed over epochs
    np.testing.assert_allclose(t["pos_score"], sum(e["object.cls_kept"] for e in epochs), rtol=1e-6)
    np.testing.assert_allclose(t["loc_score"], sum(e["object.loc_kept"] for e in epochs), rtol=1e-6)
    np.testing.assert_allclose(t["loc_raw"], sum(e["object.loc_sum"] for e in epochs), rtol=1e-6)
    # reference: scipy.stats.percentileofscore(kind="mean") and scipy.stats.zscore (ddof=0) within each class
    ref_pct = [scipy.stats.percentileofscore(t["pos_score"], v, kind="mean") for v in t["pos_score"]]
    np.testing.assert_allclose(t["pos_pct"], ref_pct)
    for c in range(3):
        np.testing.assert_allclose(t["loc_z"][labels == c], scipy.stats.zscore(t["loc_score"][labels == c]),
                                   atol=1e-9)


def test_percentile_and_z_leave_nan_alone() -> None:
    pct = percentile_rank(np.array([3.0, np.nan, 1.0, 2.0]))
    np.testing.assert_allclose(pct[[0, 2, 3]], [100 - 50 / 3, 50 / 3, 50.0])
    assert np.isnan(pct[1])
    z = within_group_zscore(np.array([1.0, 1.0, np.nan, 5.0]), np.array([0, 0, 0, 1]), 2)
    assert z[0] == 0 and z[1] == 0 and np.isnan(z[2]) and z[3] == 0      # zero spread -> 0


def test_forgetting_events_worked_value() -> None:
    # Toneva et al., ICLR 2019: a forgetting event = correct at t, wrong at t + 1 (CHECKS.md worked value)
    correct = np.array([0, 1, 1, 0, 1, 0, 0, 1], dtype=bool)[:, None]
    assert forgetting_events(correct).tolist() == [2]          # 1 -> 0 at t = 3 and at t = 5
    assert first_learned(correct).tolist() == [1]
    assert never_learned(correct).tolist() == [False]


def test_forgetting_skips_epochs_not_trained() -> None:
    correct = np.array([[1, 1, 0], [0, 0, 0], [0, 1, 0]], dtype=bool)     # three objects as columns
    valid = np.array([[1, 1, 1], [0, 1, 1], [1, 1, 0]], dtype=bool)
    # object 0: 1, (skipped), 0 -> one event; object 1: 1, 0, 1 -> one; object 2: 0, 0 -> never learned
    assert forgetting_events(correct, valid).tolist() == [1, 1, 0]
    assert never_learned(correct, valid).tolist() == [False, False, True]
    assert first_learned(correct, valid).tolist() == [0, 0, -1]


def test_data_map_worked_value_uses_population_std() -> None:
    # Swayamdipta et al., EMNLP 2020: confidence = mean p(label), variability = population std (CHECKS.md)
    prob = np.array([0.2, 0.4, 0.6, 0.8])[:, None]
    confidence, variability, correctness = data_map(prob, prob > 0.5)
    ref = torch.tensor(prob[:, 0])
    assert confidence[0] == pytest.approx(0.5)
    assert variability[0] == pytest.approx(0.2236, abs=1e-4)
    assert variability[0] == pytest.approx(torch.std(ref, unbiased=False).item())   # torch reference, ddof 0
    assert variability[0] != pytest.approx(torch.std(ref).item())                   # not the sample std
    assert correctness[0] == pytest.approx(0.5)


def test_aum_worked_value() -> None:
    # Pleiss et al., NeurIPS 2020: margin = labelled logit - largest other logit (CHECKS.md worked value)
    aum = area_under_margin(np.array([2.0, 1.0, 0.0])[:, None], np.array([1.0, 1.0, 2.0])[:, None])
    assert aum[0] == pytest.approx(-1 / 3, abs=1e-4)


def test_sigmoid_matches_torch() -> None:
    x = np.array([-800.0, -3.0, 0.0, 2.5, 800.0])
    np.testing.assert_allclose(sigmoid(x), torch.sigmoid(torch.tensor(x)).numpy())   # torch reference


def test_regions_split_in_terciles() -> None:
    confidence = np.array([0.9, 0.8, 0.2, 0.1, 0.5, 0.5, np.nan])
    variability = np.array([0.01, 0.02, 0.03, 0.01, 0.3, 0.4, 0.1])
    assert data_map_regions(confidence, variability).tolist() == [
        "easy", "easy", "hard", "hard", "ambiguous", "ambiguous", ""]
    assert set(data_map_regions(np.full(5, 0.7), np.zeros(5))) == {"easy"}     # no spread: nothing ambiguous


def test_learning_dynamics_reads_the_log(tmp_path) -> None:
    detected = [[False, True], [True, True], [False, True]]
    epochs = [{"images": [0], "objects": [0, 1], "object.num_anchors": [2, 2], "object.detected": d,
               "object.logit_label": [0.0, 3.0], "object.logit_other": [1.0, -1.0]} for d in detected]
    log = _write(tmp_path, epochs, num_images=1, num_objects=3)          # object 2 is never trained (crowd)
    t = learning_dynamics(log)
    assert t["first_learned"].tolist() == [11, 10, -1]                  # epoch numbers from the log
    assert t["forgetting_events"].tolist() == [1, 0, 0]
    assert t["never_learned"].tolist() == [False, False, False]
    np.testing.assert_allclose(t["aum"][:2], [-1.0, 4.0])
    assert t["confidence"][0] == pytest.approx(0.5) and np.isnan(t["confidence"][2])
    assert t["region"][2] == ""


def test_other_class_lead_is_the_mean_probability_gap_over_valid_epochs() -> None:
    # Worked by hand from the definition, sigmoid reference scipy.special.expit: object 0 has logits
    # (label, other) = (-1, 1.5) and (0, 0) -> mean of (expit(1.5) - expit(-1), 0); object 1 is valid in
    # epoch 0 only; object 2 never (NaN). Two low logits give a small lead whatever their gap.
    from scipy.special import expit

    label = np.array([[-1.0, 2.0, 0.0], [0.0, np.nan, 0.0]])
    other = np.array([[1.5, -2.0, 0.0], [0.0, 5.0, 0.0]])
    valid = np.array([[True, True, False], [True, False, False]])
    lead = other_class_lead(label, other, valid)
    assert lead[0] == pytest.approx((expit(1.5) - expit(-1.0)) / 2)
    assert lead[1] == pytest.approx(expit(-2.0) - expit(2.0))
    assert np.isnan(lead[2])
    assert other_class_lead(np.array([[-6.0]]), np.array([[-3.0]]))[0] < 0.05 < (expit(1.5) - expit(-1.0))


def test_box_disagreement_is_one_minus_the_mean_late_iou() -> None:
    # Worked by hand from the definition: object 0 has IoUs 0.9 and 0.7 -> 1 - 0.8; object 1 is valid in
    # epoch 0 only (0.5 -> 0.5); object 2 never (NaN).
    iou = np.array([[0.9, 0.5, 0.8], [0.7, 0.1, np.nan]])
    valid = np.array([[True, True, False], [True, False, False]])
    np.testing.assert_allclose(box_disagreement(iou, valid)[:2], [0.2, 0.5])
    assert np.isnan(box_disagreement(iou, valid)[2])
