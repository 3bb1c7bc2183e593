"""Descriptors: what each annotated box and each image look like, measured from the annotations.

These are the candidate *causes* that :mod:`detdiff.analysis.causes` links to the difficulty scores.

Per object (rows = CocoDataset annotation index, ``[A]``):
    area          the annotation's ``area`` field (COCO size bins use it, not w*h)
    size_bin      "small" | "medium" | "large" (see :func:`size_bins`)
    rel_size      sqrt(box w*h / image W*H): the box's linear size relative to the image
    aspect        w / h;  elongation = max(w/h, h/w) (>= 1, for statistics where both sides are extreme)
    max_iou       largest IoU with another non-crowd box of the same image
    occlusion     share of the box covered by the union of the other non-crowd boxes of the image
    truncation    share of the box's perimeter lying on (or beyond) the image border
    class_freq    share of all non-crowd annotations that carry this object's class
Per image (rows = image index, ``[I]``):
    box_count     non-crowd annotations;  crowding = mean occlusion of those boxes
    resolution    megapixels (W*H / 1e6)
    pixel descriptors (blur, brightness, contrast, clutter) read from the image cache's ``meta.npz``

Pairwise work (IoU, occlusion, duplicates) never loops over boxes: rows are sorted by image, every ordered
pair (i, j) of one image is generated with ``np.repeat`` arithmetic in bounded chunks, and per-box results
are reduced with ``ufunc.reduceat`` over the pairs of each box. Cost is sum over images of n_i^2 pairs.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse

from detdiff.boxes import PAIR_CHUNK, group_pairs, pair_iou
from detdiff.data.coco import CocoDataset
from detdiff.data.pixel_descriptors import PIXEL_DESCRIPTOR_NAMES

#: Area edges of the COCO size bins (pycocotools ``COCOeval().params.areaRng``: small [0, 32^2],
#: medium [32^2, 96^2], large [96^2, 1e10]). COCOeval keeps both edges in both neighbouring ranges; our
#: bins are half-open on the right, so an area of exactly 32^2 is "medium" and exactly 96^2 is "large".
SIZE_BIN_EDGES: tuple[float, float] = (32.0 ** 2, 96.0 ** 2)
SIZE_BIN_LABELS: tuple[str, str, str] = ("small", "medium", "large")

#: Occlusion is measured on a grid of OCCLUSION_GRID x OCCLUSION_GRID sample points (cell centres) inside
#: each box: 8 x 8 = 64 points fit one uint64 bit mask, so the union over occluders is a bitwise OR.
OCCLUSION_GRID = 8

#: A box side within this many pixels of the image border counts as touching it.
BORDER_TOLERANCE_PX = 1.0

def size_bins(areas: np.ndarray) -> np.ndarray:
    """COCO size bin index per area ``[N]``: 0 small (< 32^2), 1 medium (< 96^2), 2 large.

    Names are ``SIZE_BIN_LABELS[index]``. Bins follow pycocotools' ``areaRng`` with the lower edge
    inclusive (see :data:`SIZE_BIN_EDGES`).
    """
    return np.searchsorted(np.asarray(SIZE_BIN_EDGES), np.asarray(areas, dtype=np.float64), side="right")


def _grid_span_bits(lo: np.ndarray, hi: np.ndarray, start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Bit mask (uint64, bits 0..K-1) of the grid points of a box side ``[start, start+length]`` that lie in
    ``[lo, hi]``. Grid point c sits at ``start + (c + 0.5) * length / K`` (length > 0)."""
    k = OCCLUSION_GRID
    first = np.clip(np.ceil((lo - start) * k / length - 0.5), 0, k)           # first point inside
    end = np.clip(np.floor((hi - start) * k / length - 0.5) + 1, 0, k)        # one past the last point inside
    end = end.astype(np.uint64)
    first = np.minimum(first.astype(np.uint64), end)
    one = np.uint64(1)
    return (one << end) - (one << first)


#: SPREAD[b] puts bit r of the byte b into byte r of a uint64 (0x01 there): row mask -> 8x8 layout.
_SPREAD = np.array([sum(1 << (8 * r) for r in range(8) if b >> r & 1) for b in range(256)], dtype=np.uint64)


