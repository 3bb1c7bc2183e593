"""Box and image descriptors against pycocotools, torchvision, OpenCV and scikit-learn references."""

from __future__ import annotations

import itertools

import cv2
import numpy as np
import pytest
import torch
from pycocotools.cocoeval import COCOeval
from sklearn.datasets import load_digits
from sklearn.decomposition import PCA
from sklearn.metrics import roc_auc_score
from torchvision.ops import box_iou

from detdiff.analysis.descriptors import (SIZE_BIN_LABELS, feature_descriptors, image_descriptors,
                                          object_descriptors, pairwise_overlap, read_pixel_descriptors,
                                          size_bins, truncation)
from detdiff.boxes import group_pairs
from detdiff.data.coco import CocoDataset
from detdiff.data.pixel_descriptors import edge_density, laplacian_variance


def _dataset(boxes_per_image: list[np.ndarray], *, labels: list[np.ndarray] | None = None,
             crowd: list[np.ndarray] | None = None, size: tuple[int, int] = (100, 100)) -> CocoDataset:
    """A CocoDataset straight from arrays: one list entry of xywh boxes per image."""
    counts = [len(b) for b in boxes_per_image]
    num_i, num_a = len(counts), sum(counts)
    boxes = np.concatenate(boxes_per_image).astype(np.float64).reshape(-1, 4)
    lab = np.concatenate(labels) if labels else np.zeros(num_a, np.int64)
    return CocoDataset(
        image_ids=np.arange(1, num_i + 1), file_names=[f"{i}.jpg" for i in range(num_i)],
        widths=np.full(num_i, size[0]), heights=np.full(num_i, size[1]),
        category_ids=np.array([3, 8]), category_names=["box", "bag"], supercategories=["", ""],
        ann_ids=np.arange(1, num_a + 1), ann_image_index=np.repeat(np.arange(num_i), counts),
        labels=lab.astype(np.int64), boxes=boxes, areas=boxes[:, 2] * boxes[:, 3],
        iscrowd=np.concatenate(crowd) if crowd else np.zeros(num_a, bool))


def test_size_bins_follow_cocoeval_area_ranges() -> None:
    params = COCOeval(iouType="bbox").params      # reference: pycocotools cocoeval.py Params
    ranges = dict(zip(params.areaRngLbl, params.areaRng))
    rng = np.random.default_rng(0)
    areas = np.concatenate([rng.uniform(0, 20000, 500), [0.0, 32.0 ** 2, 96.0 ** 2, 1e6]])
    names = np.asarray(SIZE_BIN_LABELS)[size_bins(areas)]
    for area, name in zip(areas, names):
        lo, hi = ranges[name]
        assert lo <= area <= hi                   # always inside the COCOeval range of its name
        inside = [n for n in SIZE_BIN_LABELS if ranges[n][0] <= area <= ranges[n][1]]
        assert name in inside and (len(inside) == 1 or area in (32.0 ** 2, 96.0 ** 2))
    # COCOeval keeps both edges; we put an edge area in the larger bin
    assert names[-4:].tolist() == ["small", "medium", "large", "large"]


def test_group_pairs_enumerates_every_ordered_pair() -> None:
    sizes = [0, 1, 3, 5, 2, 0, 4]
    offsets = np.concatenate([[0], np.cumsum(sizes)])
    expected = {(a, b) for g in range(len(sizes)) for a, b in
                itertools.permutations(range(offsets[g], offsets[g + 1]), 2)}
    for chunk in (1, 4, 7, 1000):
        got = [(int(a), int(b)) for i, j in group_pairs(offsets, chunk=chunk) for a, b in zip(i, j)]
        assert len(got) == len(expected) and set(got) == expected


