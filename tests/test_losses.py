"""Loss streams of detdiff.model.losses against torch / torchvision reference functions and a per-image loop."""

from __future__ import annotations

import math

import pytest
import torch
import torch.nn.functional as F
from torchvision.ops import box_iou, sigmoid_focal_loss

from detdiff.model.anchors import BACKGROUND, anchor_grid, make_anchors, match_anchors
from detdiff.model.box_coder import BoxCoder
from detdiff.model.losses import compute_loss_streams
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS

LOSS_CFG = {"box_beta": 1 / 9, "box_variances": [0.1, 0.1, 0.2, 0.2], "classification": "focal",
            "focal_alpha": 0.25, "focal_gamma": 2.0, "neg_pos_ratio": 3, "pos_iou": 0.5, "neg_iou": 0.4,
            "min_anchors": 1, "min_anchor_iou": 0.2}
LOG_CFG = {"detect_iou": 0.5, "detect_score": 0.3, "unmatched_per_image": 3, "unmatched_min_score": 0.3,
           "unmatched_max_iou": 0.3}
NUM_CLASSES = 3
ANCHORS = make_anchors(64, (8, 16), (16, 32), (1.0,), (0.5, 1.0, 2.0))          # [240, 4]


def loss_cfg(**changes: object) -> dict:
    return {**LOSS_CFG, **changes}


def make_batch(counts: list[int], seed: int = 0, logit_scale: float = 1.0):
    """Leaf outputs ``[B, N, C]`` / ``[B, N, 4]`` with grad, and random targets inside the 64 px view."""
    g = torch.Generator().manual_seed(seed)
    n = ANCHORS.shape[0]
    logits = (torch.randn(len(counts), n, NUM_CLASSES, generator=g) * logit_scale - 2.0).requires_grad_()
    deltas = (torch.randn(len(counts), n, 4, generator=g) * 0.5).requires_grad_()
    targets = []
    for count in counts:
        xy = torch.rand(count, 2, generator=g) * 40
        wh = 6 + torch.rand(count, 2, generator=g) * 30
        targets.append({"boxes": torch.cat((xy, (xy + wh).clamp(max=64)), 1),
                        "labels": torch.randint(0, NUM_CLASSES, (count,), generator=g)})
    return {"cls_logits": logits, "box_deltas": deltas}, targets


def reference_image_streams(outputs: dict, targets: list, cfg: dict) -> torch.Tensor:
    """A conventional per-image loop (torchvision SSD / RetinaNet style): ``[B, 3]`` loc, pos, neg sums."""
    coder = BoxCoder(cfg["box_variances"])
    rows = []
    for b, t in enumerate(targets):
        matched = match_anchors(ANCHORS, t["boxes"], cfg["pos_iou"], cfg["neg_iou"])
        pos = matched >= 0
        logits, deltas = outputs["cls_logits"][b], outputs["box_deltas"][b]
        onehot = torch.zeros_like(logits)
        onehot[pos, t["labels"][matched[pos]]] = 1.0
        loc = F.smooth_l1_loss(deltas[pos], coder.encode(t["boxes"][matched[pos]], ANCHORS[pos]),
                               beta=cfg["box_beta"], reduction="sum")
        if cfg["classification"] == "focal":
            cls = sigmoid_focal_loss(logits, onehot, cfg["focal_alpha"], cfg["focal_gamma"], reduction="none").sum(1)
            neg = cls[matched == BACKGROUND].sum()
        else:
            cls = F.binary_cross_entropy_with_logits(logits, onehot, reduction="none").sum(1)
            bg = cls[matched == BACKGROUND]
            neg = bg.topk(min(len(bg), cfg["neg_pos_ratio"] * max(1, int(pos.sum())))).values.sum()
        rows.append(torch.stack((loc, cls[pos].sum(), neg)))
    return torch.stack(rows)


