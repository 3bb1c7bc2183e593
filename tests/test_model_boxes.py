"""Box geometry, encoding, anchors and matching of detdiff.model, checked against torchvision and the SSD rule."""

from __future__ import annotations

import math

import pytest
import torch
from hypothesis import given, settings, strategies as st
from torchvision.ops import box_iou

from detdiff.model.anchors import (BACKGROUND, IGNORED, anchor_grid, anchor_shapes, make_anchors, match_anchors,
                                   match_batched, match_near, overlapping_pairs)
from detdiff.model.box_coder import BoxCoder, xyxy_to_cxcywh
from detdiff.model.box_coder import paired_box_iou


def random_boxes(n: int, seed: int, size: float = 100.0) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    xy = torch.rand(n, 2, generator=g) * size
    wh = 1 + torch.rand(n, 2, generator=g) * size / 2
    return torch.cat((xy, xy + wh), dim=1)


def test_box_iou_worked_value() -> None:
    # torchvision.ops.box_iou worked value from /work/shared/CHECKS.md: [1/7, 1, 0] (IoU definition)
    box = torch.tensor([[0.0, 0, 10, 10]])
    others = torch.tensor([[5.0, 5, 15, 15], [0, 0, 10, 10], [10, 10, 20, 20]])
    expected = torch.tensor([1 / 7, 1.0, 0.0])
    torch.testing.assert_close(box_iou(box, others)[0], expected)
    torch.testing.assert_close(paired_box_iou(box.expand(3, 4), others), expected)


def test_paired_iou_equals_torchvision_diagonal() -> None:
    # reference: torchvision.ops.box_iou (all pairs); ours is its diagonal
    a, b = random_boxes(50, 1), random_boxes(50, 2)
    torch.testing.assert_close(paired_box_iou(a, b), box_iou(a, b).diagonal())


def test_encode_decode_round_trip() -> None:
    # SSD centre/size offsets with variances 0.1/0.2 (Liu et al. 2016; variances from memory of its reference code)
    coder = BoxCoder((0.1, 0.1, 0.2, 0.2))
    gt, anchors = random_boxes(40, 3), random_boxes(40, 4)
    deltas = coder.encode(gt, anchors)
    torch.testing.assert_close(coder.decode(deltas, anchors), gt, rtol=1e-5, atol=1e-4)


def test_encode_hand_value() -> None:
    # worked by hand from the SSD offsets: centre shift of a quarter width -> 0.25 / 0.1; doubled side -> log 2 / 0.2
    coder = BoxCoder((0.1, 0.1, 0.2, 0.2))
    anchor = torch.tensor([[0.0, 0, 10, 10]])
    gt = torch.tensor([[-2.5, -5, 17.5, 15]])        # centre (7.5, 5), size 20 x 20
    expected = torch.tensor([[2.5, 0.0, math.log(2) / 0.2, math.log(2) / 0.2]])
    torch.testing.assert_close(coder.encode(gt, anchor), expected)


def test_decode_clamps_exp_input() -> None:
    coder = BoxCoder()
    boxes = coder.decode(torch.tensor([[0.0, 0, 1e6, 1e6]]), torch.tensor([[0.0, 0, 10, 10]]))
    assert torch.isfinite(boxes).all()


def test_anchor_count_order_and_shapes() -> None:
    strides, sizes, scales, ratios = (8, 16), (16, 32), (0.5, 1.0), (0.5, 1.0, 2.0)
    anchors = make_anchors(64, strides, sizes, scales, ratios)
    per_loc = len(scales) * len(ratios)
    assert anchors.shape == ((8 * 8 + 4 * 4) * per_loc, 4)
    centres = xyxy_to_cxcywh(anchors)
    # first location of level 0 is the top-left cell centre, the next location is one stride to the right
    torch.testing.assert_close(centres[:per_loc, :2], torch.full((per_loc, 2), 4.0))
    torch.testing.assert_close(centres[per_loc, :2], torch.tensor([12.0, 4.0]))
    # ratio = height / width, area = side^2
    wh = centres[:per_loc, 2:]
    torch.testing.assert_close(wh[:, 1] / wh[:, 0], torch.tensor(ratios * 2))
    torch.testing.assert_close(wh.prod(1), torch.tensor([8.0 ** 2] * 3 + [16.0 ** 2] * 3))
    torch.testing.assert_close(anchor_shapes([16], [1.0]), torch.tensor([[16.0, 16.0]]))