def test_max_iou_matches_torchvision_box_iou() -> None:
    rng = np.random.default_rng(1)
    per_image = []
    for n in rng.integers(0, 15, 40):
        xy = rng.uniform(0, 80, (n, 2))
        per_image.append(np.concatenate([xy, rng.uniform(2, 40, (n, 2))], axis=1))
    ds = _dataset(per_image)
    ov = pairwise_overlap(ds, chunk=50)           # small chunks: rows of one image cross chunk edges
    xyxy = ds.boxes_xyxy()
    for i in range(ds.num_images):
        s = ds.ann_slice(i)
        if s.stop - s.start < 2:
            assert (ov.max_iou[s] == 0).all()
            continue
        iou = box_iou(torch.tensor(xyxy[s]), torch.tensor(xyxy[s])).numpy()   # reference: torchvision.ops
        np.fill_diagonal(iou, 0)
        np.testing.assert_allclose(ov.max_iou[s], iou.max(axis=1), atol=1e-12)


def test_occlusion_counts_the_union_not_the_sum() -> None:
    box = np.array([[0, 0, 8, 8]])
    ds = _dataset([
        np.concatenate([box, [[0, 0, 4, 8], [0, 0, 4, 4]]]),     # half covered, the second occluder inside the first
        np.concatenate([box, [[0, 0, 4, 8], [4, 4, 4, 4]]]),     # half + a quarter
        np.concatenate([box, [[0, 0, 8, 8]]]),                   # a crowd region over it does not occlude
    ], crowd=[np.zeros(3, bool), np.zeros(3, bool), np.array([False, True])])
    occ = pairwise_overlap(ds).occlusion
    # by hand: union of the covers / box area (a sum of pairwise overlaps would give 0.75 in image 0)
    assert occ[[0, 3, 6]].tolist() == [0.5, 0.75, 0.0]


def test_occlusion_close_to_an_opencv_raster() -> None:
    rng = np.random.default_rng(2)
    per_image = [np.concatenate([rng.uniform(0, 60, (6, 2)), rng.uniform(5, 40, (6, 2))], axis=1)
                 for _ in range(10)]
    ds = _dataset(per_image)
    occ = pairwise_overlap(ds).occlusion
    xyxy = ds.boxes_xyxy()
    scale = 10                                    # raster at 0.1 px with cv2.rectangle (reference: OpenCV)
    errors = []
    for i in range(ds.num_images):
        s = ds.ann_slice(i)
        for a in range(s.start, s.stop):
            canvas = np.zeros((110 * scale, 110 * scale), np.uint8)
            for b in range(s.start, s.stop):
                if b != a:
                    x1, y1, x2, y2 = np.round(xyxy[b] * scale).astype(int)
                    cv2.rectangle(canvas, (x1, y1), (x2 - 1, y2 - 1), 255, thickness=-1)
            x1, y1, x2, y2 = np.round(xyxy[a] * scale).astype(int)
            errors.append(abs(canvas[y1:y2, x1:x2].mean() / 255 - occ[a]))
    # an 8 x 8 grid: each occluder edge misplaces at most one row or column of points (1/8)
    assert max(errors) <= 0.25 and np.mean(errors) < 0.05


def test_duplicates_point_to_the_earliest_same_class_box() -> None:
    b = [10, 10, 20, 20]
    ds = _dataset([np.array([b, [11, 10, 20, 20], b, [50, 50, 5, 5]]), np.array([b, b])],
                  labels=[np.array([0, 0, 0, 1]), np.array([0, 1])])
    ov = pairwise_overlap(ds)
    assert ov.dup_partner.tolist() == [-1, 0, 0, -1, -1, -1]        # other class or other image: no duplicate
    assert ov.dup_iou[2] == 1.0 and ov.dup_iou[1] == pytest.approx(19 * 20 / (21 * 20))


def test_truncation_is_the_share_of_perimeter_on_the_border() -> None:
    boxes = np.array([[10, 10, 20, 30], [0, 10, 20, 30], [0, 0, 20, 30], [0, 0, 100, 80], [90, 60, 20, 30]])
    got = truncation(boxes.astype(float), np.full(5, 100.0), np.full(5, 80.0))
    w, h = 20, 30
    np.testing.assert_allclose(got, [0, h / (2 * (w + h)), 0.5, 1.0, 0.5])   # worked by hand