@pytest.mark.parametrize(("beta", "expected"), [(1.0, [0, 0.125, 0.5, 1.5]), (1 / 9, [0, 0.44444, 0.94444, 1.94444])])
def test_box_stream_smooth_l1_worked_values(beta: float, expected: list[float]) -> None:
    # Girshick, Fast R-CNN, eq. 3; worked values from /work/shared/CHECKS.md and torch.nn.functional.smooth_l1_loss
    anchors = torch.tensor([[0.0, 0, 10, 10], [40.0, 40, 50, 50]])
    offsets = torch.tensor([0.0, 0.5, 1.0, 2.0])
    outputs = {"cls_logits": torch.zeros(1, 2, 1), "box_deltas": torch.stack((offsets, torch.zeros(4)))[None]}
    targets = [{"boxes": torch.tensor([[0.0, 0, 10, 10]]), "labels": torch.tensor([0])}]
    streams = compute_loss_streams(outputs, anchors, targets, loss_cfg(box_beta=beta), LOG_CFG)
    reference = F.smooth_l1_loss(offsets, torch.zeros(4), beta=beta, reduction="none")
    torch.testing.assert_close(reference, torch.tensor(expected), atol=1e-5, rtol=0)
    assert streams.image["loc_sum"].item() == pytest.approx(sum(expected), abs=1e-4)
    assert streams.objects["loc_sum"].item() == pytest.approx(reference.sum().item(), abs=1e-6)