def _coverage_masks(boxes_xyxy: np.ndarray, rows_i: np.ndarray, rows_j: np.ndarray) -> np.ndarray:
    """uint64 ``[P]``: bit ``r*8 + c`` set when grid point (row r, column c) of box i lies inside box j."""
    a, b = boxes_xyxy[rows_i], boxes_xyxy[rows_j]
    xbits = _grid_span_bits(b[:, 0], b[:, 2], a[:, 0], a[:, 2] - a[:, 0])
    ybits = _grid_span_bits(b[:, 1], b[:, 3], a[:, 1], a[:, 3] - a[:, 1])
    return _SPREAD[ybits.astype(np.intp)] * xbits          # each byte of SPREAD is 0 or 1: no carries


@dataclass
class PairwiseOverlap:
    """Per-box results of the same-image pair pass, rows = annotation index ``[A]``."""

    max_iou: np.ndarray          # float64: largest IoU with another non-crowd box of the image (0 if none)
    occlusion: np.ndarray        # float64: share of grid points covered by other non-crowd boxes
    dup_iou: np.ndarray          # float64: largest IoU with an *earlier* (lower row) same-class box, 0 if none
    dup_partner: np.ndarray      # int64: row of that earlier box, -1 if none


def pairwise_overlap(dataset: CocoDataset, *, chunk: int = PAIR_CHUNK) -> PairwiseOverlap:
    """Same-image overlaps of every annotation, vectorised over pairs (see module docstring).

    Crowd annotations are never "other" boxes (they mark regions of many objects, not one occluder) and
    never duplicates. Rows within an image are sorted by annotation id, so "earlier" = lower id.
    """
    num = dataset.num_annotations
    boxes = dataset.boxes_xyxy()
    crowd = dataset.iscrowd
    labels = dataset.labels
    max_iou = np.zeros(num)
    cover = np.zeros(num, dtype=np.uint64)
    dup_iou = np.zeros(num)
    dup_partner = np.full(num, -1, dtype=np.int64)
    for rows_i, rows_j in group_pairs(dataset.image_offsets, chunk=chunk):
        other = ~crowd[rows_j]
        rows_i, rows_j = rows_i[other], rows_j[other]
        if not len(rows_i):
            continue
        iou = pair_iou(boxes, rows_i, rows_j)
        masks = _coverage_masks(boxes, rows_i, rows_j)
        starts = np.flatnonzero(np.r_[True, rows_i[1:] != rows_i[:-1]])
        owners = rows_i[starts]
        max_iou[owners] = np.maximum.reduceat(iou, starts)
        cover[owners] = np.bitwise_or.reduceat(masks, starts)
        dup = np.where((rows_j < rows_i) & (labels[rows_j] == labels[rows_i]) & ~crowd[rows_i], iou, 0.0)
        best = np.maximum.reduceat(dup, starts)
        dup_iou[owners] = best
        is_best = (dup > 0) & (dup == np.repeat(best, np.diff(np.r_[starts, len(rows_i)])))
        partner = np.where(is_best, rows_j, np.iinfo(np.int64).max)
        first_best = np.minimum.reduceat(partner, starts)
        dup_partner[owners] = np.where(best > 0, first_best, -1)
    occlusion = np.bitwise_count(cover).astype(np.float64) / OCCLUSION_GRID ** 2
    return PairwiseOverlap(max_iou=max_iou, occlusion=occlusion, dup_iou=dup_iou, dup_partner=dup_partner)


def truncation(boxes_xywh: np.ndarray, widths: np.ndarray, heights: np.ndarray,
               tolerance: float = BORDER_TOLERANCE_PX) -> np.ndarray:
    """Share of each box's perimeter on or beyond the image border ``[N]`` (0 inside .. 0.5 in a corner .. 1).

    A side counts when it lies within ``tolerance`` px of the border or outside it: an object cut by the
    image edge is annotated with a box that touches that edge. Weighting sides by length makes a box cut
    along its long side count more than one that just grazes the border with its short side.
    """
    x, y, w, h = (boxes_xywh[:, k] for k in range(4))
    left = x <= tolerance
    top = y <= tolerance
    right = x + w >= widths - tolerance
    bottom = y + h >= heights - tolerance
    return (h * (left.astype(float) + right) + w * (top.astype(float) + bottom)) / (2.0 * (w + h))