def test_anchor_size_must_divide() -> None:
    with pytest.raises(ValueError, match="multiple"):
        make_anchors(100, (8, 16, 32), (32, 64, 128), (1.0,), (1.0,))


def test_matching_hand_made_case() -> None:
    # SSD matching rule (Liu et al., ECCV 2016): IoU >= 0.5 positive, each box also takes its best anchor,
    # below 0.4 background, between ignored. IoUs worked by hand below.
    anchors = torch.tensor([
        [0.0, 0, 10, 10],     # = gt0 -> IoU 1.0 -> positive 0
        [0.0, 0, 10, 5],      # IoU 0.5 with gt0 -> positive 0
        [0.0, 0, 10, 4.5],    # IoU 0.45 with gt0 -> ignored
        [0.0, 0, 10, 3],      # IoU 0.3 -> background
        [50.0, 50, 60, 60],   # no overlap -> background
        [100.0, 100, 130, 130],   # IoU 100/900 with gt1: below 0.4 but gt1's best anchor -> positive 1
    ])
    gt = torch.tensor([[0.0, 0, 10, 10], [110.0, 110, 120, 120]])
    torch.testing.assert_close(box_iou(anchors, gt)[:4, 0], torch.tensor([1.0, 0.5, 0.45, 0.3]))
    matched = match_anchors(anchors, gt, pos_iou=0.5, neg_iou=0.4)
    assert matched.tolist() == [0, 0, IGNORED, BACKGROUND, BACKGROUND, 1]


def test_matching_gives_small_boxes_their_best_anchors() -> None:
    # min_anchors: each box also claims its k highest-IoU anchors at IoU >= min_anchor_iou, never another
    # box's positive. IoUs against the 8 x 8 box gt0 worked by hand (intersection / union) and checked with
    # torchvision.ops.box_iou.
    anchors = torch.tensor([
        [0.0, 0, 10, 10],     # 64 / 100 = 0.64 -> positive 0 (>= 0.5)
        [3.0, 0, 13, 10],     # 48 / 116 = 0.41 -> ignored under plain SSD, claimed as gt0's 2nd best
        [5.0, 0, 15, 10],     # 32 / 132 = 0.24 -> background under SSD, claimed as 3rd best
        [7.0, 0, 17, 10],     # 16 / 148 = 0.11 (4th: not claimed with k = 3)
        [40.0, 40, 50, 50],   # = gt1 -> positive 1
        [42.0, 40, 52, 50],   # IoU 0.67 with gt1 -> positive 1 already; must stay 1
    ])
    gt = torch.tensor([[1.0, 1, 9, 9], [40.0, 40, 50, 50]])
    iou = box_iou(anchors, gt)[:, 0]
    torch.testing.assert_close(iou[:4], torch.tensor([64 / 100, 48 / 116, 32 / 132, 16 / 148]))
    plain = match_anchors(anchors, gt, 0.5, 0.4)
    assert plain.tolist() == [0, IGNORED, BACKGROUND, BACKGROUND, 1, 1]
    three = match_anchors(anchors, gt, 0.5, 0.4, min_anchors=3, min_anchor_iou=0.2)
    assert three.tolist() == [0, 0, 0, BACKGROUND, 1, 1]
    high_floor = match_anchors(anchors, gt, 0.5, 0.4, min_anchors=3, min_anchor_iou=0.3)
    assert high_floor.tolist() == [0, 0, BACKGROUND, BACKGROUND, 1, 1]


def test_matching_without_boxes_is_all_background() -> None:
    anchors = random_boxes(10, 5)
    matched = match_anchors(anchors, torch.zeros((0, 4)), 0.5, 0.4)
    assert (matched == BACKGROUND).all()


def padded_iou(anchors: torch.Tensor, gts: list[torch.Tensor]) -> tuple[torch.Tensor, torch.Tensor]:
    """``iou [B, N, G]`` of every anchor with each image's boxes padded to the batch's most (torchvision's
    box_iou) and ``valid [B, G]``."""
    width = max(max(len(g) for g in gts), 1)
    pad = torch.zeros((len(gts), width, 4))
    valid = torch.zeros((len(gts), width), dtype=torch.bool)
    for k, g in enumerate(gts):
        pad[k, : len(g)] = g
        valid[k, : len(g)] = True
    return box_iou(anchors, pad.reshape(-1, 4)).reshape(len(anchors), len(gts), width).permute(1, 0, 2), valid