def test_class_streams_focal_worked_value() -> None:
    # Lin et al. 2017 via torchvision.ops.sigmoid_focal_loss: logits [2, -1, 0], targets [1, 0, 1]
    # -> [0.000451, 0.016994, 0.043322] (/work/shared/CHECKS.md); anchors 0 and 2 are positive, 1 is background
    anchors = torch.tensor([[0.0, 0, 10, 10], [40.0, 40, 50, 50], [20.0, 0, 30, 10]])
    logits = torch.tensor([2.0, -1.0, 0.0]).reshape(1, 3, 1)
    outputs = {"cls_logits": logits, "box_deltas": torch.zeros(1, 3, 4)}
    targets = [{"boxes": torch.tensor([[0.0, 0, 10, 10], [20.0, 0, 30, 10]]), "labels": torch.tensor([0, 0])}]
    streams = compute_loss_streams(outputs, anchors, targets, LOSS_CFG, LOG_CFG)
    reference = sigmoid_focal_loss(logits.flatten(), torch.tensor([1.0, 0.0, 1.0]), 0.25, 2.0, reduction="none")
    torch.testing.assert_close(reference, torch.tensor([0.000451, 0.016994, 0.043322]), atol=1e-6, rtol=0)
    assert streams.image["pos_sum"].item() == pytest.approx(0.000451 + 0.043322, abs=2e-6)
    assert streams.image["neg_sum"].item() == pytest.approx(0.016994, abs=1e-6)
    torch.testing.assert_close(streams.objects["cls_sum"], reference[[0, 2]])
    assert streams.image["num_pos"].item() == 2


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
def test_image_streams_equal_per_image_reference(kind: str) -> None:
    # reference: a per-image loop over torchvision's box_iou / sigmoid_focal_loss and torch's smooth_l1 / BCE
    outputs, targets = make_batch([3, 0, 5, 1], seed=1)
    cfg = loss_cfg(classification=kind)
    streams = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG)
    reference = reference_image_streams(outputs, targets, cfg).detach()
    ours = torch.stack([streams.image[k] for k in ("loc_sum", "pos_sum", "neg_sum")], 1)
    torch.testing.assert_close(ours, reference, rtol=1e-5, atol=1e-5)
    assert set(streams.image) == set(IMAGE_FIELDS)
    assert set(streams.objects) == set(OBJECT_FIELDS)


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
def test_total_is_mean_of_image_objectives_and_gradients_match(kind: str) -> None:
    outputs, targets = make_batch([2, 0, 4], seed=2)
    cfg = loss_cfg(classification=kind)
    with_items = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG, per_item=True)
    im = with_items.image
    per_image = (im["loc_sum"] + im["pos_sum"] + im["neg_sum"]) / im["num_pos"].clamp(min=1)
    assert with_items.total.item() == pytest.approx(per_image.sum().item() / 3, rel=1e-6)
    grads = torch.autograd.grad(with_items.total, [outputs["cls_logits"], outputs["box_deltas"]])
    plain = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG, per_item=False)
    assert plain.objects is None and plain.unmatched is None
    plain_grads = torch.autograd.grad(plain.total, [outputs["cls_logits"], outputs["box_deltas"]])
    assert plain.total.item() == pytest.approx(with_items.total.item(), rel=1e-7)
    for a, b in zip(grads, plain_grads):
        torch.testing.assert_close(a, b)
    for value in (*with_items.image.values(), *with_items.objects.values(), *with_items.unmatched.values()):
        assert not value.requires_grad


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
def test_object_sums_add_up_to_image_positive_streams(kind: str) -> None:
    outputs, targets = make_batch([4, 1, 0, 6], seed=3)
    streams = compute_loss_streams(outputs, ANCHORS, targets, loss_cfg(classification=kind), LOG_CFG)
    obj_image = torch.repeat_interleave(torch.arange(4), torch.tensor([len(t["labels"]) for t in targets]))
    obj = streams.objects
    torch.testing.assert_close(torch.zeros(4).index_add(0, obj_image, obj["loc_sum"]), streams.image["loc_sum"])
    torch.testing.assert_close(torch.zeros(4).index_add(0, obj_image, obj["cls_sum"]), streams.image["pos_sum"])
    counts = torch.zeros(4, dtype=torch.int64).index_add(0, obj_image, obj["num_anchors"])
    assert torch.equal(counts, streams.image["num_pos"])


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
def test_kept_anchor_losses_match_torch_at_the_anchor_of_pred_box(kind: str) -> None:
    # The kept anchor is the matched anchor of highest class score; its box is pred_box. Reference: recompute
    # both losses there with torch.nn.functional.smooth_l1_loss and torchvision's sigmoid_focal_loss / BCE.
    cfg = loss_cfg(classification=kind, min_anchors=3)
    outputs, targets = make_batch([4, 2, 5], seed=8, logit_scale=2.0)
    obj = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG).objects
    coder = BoxCoder(cfg["box_variances"])
    logits, deltas = outputs["cls_logits"].detach(), outputs["box_deltas"].detach()
    row = 0
    for b, t in enumerate(targets):
        decoded = coder.decode(deltas[b], ANCHORS)
        for j in range(len(t["labels"])):
            # the anchor is found from what the record says of it: its box's IoU and its top score
            candidates = ((box_iou(decoded, t["boxes"][j:j + 1])[:, 0] - obj["pred_iou"][row]).abs() < 1e-6) & (
                (logits[b].sigmoid().amax(1) - obj["pred_score"][row]).abs() < 1e-7)
            assert int(candidates.sum()) == 1
            n = int(candidates.nonzero()[0])
            torch.testing.assert_close(decoded[n], obj["pred_box"][row])
            target = coder.encode(t["boxes"][j:j + 1], ANCHORS[n:n + 1])[0]
            loc = F.smooth_l1_loss(deltas[b, n], target, beta=cfg["box_beta"], reduction="sum")
            onehot = F.one_hot(t["labels"][j], NUM_CLASSES).float()
            if kind == "focal":
                cls = sigmoid_focal_loss(logits[b, n], onehot, cfg["focal_alpha"], cfg["focal_gamma"], reduction="sum")
            else:
                cls = F.binary_cross_entropy_with_logits(logits[b, n], onehot, reduction="sum")
            torch.testing.assert_close(obj["loc_kept"][row], loc, rtol=1e-5, atol=1e-6)
            torch.testing.assert_close(obj["cls_kept"][row], cls, rtol=1e-5, atol=1e-6)
            row += 1
    assert (obj["loc_kept"] <= obj["loc_sum"] + 1e-6).all() and (obj["cls_kept"] <= obj["cls_sum"] + 1e-6).all()


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
def test_image_without_targets_has_zero_box_and_positive_loss(kind: str) -> None:
    # as torchvision's test_models_detection_negative_samples: no boxes -> no box loss, no positive loss
    outputs, targets = make_batch([0, 0], seed=4)
    streams = compute_loss_streams(outputs, ANCHORS, targets, loss_cfg(classification=kind), LOG_CFG)
    assert streams.image["loc_sum"].tolist() == [0.0, 0.0]
    assert streams.image["pos_sum"].tolist() == [0.0, 0.0]
    assert streams.image["num_pos"].tolist() == [0, 0]
    assert streams.objects["loc_sum"].shape == (0,)
    assert torch.isfinite(streams.total)
    if kind == "focal":
        assert (streams.image["neg_sum"] > 0).all()
    else:   # SSD mines 3 x num_pos negatives; we mine at least 3 so unannotated images keep a background loss
        assert (streams.image["neg_sum"] > 0).all()