def object_descriptors(dataset: CocoDataset, overlap: PairwiseOverlap | None = None) -> pd.DataFrame:
    """Box descriptors per annotation (rows = annotation index); columns as in the module docstring."""
    if overlap is None:
        overlap = pairwise_overlap(dataset)
    img = dataset.ann_image_index
    widths = dataset.widths[img].astype(np.float64)
    heights = dataset.heights[img].astype(np.float64)
    w, h = dataset.boxes[:, 2], dataset.boxes[:, 3]
    aspect = w / h
    counted = ~dataset.iscrowd
    class_counts = np.bincount(dataset.labels[counted], minlength=dataset.num_classes)
    class_freq = class_counts[dataset.labels] / max(1, int(counted.sum()))
    return pd.DataFrame({
        "area": dataset.areas,
        "size_bin": np.asarray(SIZE_BIN_LABELS)[size_bins(dataset.areas)],
        "rel_size": np.sqrt(w * h / (widths * heights)),
        "aspect": aspect,
        "elongation": np.maximum(aspect, 1.0 / aspect),
        "max_iou": overlap.max_iou,
        "occlusion": overlap.occlusion,
        "truncation": truncation(dataset.boxes, widths, heights),
        "class_freq": class_freq,
    })


def read_pixel_descriptors(meta_path: str | Path, num_images: int) -> tuple[np.ndarray, np.ndarray | None]:
    """``pixel [I, 4]`` (NaN for unusable images) and ``usable [I]`` from the cache's ``meta.npz``.

    A missing file gives all-NaN descriptors and ``usable = None`` (unknown).
    """
    meta_path = Path(meta_path)
    if not meta_path.exists():
        return np.full((num_images, len(PIXEL_DESCRIPTOR_NAMES)), np.nan), None
    with np.load(meta_path) as meta:
        for key in ("pixel", "usable"):
            if key not in meta:
                raise ValueError(f"{meta_path}: field '{key}' is missing (expected pixel [I, 4] and usable [I])")
        pixel = np.asarray(meta["pixel"], dtype=np.float64)
        usable = np.asarray(meta["usable"], dtype=bool)
    if pixel.shape != (num_images, len(PIXEL_DESCRIPTOR_NAMES)) or usable.shape != (num_images,):
        raise ValueError(f"{meta_path}: field 'pixel' has shape {pixel.shape} and 'usable' {usable.shape}; "
                         f"the dataset has {num_images} images (expected [{num_images}, "
                         f"{len(PIXEL_DESCRIPTOR_NAMES)}] and [{num_images}])")
    pixel[~usable] = np.nan
    return pixel, usable


def image_descriptors(dataset: CocoDataset, occlusion: np.ndarray, pixel: np.ndarray | None = None) -> pd.DataFrame:
    """Per-image descriptors (rows = image index): box_count, crowding, pixel descriptors, resolution.

    ``occlusion [A]`` from :func:`pairwise_overlap`; ``pixel [I, 4]`` in ``PIXEL_DESCRIPTOR_NAMES`` order
    (NaN when absent).
    """
    counted = ~dataset.iscrowd
    img = dataset.ann_image_index
    box_count = np.bincount(img[counted], minlength=dataset.num_images)
    occ_sum = np.bincount(img[counted], weights=occlusion[counted], minlength=dataset.num_images)
    crowding = occ_sum / np.maximum(box_count, 1)
    if pixel is None:
        pixel = np.full((dataset.num_images, len(PIXEL_DESCRIPTOR_NAMES)), np.nan)
    table = pd.DataFrame({"box_count": box_count, "crowding": crowding})
    for k, name in enumerate(PIXEL_DESCRIPTOR_NAMES):
        table[name] = pixel[:, k]
    table["resolution"] = dataset.widths.astype(np.float64) * dataset.heights / 1e6
    return table


