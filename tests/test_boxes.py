"""Shared box geometry (detdiff/boxes.py) against torchvision and brute force."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import torch
from torchvision.ops import box_iou

from detdiff.boxes import cross_group_pairs, group_offsets, group_pairs, pair_iou, xywh_to_xyxy, xyxy_to_xywh


def test_pair_iou_matches_torchvision() -> None:
    rng = np.random.default_rng(0)
    a = np.c_[rng.uniform(0, 50, (200, 2)), rng.uniform(1, 30, (200, 2))]
    b = np.c_[rng.uniform(0, 50, (200, 2)), rng.uniform(1, 30, (200, 2))]
    both = xywh_to_xyxy(np.concatenate([a, b]))
    rows = np.arange(200)
    reference = box_iou(torch.from_numpy(both[:200]), torch.from_numpy(both[200:])).diagonal().numpy()
    np.testing.assert_allclose(pair_iou(both, rows, rows + 200), reference, rtol=1e-12, atol=1e-12)  # torchvision
    # CHECKS.md worked value: box_iou([0,0,10,10], [5,5,15,15]) = 1/7
    two = xywh_to_xyxy(np.array([[0.0, 0, 10, 10], [5.0, 5, 10, 10]]))
    assert pair_iou(two, np.array([0]), np.array([1]))[0] == pytest.approx(1 / 7)


def test_unordered_pairs_from_sorted_keys_in_small_chunks() -> None:
    groups = np.array([0, 0, 0, 0, 2, 5, 5, 5, 9])
    found = {(int(i), int(j)) for left, right in group_pairs(group_offsets(groups), chunk=3)
             for i, j in zip(left, right) if i < j}
    brute = {(i, j) for i, j in itertools.combinations(range(len(groups)), 2) if groups[i] == groups[j]}
    assert found == brute


def test_box_format_round_trip() -> None:
    xywh = np.array([[1.0, 2.0, 3.0, 4.0], [0.0, 0.0, 10.0, 5.0]])
    assert xywh_to_xyxy(xywh).tolist() == [[1, 2, 4, 6], [0, 0, 10, 5]]
    np.testing.assert_array_equal(xyxy_to_xywh(xywh_to_xyxy(xywh)), xywh)
    assert group_offsets(np.array([], dtype=int)).tolist() == [0]


def test_cross_group_pairs_are_every_same_group_pair_once() -> None:
    # reference: the brute-force set of (a, b) with equal keys; a small chunk forces several chunks
    rng = np.random.default_rng(3)
    group_a, group_b = rng.integers(0, 6, 40), rng.integers(0, 8, 25)
    expected = {(i, j) for i in range(40) for j in range(25) if group_a[i] == group_b[j]}
    chunks = list(cross_group_pairs(group_a, group_b, chunk=7))
    found = [(int(i), int(j)) for left, right in chunks for i, j in zip(left, right)]
    assert len(found) == len(set(found)) and set(found) == expected
    assert len(chunks) > 1
    assert list(cross_group_pairs(group_a, np.zeros(0, np.int64))) == []


def test_best_overlaps_match_torchvision_iou_and_intersection() -> None:
    # IoU: torchvision.ops.box_iou; the share inside = intersection / own area, intersection = iou * union (the
    # identity behind box_iou). Zero boxes (rows that hold nothing) overlap nothing.
    from detdiff.boxes import PART_OF_BOX, best_overlaps, overlaps_objects, parts_of_boxes
    rng = np.random.default_rng(3)
    counts = np.array([4, 0, 6])
    offsets = np.r_[0, np.cumsum(counts)]
    ann = xywh_to_xyxy(np.c_[rng.uniform(0, 80, (counts.sum(), 2)), rng.uniform(5, 40, (counts.sum(), 2))])
    ann[2] = 0.0
    image = np.array([0, 0, 1, 2, 2, 2])
    det = np.c_[rng.uniform(0, 80, (6, 2)), rng.uniform(5, 40, (6, 2))]
    iou, share = best_overlaps(ann, offsets, image, det)
    for k, i in enumerate(image):
        rows = np.arange(offsets[i], offsets[i + 1])
        rows = rows[(ann[rows, 2:] > ann[rows, :2]).all(axis=1)]
        if not len(rows):
            assert iou[k] == 0 and share[k] == 0
            continue
        d, a = torch.from_numpy(xywh_to_xyxy(det[k:k + 1])), torch.from_numpy(ann[rows])
        ref = box_iou(d, a)[0]
        areas = (d[0, 2:] - d[0, :2]).prod() + (a[:, 2:] - a[:, :2]).prod(1)
        inter = ref * areas / (1 + ref)                   # iou = inter / (areas - inter)
        assert iou[k] == pytest.approx(float(ref.max()), abs=1e-9)
        assert share[k] == pytest.approx(float((inter / (d[0, 2:] - d[0, :2]).prod()).max()), abs=1e-9)
    assert np.array_equal(parts_of_boxes(ann, offsets, image, det), share >= PART_OF_BOX)
    assert np.array_equal(overlaps_objects(ann, offsets, image, det, 0.1), iou >= 0.1)