@settings(max_examples=25, deadline=None)
@given(counts=st.lists(st.integers(0, 6), min_size=1, max_size=4), seed=st.integers(0, 1000))
def test_batched_matching_equals_per_image(counts: list[int], seed: int) -> None:
    # padding the boxes of a batch must not change any image's matching (reference: per-image match_anchors)
    anchors = make_anchors(64, (8, 16), (16, 32), (1.0,), (0.5, 1.0, 2.0))
    gts = [random_boxes(n, seed + k, size=56.0) for k, n in enumerate(counts)]
    iou, valid = padded_iou(anchors, gts)
    for k_min in (1, 3):
        matched, _ = match_batched(iou, valid, 0.5, 0.4, min_anchors=k_min)
        for k, g in enumerate(gts):
            single = match_anchors(anchors, g, 0.5, 0.4, min_anchors=k_min)
            assert torch.equal(matched[k], single)


GRIDS = [anchor_grid(64, (8, 16, 32), (16, 32, 64), (0.5, 1.0, 1.6), (0.5, 1.0, 2.0)),
         anchor_grid(96, (8, 16, 32), (1, 1, 1), (1.0,), (1.0,),
                     [[[5, 7], [9, 4], [12, 12]], [[20, 30], [25, 25], [40, 18]], [[50, 60], [70, 40], [90, 90]]])]


def grid_batch(counts: list[int], seed: int, size: int, integer: bool) -> list[torch.Tensor]:
    """Boxes of every size (a few px to most of the view), some reaching outside it; ``integer``: whole-pixel
    corners, which make many anchors tie on IoU."""
    g = torch.Generator().manual_seed(seed)
    out = []
    for n in counts:
        xy = torch.rand(n, 2, generator=g) * size * 1.1 - size * 0.05
        wh = 0.5 + torch.rand(n, 2, generator=g) ** 3 * size * 0.8
        if integer:
            xy, wh = xy.floor(), wh.ceil()
        out.append(torch.cat((xy, xy + wh), 1))
    return out


@pytest.mark.parametrize("grid", GRIDS)
def test_grid_boxes_equal_make_anchors_and_pairs_cover_every_overlap(grid) -> None:
    # reference: torchvision.ops.box_iou over all (anchor, box) pairs; every pair with IoU > 0 must be listed,
    # and each listed IoU must equal torchvision's bit for bit
    anchors = grid.boxes()
    shapes = [[list(wh) for wh in level] for level in grid.shapes]
    assert torch.equal(anchors, make_anchors(grid.image_size, grid.strides, (1,) * 3, (1.0,), (1.0,), shapes))
    boxes = torch.cat(grid_batch([40], 3, grid.image_size, integer=False))
    box, anchor = overlapping_pairs(grid, boxes)
    full = box_iou(anchors, boxes)                                              # [N, T]
    listed = torch.zeros_like(full, dtype=torch.bool)
    listed[anchor, box] = True
    assert not (full > 0)[~listed].any()
    assert torch.equal(paired_box_iou(anchors[anchor], boxes[box]), full[anchor, box])
    assert len(box) < full.numel()


@settings(max_examples=30, deadline=None)
@given(counts=st.lists(st.integers(0, 25), min_size=1, max_size=5), seed=st.integers(0, 1000),
       which=st.integers(0, 1), integer=st.booleans(), k_min=st.sampled_from([1, 3]))
def test_matching_near_equals_full_matching(counts: list[int], seed: int, which: int, integer: bool,
                                            k_min: int) -> None:
    # reference: match_batched on the full padded IoU matrix from torchvision.ops.box_iou, ties included
    grid = GRIDS[which]
    anchors = grid.boxes()
    gts = grid_batch(counts, seed, grid.image_size, integer)
    iou, valid = padded_iou(anchors, gts)
    matched, best = match_batched(iou, valid, 0.5, 0.4, min_anchors=k_min)
    image = torch.repeat_interleave(torch.arange(len(counts)), torch.tensor(counts))
    slot = torch.cat([torch.arange(n) for n in counts])
    near, near_best = match_near(anchors, grid, torch.cat(gts), image, slot, len(counts), 0.5, 0.4,
                                 min_anchors=k_min)
    assert torch.equal(near, matched)
    assert torch.equal(near_best, best[image, slot])