def test_object_and_image_descriptors() -> None:
    ds = _dataset([np.array([[0, 0, 50, 25], [10, 10, 10, 10]]), np.zeros((0, 4)), np.array([[5, 5, 10, 10]])],
                  crowd=[np.array([False, False]), np.zeros(0, bool), np.array([True])])
    obj = object_descriptors(ds)
    np.testing.assert_allclose(obj["aspect"], [2.0, 1.0, 1.0])
    np.testing.assert_allclose(obj["elongation"], [2.0, 1.0, 1.0])
    np.testing.assert_allclose(obj["rel_size"], np.sqrt([1250 / 1e4, 100 / 1e4, 100 / 1e4]))
    np.testing.assert_allclose(obj["class_freq"], [1.0, 1.0, 1.0])    # two non-crowd boxes, one class
    assert obj["size_bin"].tolist() == ["medium", "small", "small"]
    img = image_descriptors(ds, obj["occlusion"].to_numpy())
    assert img["box_count"].tolist() == [2, 0, 0]                      # crowd regions are not counted
    assert img["crowding"][0] == pytest.approx(obj["occlusion"][:2].mean())
    assert img["resolution"].tolist() == [0.01] * 3
    assert img["blur_laplacian_var"].isna().all()


def test_pixel_descriptors_of_the_worked_square() -> None:
    img = np.zeros((64, 64), np.uint8)
    img[16:48, 16:48] = 255
    # CHECKS.md worked values, computed with OpenCV (cv2.Laplacian CV_64F, cv2.Canny(100, 200))
    assert laplacian_variance(img) == pytest.approx(4191.06, abs=0.01)
    assert edge_density(img) == pytest.approx(0.030273, abs=1e-6)


def test_pixel_descriptors_read_from_meta(tmp_path) -> None:
    pixel, usable = read_pixel_descriptors(tmp_path / "absent.npz", 3)
    assert np.isnan(pixel).all() and pixel.shape == (3, 4) and usable is None
    path = tmp_path / "meta.npz"
    np.savez(path, pixel=np.ones((3, 4), np.float32), usable=np.array([True, False, True]), scale=np.ones(3))
    pixel, usable = read_pixel_descriptors(path, 3)
    assert np.isnan(pixel[1]).all() and (pixel[[0, 2]] == 1).all()
    with pytest.raises(ValueError, match=r"meta\.npz: field 'pixel' has shape \(3, 4\)"):
        read_pixel_descriptors(path, 5)


def test_feature_map_matches_pca_and_distance_finds_flipped_digits() -> None:
    digits = load_digits()          # real images bundled with scikit-learn (UCI optical digits, 1998)
    x, y = digits.data.astype(np.float32), digits.target.copy()
    rng = np.random.default_rng(0)
    flipped = rng.choice(len(y), 60, replace=False)
    y[flipped] = (y[flipped] + rng.integers(1, 10, 60)) % 10
    boxes = np.tile([0.0, 0.0, 8.0, 8.0], (len(y), 1))
    ds = _dataset([boxes], size=(8, 8))
    ds.labels = y.astype(np.int64)
    ds.category_ids, ds.category_names = np.arange(10), [str(d) for d in range(10)]
    out = feature_descriptors(x, ds)
    # reference: scikit-learn PCA on the standardised features, same axes up to sign
    z = (x - x.mean(0)) / np.where(x.std(0) > 0, x.std(0), 1)
    ref = PCA(n_components=2, svd_solver="full").fit_transform(z)
    for k, col in enumerate(["map_x", "map_y"]):
        sign = np.sign(np.dot(ref[:, k], out[col]))
        np.testing.assert_allclose(out[col], sign * ref[:, k], atol=1e-3)
    is_flipped = np.zeros(len(y), bool)
    is_flipped[flipped] = True
    assert roc_auc_score(is_flipped, out["feature_dist"]) > 0.9     # mislabelled digits sit far from their class


def test_features_with_wrong_rows_are_refused() -> None:
    ds = _dataset([np.array([[0, 0, 5, 5]] * 3)])
    with pytest.raises(ValueError, match=r"shape \(2, 4\); expected \[3, D\]"):
        feature_descriptors(np.zeros((2, 4), np.float32), ds)
    assert feature_descriptors(None, ds)["feature_dist"].isna().all()