def standardize(features: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """z-score each feature column over the ``valid`` rows ``[A, D]`` (float32); invalid rows become NaN."""
    feats = np.asarray(features, dtype=np.float32)
    mean = feats[valid].mean(axis=0, dtype=np.float64)
    std = feats[valid].std(axis=0, dtype=np.float64)
    z = (feats - mean.astype(np.float32)) / np.where(std > 0, std, 1.0).astype(np.float32)
    z[~valid] = np.nan
    return z


def class_centroid_distance(z: np.ndarray, labels: np.ndarray, valid: np.ndarray, num_classes: int) -> np.ndarray:
    """Cosine distance (1 - cos) of each row of standardised features ``z [A, D]`` to its class centroid
    (mean of the valid rows of that class) ``[A]``; NaN for invalid rows."""
    rows = np.flatnonzero(valid)
    zr = z[rows]
    onehot = scipy.sparse.csr_matrix((np.ones(len(rows), dtype=np.float32), (labels[rows], np.arange(len(rows)))),
                                     shape=(num_classes, len(rows)))
    counts = np.bincount(labels[rows], minlength=num_classes)
    centroids = np.asarray(onehot @ zr, dtype=np.float64) / np.maximum(counts, 1)[:, None]
    c = centroids[labels[rows]].astype(np.float32)
    denom = np.linalg.norm(zr, axis=1) * np.linalg.norm(c, axis=1)
    dot = np.einsum("ij,ij->i", zr, c)
    cos = np.divide(dot, denom, out=np.zeros(len(rows), dtype=np.float32), where=denom > 0)
    dist = np.full(len(labels), np.nan)
    dist[rows] = 1.0 - cos
    return dist


def pca_map(z: np.ndarray, valid: np.ndarray, components: int = 2, *, chunk: int = 65536) -> np.ndarray:
    """Project the valid rows of ``z [A, D]`` on their first principal axes ``[A, components]`` (NaN rows
    stay NaN). Axes come from the SVD of the D x D scatter matrix of the centred rows (the same axes as an
    SVD of the centred data, without an A x D decomposition), accumulated in float64 chunks; each axis is
    signed so its largest loading is positive."""
    x = z[valid]
    mean = x.mean(axis=0, dtype=np.float64)
    scatter = np.zeros((x.shape[1], x.shape[1]))
    for start in range(0, len(x), chunk):
        part = x[start:start + chunk].astype(np.float64) - mean
        scatter += part.T @ part
    _, _, vt = np.linalg.svd(scatter)
    axes = vt[:components]
    sign = np.sign(axes[np.arange(len(axes)), np.abs(axes).argmax(axis=1)])
    axes = axes * sign[:, None]
    out = np.full((len(z), components), np.nan)
    out[valid] = (x - mean.astype(np.float32)) @ axes.T.astype(np.float32)
    return out


def feature_descriptors(features: np.ndarray | None, dataset: CocoDataset) -> pd.DataFrame:
    """feature_dist, map_x, map_y per annotation from pooled detector features ``[A, D]`` (NaN rows allowed).

    Crowd rows and rows with any non-finite value are left out (NaN). ``features=None`` gives NaN columns.
    """
    num = dataset.num_annotations
    nan = np.full(num, np.nan)
    if features is None:
        return pd.DataFrame({"feature_dist": nan, "map_x": nan, "map_y": nan.copy()})
    if features.ndim != 2 or len(features) != num:
        raise ValueError(f"object features have shape {features.shape}; expected [{num}, D] "
                         f"(one row per annotation of the dataset)")
    valid = np.isfinite(features).all(axis=1) & ~dataset.iscrowd
    if valid.sum() < 3:
        return pd.DataFrame({"feature_dist": nan, "map_x": nan, "map_y": nan.copy()})
    z = standardize(features, valid)
    dist = class_centroid_distance(z, dataset.labels, valid, dataset.num_classes)
    xy = pca_map(z, valid)
    return pd.DataFrame({"feature_dist": dist, "map_x": xy[:, 0], "map_y": xy[:, 1]})
