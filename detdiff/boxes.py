"""Box geometry shared by every stage: pure numpy functions on whole arrays, shapes in the docstrings.

COCO xywh is converted to ``[x1, y1, x2, y2]`` with :func:`xywh_to_xyxy`; same-group pairs (boxes of one
image, or of one image and class) are enumerated in bounded chunks by :func:`group_pairs` and compared
with :func:`pair_iou`, so no stage needs a Python loop over boxes or a full IoU matrix per image.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

#: A detection that covers at least this share of its own area with an annotated box of its image is a view of
#: that box (the part a tile border cut off, a limb, a wheel), not an unannotated object.
PART_OF_BOX = 0.5

#: Pairs generated per chunk: bounds memory to a few hundred MB whatever the box count per group.
PAIR_CHUNK = 2_000_000


def xywh_to_xyxy(boxes: np.ndarray) -> np.ndarray:
    """``[..., 4]`` xywh -> ``[..., 4]`` xyxy."""
    boxes = np.asarray(boxes, dtype=np.float64)
    return np.concatenate([boxes[..., :2], boxes[..., :2] + boxes[..., 2:]], axis=-1)


def xyxy_to_xywh(boxes: np.ndarray) -> np.ndarray:
    """``[..., 4]`` xyxy -> ``[..., 4]`` xywh."""
    boxes = np.asarray(boxes, dtype=np.float64)
    return np.concatenate([boxes[..., :2], boxes[..., 2:] - boxes[..., :2]], axis=-1)


def group_offsets(sorted_keys: np.ndarray) -> np.ndarray:
    """Offsets ``[G+1]`` of the runs of equal values in a sorted key array ``[N]`` (for :func:`group_pairs`)."""
    keys = np.asarray(sorted_keys)
    if not len(keys):
        return np.zeros(1, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    return np.r_[starts, len(keys)].astype(np.int64)


def group_pairs(offsets: np.ndarray, *, chunk: int = PAIR_CHUNK) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Yield ``(rows_i, rows_j)`` int64 arrays of every ordered pair i != j of rows in the same group.

    ``offsets [G+1]`` (starting at 0): rows ``offsets[g]:offsets[g+1]`` form group g. Pairs come ordered
    by i, then j, in chunks of about ``chunk`` pairs; a row's pairs never span two chunks.
    """
    offsets = np.asarray(offsets, dtype=np.int64)
    sizes = np.diff(offsets)
    num_rows = int(offsets[-1])
    if num_rows == 0:
        return
    group_of_row = np.repeat(np.arange(len(sizes)), sizes)
    partners = sizes[group_of_row]                       # pairs of row r, self included: [R]
    row_start = offsets[group_of_row]
    cum = np.cumsum(partners)
    first = 0
    while first < num_rows:
        base = cum[first - 1] if first else 0
        last = max(int(np.searchsorted(cum, base + chunk, side="right")), first + 1)
        rows = np.arange(first, last)
        counts = partners[first:last]
        rows_i = np.repeat(rows, counts)
        starts = np.cumsum(counts) - counts
        rows_j = np.repeat(row_start[first:last] - starts, counts) + np.arange(len(rows_i))
        keep = rows_i != rows_j
        yield rows_i[keep], rows_j[keep]
        first = last