def test_hard_negative_keeps_at_most_three_background_anchors_per_positive() -> None:
    # SSD (Liu et al. 2016): negatives mined 3:1. With every logit equal, each background anchor costs the same
    # BCE, so neg_sum / that cost counts the kept anchors.
    outputs, targets = make_batch([1, 3], seed=5)
    outputs["cls_logits"] = torch.full_like(outputs["cls_logits"], 3.0)
    streams = compute_loss_streams(outputs, ANCHORS, targets, loss_cfg(classification="hard_negative"), LOG_CFG)
    per_anchor = NUM_CLASSES * F.softplus(torch.tensor(3.0)).item()      # BCE(3, 0) = softplus(3), per class
    kept = streams.image["neg_sum"] / per_anchor
    torch.testing.assert_close(kept, 3.0 * streams.image["num_pos"].float(), rtol=1e-5, atol=1e-4)


def test_detected_and_pred_iou_consistent_with_box_iou() -> None:
    outputs, targets = make_batch([5, 3, 6], seed=6, logit_scale=2.0)
    coder = BoxCoder(LOSS_CFG["box_variances"])
    with torch.no_grad():    # make image 0's objects well predicted so that some are detected
        matched = match_anchors(ANCHORS, targets[0]["boxes"], 0.5, 0.4)
        pos = matched >= 0
        outputs["cls_logits"][0, pos, targets[0]["labels"][matched[pos]]] = 6.0
        outputs["box_deltas"][0, pos] = coder.encode(targets[0]["boxes"][matched[pos]], ANCHORS[pos])
    obj = compute_loss_streams(outputs, ANCHORS, targets, LOSS_CFG, LOG_CFG).objects
    gt = torch.cat([t["boxes"] for t in targets])
    labels = torch.cat([t["labels"] for t in targets])
    # reference: torchvision.ops.box_iou of each predicted box with its own annotation
    torch.testing.assert_close(obj["pred_iou"], box_iou(obj["pred_box"], gt).diagonal(), rtol=1e-5, atol=1e-6)
    expected = (obj["pred_label"] == labels) & (obj["pred_iou"] >= 0.5) & (obj["pred_score"] >= 0.3)
    assert torch.equal(obj["detected"], expected)
    assert obj["detected"][:5].all() and not obj["detected"][5:].all()
    assert ((obj["pred_score"] > 0) & (obj["pred_score"] < 1)).all()
    assert (obj["other_label"] != labels).all() and (obj["logit_other"] > -math.inf).all()


def test_object_that_lost_its_anchor_still_gets_a_prediction() -> None:
    # gt 0's only candidate anchor is claimed by gt 1 (IoU 1.0): gt 0 has no matched anchor
    anchors = torch.tensor([[0.0, 0, 10, 10], [40.0, 40, 50, 50]])
    outputs = {"cls_logits": torch.tensor([[[1.0, -1.0], [-3.0, -3.0]]]), "box_deltas": torch.zeros(1, 2, 4)}
    targets = [{"boxes": torch.tensor([[0.0, 0, 10, 3], [0.0, 0, 10, 10]]), "labels": torch.tensor([1, 0])}]
    obj = compute_loss_streams(outputs, anchors, targets, LOSS_CFG, LOG_CFG).objects
    assert obj["num_anchors"].tolist() == [0, 1]
    assert obj["loc_sum"][0].item() == 0.0 and obj["cls_sum"][0].item() == 0.0
    torch.testing.assert_close(obj["pred_box"][0], anchors[0])
    # its kept-anchor losses are measured at that anchor against its own box and label (torch references)
    coder = BoxCoder(LOSS_CFG["box_variances"])
    loc = F.smooth_l1_loss(torch.zeros(4), coder.encode(targets[0]["boxes"][:1], anchors[:1])[0],
                           beta=LOSS_CFG["box_beta"], reduction="sum")
    cls = sigmoid_focal_loss(outputs["cls_logits"][0, 0], torch.tensor([0.0, 1.0]), 0.25, 2.0, reduction="sum")
    torch.testing.assert_close(obj["loc_kept"][0], loc)
    torch.testing.assert_close(obj["cls_kept"][0], cls)
    assert obj["pred_iou"][0].item() == pytest.approx(0.3)
    assert obj["logit_label"][0].item() == -1.0 and obj["logit_other"][0].item() == 1.0
    assert obj["other_label"][0].item() == 0 and obj["pred_label"][0].item() == 0
    assert obj["pred_score"][0].item() == pytest.approx(1 / (1 + math.exp(-1)))


def test_unmatched_detections_overlap_no_box() -> None:
    outputs, targets = make_batch([2, 0, 4], seed=7)
    with torch.no_grad():
        outputs["cls_logits"][:, ::7, 1] = 4.0                  # many confident predictions everywhere
    streams = compute_loss_streams(outputs, ANCHORS, targets, LOSS_CFG, LOG_CFG)
    um = streams.unmatched
    assert len(um["batch_index"]) > 0
    assert torch.bincount(um["batch_index"], minlength=3).max() <= LOG_CFG["unmatched_per_image"]
    assert (um["score"] >= LOG_CFG["unmatched_min_score"]).all()
    for b, t in enumerate(targets):
        rows = um["batch_index"] == b
        if len(t["boxes"]) and rows.any():
            # reference: torchvision.ops.box_iou with every annotation of that image
            assert (box_iou(um["box"][rows], t["boxes"]) < LOG_CFG["unmatched_max_iou"]).all()
    assert (torch.bincount(um["batch_index"], minlength=3) == 3).all()


def test_bad_labels_name_the_target() -> None:
    outputs, targets = make_batch([1, 2], seed=8)
    targets[1]["labels"] = torch.tensor([0, NUM_CLASSES])
    with pytest.raises(ValueError, match=r"targets\[1\]\['labels'\]"):
        compute_loss_streams(outputs, ANCHORS, targets, LOSS_CFG, LOG_CFG)


def test_unmatched_with_untrained_confident_logits_stays_bounded() -> None:
    # every (anchor, class) above the score floor: the candidate set is cut to the top scores before NMS
    outputs, targets = make_batch([3, 0], seed=9)
    outputs["cls_logits"] = torch.full_like(outputs["cls_logits"], 1.0) + torch.rand(outputs["cls_logits"].shape)
    um = compute_loss_streams(outputs, ANCHORS, targets, LOSS_CFG, LOG_CFG).unmatched
    assert torch.bincount(um["batch_index"], minlength=2).tolist() == [3, 3]
    assert (um["score"] >= 0.73 - 1e-6).all()                  # sigmoid(1) ~ 0.731
    assert (box_iou(um["box"][um["batch_index"] == 0], targets[0]["boxes"]) < 0.3).all()


@pytest.mark.parametrize("kind", ["focal", "hard_negative"])
@pytest.mark.parametrize("min_anchors", [1, 3])
def test_streams_with_the_anchor_grid_equal_streams_without(kind: str, min_anchors: int) -> None:
    # matching near each box (the training path) must log exactly what matching against every anchor logs
    grid = anchor_grid(64, (8, 16), (16, 32), (1.0,), (0.5, 1.0, 2.0))
    assert torch.equal(grid.boxes(), ANCHORS)
    outputs, targets = make_batch([3, 0, 7, 1, 12], seed=4, logit_scale=3.0)
    cfg = loss_cfg(classification=kind, min_anchors=min_anchors)
    full = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG)
    near = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG, grid=grid)
    assert torch.equal(full.total, near.total)
    for part in ("image", "objects", "unmatched"):
        a, b = getattr(full, part), getattr(near, part)
        assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a), part


def test_hard_negative_mining_matches_torch_bce_at_extreme_logits() -> None:
    # The mining ranks background anchors by relu(x) + log(1 + exp(-|x|)), not by torch's BCE itself; at logits
    # of +-100 (float32's exp overflows at 89) the mined losses must still equal the per-image reference of
    # torch.nn.functional.binary_cross_entropy_with_logits with topk.
    outputs, targets = make_batch([3, 0, 5, 1], seed=2, logit_scale=40.0)
    cfg = loss_cfg(classification="hard_negative")
    streams = compute_loss_streams(outputs, ANCHORS, targets, cfg, LOG_CFG)
    reference = reference_image_streams(outputs, targets, cfg).detach()
    ours = torch.stack([streams.image[k] for k in ("loc_sum", "pos_sum", "neg_sum")], 1)
    assert outputs["cls_logits"].abs().max() > 100
    torch.testing.assert_close(ours, reference, rtol=1e-5, atol=1e-4)