def cross_group_pairs(group_a: np.ndarray, group_b: np.ndarray, *,
                      chunk: int = PAIR_CHUNK) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Yield ``(rows_a, rows_b)`` int64 arrays of every pair of a row of ``a`` and a row of ``b`` with the same
    group key (``group_a [N]``, ``group_b [M]``: non-negative ints, e.g. image rows), in chunks of about
    ``chunk`` pairs; a row of ``a`` never spans two chunks. The pairs of :func:`group_pairs` across two sets."""
    group_a, group_b = np.asarray(group_a, np.int64), np.asarray(group_b, np.int64)
    if not len(group_a) or not len(group_b):
        return
    counts_b = np.bincount(group_b, minlength=int(max(group_a.max(), group_b.max())) + 1)
    start_b = np.cumsum(counts_b) - counts_b
    order_b = np.argsort(group_b, kind="stable")
    partners = counts_b[group_a]
    cum = np.cumsum(partners)
    first = 0
    while first < len(group_a):
        base = cum[first - 1] if first else 0
        last = max(int(np.searchsorted(cum, base + chunk, side="right")), first + 1)
        counts = partners[first:last]
        yield (np.repeat(np.arange(first, last, dtype=np.int64), counts),
               order_b[concatenated_ranges(start_b[group_a[first:last]], counts)])
        first = last


def concatenated_ranges(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """``[starts[0], ..., starts[0] + counts[0] - 1, starts[1], ...]`` (int64): the rows of several contiguous groups,
    group by group, without a Python loop."""
    starts, counts = np.asarray(starts, np.int64), np.asarray(counts, np.int64)
    offsets = np.cumsum(counts) - counts
    return np.repeat(starts - offsets, counts) + np.arange(int(counts.sum()), dtype=np.int64)


def pair_iou(boxes_xyxy: np.ndarray, rows_i: np.ndarray, rows_j: np.ndarray) -> np.ndarray:
    """IoU of ``boxes_xyxy[rows_i]`` with ``boxes_xyxy[rows_j]`` elementwise ``[P]`` (definition as in
    torchvision.ops.box_iou, without the full matrix); 0 where the union is empty."""
    a, b = boxes_xyxy[rows_i], boxes_xyxy[rows_j]
    iw = np.clip(np.minimum(a[:, 2], b[:, 2]) - np.maximum(a[:, 0], b[:, 0]), 0, None)
    ih = np.clip(np.minimum(a[:, 3], b[:, 3]) - np.maximum(a[:, 1], b[:, 1]), 0, None)
    inter = iw * ih
    area_a = (a[:, 2] - a[:, 0]) * (a[:, 3] - a[:, 1])
    area_b = (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1])
    union = area_a + area_b - inter
    return np.divide(inter, union, out=np.zeros_like(inter), where=union > 0)


def best_overlaps(ann_xyxy: np.ndarray, image_offsets: np.ndarray, image_index: np.ndarray,
                  boxes_xywh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per box (``boxes_xywh [n, 4]`` original px of images ``image_index [n]``), its largest IoU with an annotated
    box of its image and the largest share of its own area inside one (float64 ``[n]`` each); ``ann_xyxy [A, 4]``
    are the dataset's boxes, image ``i``'s at ``image_offsets[i]:image_offsets[i + 1]`` (a zero box overlaps
    nothing)."""
    image_index = np.asarray(image_index, np.int64)
    count = image_offsets[image_index + 1] - image_offsets[image_index]
    det = np.repeat(np.concatenate([boxes_xywh[:, :2], boxes_xywh[:, :2] + boxes_xywh[:, 2:]], axis=1), count, axis=0)
    ann = ann_xyxy[concatenated_ranges(image_offsets[image_index], count)]
    inter = np.prod(np.clip(np.minimum(det[:, 2:], ann[:, 2:]) - np.maximum(det[:, :2], ann[:, :2]), 0, None), axis=1)
    area_d = np.prod(det[:, 2:] - det[:, :2], axis=1)
    area_a = np.prod(ann[:, 2:] - ann[:, :2], axis=1)
    union = area_d + area_a - inter
    owner = np.repeat(np.arange(len(image_index)), count)
    iou, share = np.zeros(len(image_index)), np.zeros(len(image_index))
    np.maximum.at(iou, owner, np.divide(inter, union, out=np.zeros_like(inter), where=union > 0))
    np.maximum.at(share, owner, inter / np.maximum(area_d, 1e-9))
    return iou, share


def parts_of_boxes(ann_xyxy: np.ndarray, image_offsets: np.ndarray, image_index: np.ndarray,
                   boxes_xywh: np.ndarray, min_share: float = PART_OF_BOX) -> np.ndarray:
    """bool ``[n]``: detections lying mostly inside an annotated box of their image (intersection over the
    detection's area >= ``min_share``; arguments as :func:`best_overlaps`)."""
    return best_overlaps(ann_xyxy, image_offsets, image_index, boxes_xywh)[1] >= min_share


def overlaps_objects(ann_xyxy: np.ndarray, image_offsets: np.ndarray, image_index: np.ndarray,
                     boxes_xywh: np.ndarray, min_iou: float) -> np.ndarray:
    """bool ``[n]``: boxes with IoU >= ``min_iou`` with an annotated box of their image (arguments as
    :func:`best_overlaps`)."""
    return best_overlaps(ann_xyxy, image_offsets, image_index, boxes_xywh)[0] >= min_iou
