"""The views the detector trains on: each image's whole letterboxed view, and tiles where its small boxes need them.

Every image has its **whole view** (``S x S``, view px per original px ``L = S / max(w, h)``); view ``i`` is image
row ``i``. A box of ``sqrt(w h) L`` px under ``min_object_px`` is too small for the detector to judge there
(common practice: objects under about 16 px are hard for any detector). An image with such boxes also gets
**tiles**: ``S x S`` windows of the image enlarged by its tile scale ``s = min(cap, min_object_px / q)``, ``q`` the
side of its smallest such box, so that box is ``min_object_px`` across in a tile (``cap``, ``data.tile_scale``, is
chosen by the recipe within the time budget; ``2`` lets an 8 px box reach 16 px). Tiles lie on a grid over the
enlarged image, :data:`TILE_OVERLAP` of ``S`` apart from their neighbours' edges (the last row and column flush
with the image's edge), and an image gets them only when ``s`` is at least :data:`MIN_TILE_GAIN` times ``L``.
View ``I + t`` is tile ``t``; tiles are in image order.

**Each annotation is logged once**, by its *owner* view: the tile that shows the largest share of it (the first on a
tie) when it is small in the whole view and that share is at least :data:`MIN_OWNED_SHARE`, else the whole view.
Tiles that own no box are dropped (they would cost time and judge nothing). Every view trains on every box it
shows at least :data:`MIN_VISIBLE` of (clipped to the view; a box cut by a tile border is trained as the part the
tile shows), and only the owner's losses are logged for it, so every logged loss maps to one annotation id.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from detdiff.boxes import concatenated_ranges
from detdiff.data.coco import CocoDataset

#: Overlap of neighbouring tiles, as a share of the tile side: a box of up to this many tile px fits whole in one.
TILE_OVERLAP = 0.125
#: An image gets tiles only when its tile scale is at least this many times its whole view's.
MIN_TILE_GAIN = 1.25
#: A small box is logged by a tile only when that tile shows at least this share of its area.
MIN_OWNED_SHARE = 0.5
#: A view trains on a box when it shows at least this share of its area.
MIN_VISIBLE = 0.3


@dataclass
class TileGrid:
    """The tiles of a dataset: ``image`` int64 ``[T]`` image row, ``origin`` float64 ``[T, 2]`` original px of the top-left
    corner, ``scale`` float64 ``[T]`` tile px per original px, ``size`` the tile side in px. Tiles are in image order."""

    image: np.ndarray
    origin: np.ndarray
    scale: np.ndarray
    size: int

    @property
    def num_tiles(self) -> int:
        return int(len(self.image))

    @classmethod
    def empty(cls, size: int) -> TileGrid:
        return cls(np.zeros(0, np.int64), np.zeros((0, 2), np.float64), np.zeros(0, np.float64), int(size))

    def take(self, rows: np.ndarray) -> TileGrid:
        return TileGrid(self.image[rows], self.origin[rows], self.scale[rows], self.size)

    def extent(self, tiles: np.ndarray) -> np.ndarray:
        """Side of each of ``tiles`` in original px."""
        return self.size / self.scale[tiles]


def whole_view_scale(dataset: CocoDataset, image_size: int) -> np.ndarray:
    """``L = S / max(w, h)`` per image (float64 ``[I]``): view px per original px of the whole view."""
    return image_size / np.maximum(dataset.widths, dataset.heights).astype(np.float64)


def _box_sides(dataset: CocoDataset) -> np.ndarray:
    return np.sqrt(np.maximum(dataset.boxes[:, 2] * dataset.boxes[:, 3], 0.0))


def _grid(widths: np.ndarray, heights: np.ndarray, scale: np.ndarray, images: np.ndarray, size: int) -> TileGrid:
    """Every grid tile of ``images`` (rows) at ``scale [len(images)]`` (module docstring), in image order."""
    step = size - int(round(TILE_OVERLAP * size))
    span_w = np.round(widths[images] * scale).astype(np.int64)       # the enlarged image, px
    span_h = np.round(heights[images] * scale).astype(np.int64)
    nx = np.where(span_w <= size, 1, -(-(span_w - size) // step) + 1)
    ny = np.where(span_h <= size, 1, -(-(span_h - size) // step) + 1)
    count = nx * ny
    owner = np.repeat(np.arange(len(images)), count)
    local = concatenated_ranges(np.zeros(len(count), np.int64), count)
    kx, ky = local % nx[owner], local // nx[owner]
    x0 = np.minimum(kx * step, np.maximum(span_w[owner] - size, 0))
    y0 = np.minimum(ky * step, np.maximum(span_h[owner] - size, 0))
    s = scale[owner]
    return TileGrid(images[owner].astype(np.int64), np.stack([x0 / s, y0 / s], axis=1), s.astype(np.float64), size)


def _visible(boxes_xyxy: np.ndarray, origin: np.ndarray, extent: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Boxes clipped to windows ``[origin, origin + extent]`` (original px, per row) and the share of each box's area
    inside."""
    low = np.concatenate([origin, origin], axis=1)
    high = low + extent[:, None]
    clipped = np.clip(boxes_xyxy, low, high)
    inner = np.maximum(clipped[:, 2] - clipped[:, 0], 0) * np.maximum(clipped[:, 3] - clipped[:, 1], 0)
    area = (boxes_xyxy[:, 2] - boxes_xyxy[:, 0]) * (boxes_xyxy[:, 3] - boxes_xyxy[:, 1])
    return clipped, np.where(area > 0, inner / np.maximum(area, 1e-12), 0.0)


def _pairs(dataset: CocoDataset, rows: np.ndarray, grid: TileGrid) -> tuple[np.ndarray, np.ndarray]:
    """Every (annotation row, tile) pair of ``rows`` with the tiles of the annotation's image, grouped by row."""
    first = np.searchsorted(grid.image, np.arange(dataset.num_images), side="left")
    last = np.searchsorted(grid.image, np.arange(dataset.num_images), side="right")
    image = dataset.ann_image_index[rows]
    count = last[image] - first[image]
    pair_row = np.repeat(rows, count)
    pair_tile = concatenated_ranges(first[image], count)
    return pair_row, pair_tile


def _owners(dataset: CocoDataset, grid: TileGrid, small: np.ndarray) -> np.ndarray:
    """Per annotation row, the tile that logs it (``-1``: its whole view); ``small`` marks the rows that may go to a
    tile (non-crowd, under ``min_object_px`` in the whole view)."""
    owner = np.full(dataset.num_annotations, -1, dtype=np.int64)
    rows = np.flatnonzero(small)
    if grid.num_tiles == 0 or len(rows) == 0:
        return owner
    pair_row, pair_tile = _pairs(dataset, rows, grid)
    if len(pair_row) == 0:
        return owner
    _, share = _visible(dataset.boxes_xyxy()[pair_row], grid.origin[pair_tile], grid.extent(pair_tile))
    order = np.lexsort((pair_tile, -share, pair_row))                 # per row: largest share first, then first tile
    pair_row, pair_tile, share = pair_row[order], pair_tile[order], share[order]
    best = np.flatnonzero(np.r_[True, pair_row[1:] != pair_row[:-1]])
    keep = best[share[best] >= MIN_OWNED_SHARE]
    owner[pair_row[keep]] = pair_tile[keep]
    return owner


def small_boxes(dataset: CocoDataset, image_size: int, min_object_px: float) -> np.ndarray:
    """bool ``[A]``: non-crowd boxes under ``min_object_px`` across (``sqrt(w h)``) in their whole view."""
    side = _box_sides(dataset) * whole_view_scale(dataset, image_size)[dataset.ann_image_index]
    return ~dataset.iscrowd & (side < float(min_object_px)) & (dataset.boxes[:, 2:] > 0).all(axis=1)


def plan_tiles(dataset: CocoDataset, image_size: int, cap: float, min_object_px: float,
               usable: np.ndarray | None = None) -> tuple[TileGrid, np.ndarray]:
    """The tiles of ``dataset`` at tile scales up to ``cap`` (module docstring) and each annotation's owner tile
    (``int64 [A]``, ``-1`` = its whole view). ``cap <= 0`` gives no tiles. ``usable`` (bool ``[I]``) leaves out the
    images that cannot be decoded."""
    small = small_boxes(dataset, image_size, min_object_px)
    if cap <= 0 or not small.any():
        return TileGrid.empty(image_size), np.full(dataset.num_annotations, -1, dtype=np.int64)
    smallest = np.full(dataset.num_images, np.inf)
    np.minimum.at(smallest, dataset.ann_image_index[small], np.maximum(_box_sides(dataset)[small], 1e-3))
    scale = np.minimum(float(cap), float(min_object_px) / smallest)
    wanted = np.isfinite(smallest) & (scale >= MIN_TILE_GAIN * whole_view_scale(dataset, image_size))
    if usable is not None:
        wanted &= np.asarray(usable, bool)
    images = np.flatnonzero(wanted)
    grid = _grid(dataset.widths.astype(np.float64), dataset.heights.astype(np.float64), scale[images], images,
                 int(image_size))
    owner = _owners(dataset, grid, small & wanted[dataset.ann_image_index])
    kept = np.unique(owner[owner >= 0])
    renumber = np.full(grid.num_tiles + 1, -1, dtype=np.int64)
    renumber[kept] = np.arange(len(kept))
    return grid.take(kept), renumber[owner]


def tile_pixels(image_rgb: np.ndarray, declared_w: int, declared_h: int, grid: TileGrid, size: int,
                pad_value: int) -> np.ndarray:
    """``uint8 [n, S, S, 3]``: the tiles of one image (``grid`` holds only that image's tiles, all of one scale) cut
    from its decoded pixels ``image_rgb`` (any resolution of the declared ``declared_w x declared_h`` image).

    The image is resized once to the tiles' scale (OpenCV's area interpolation when shrinking, bilinear when
    enlarging) and each tile is a slice of it at whole px, padded with ``pad_value`` past the image's edge.
    """
    out = np.full((grid.num_tiles, size, size, 3), pad_value, dtype=np.uint8)
    if grid.num_tiles == 0:
        return out
    s = float(grid.scale[0])
    span_w, span_h = int(round(declared_w * s)), int(round(declared_h * s))
    h, w = image_rgb.shape[:2]
    enlarged = cv2.resize(image_rgb, (span_w, span_h),
                          interpolation=cv2.INTER_AREA if span_w * span_h < w * h else cv2.INTER_LINEAR)
    corners = np.round(grid.origin * s).astype(np.int64)
    for k, (x0, y0) in enumerate(corners):           # the image's few tiles, not boxes
        part = enlarged[y0:y0 + size, x0:x0 + size]
        out[k, :part.shape[0], :part.shape[1]] = part
    return out


@dataclass
class ViewTable:
    """Every view the detector trains on (whole views, then tiles) and the boxes each trains on.

    ``image`` / ``origin`` / ``scale`` per view ``[V]``; targets of view ``v`` are ``offsets[v]:offsets[v + 1]`` of
    ``target_row`` (annotation rows), ``target_box`` (float32 xyxy view px, clipped to the view) and ``target_logged``
    (this view is the annotation's owner). ``owner [A]`` is each annotation's logging view (``-1`` for crowd boxes).
    """

    num_images: int
    image: np.ndarray
    origin: np.ndarray
    scale: np.ndarray
    offsets: np.ndarray
    target_row: np.ndarray
    target_box: np.ndarray
    target_logged: np.ndarray
    owner: np.ndarray

    @property
    def num_views(self) -> int:
        return int(len(self.image))

    def usable_views(self, usable_images: np.ndarray) -> np.ndarray:
        """Views of usable images, ascending (int64)."""
        return np.flatnonzero(np.asarray(usable_images, bool)[self.image]).astype(np.int64)

    @classmethod
    def build(cls, dataset: CocoDataset, image_scale: np.ndarray, grid: TileGrid, tile_owner: np.ndarray) -> ViewTable:
        """The views of ``dataset``: whole views at ``image_scale [I]`` (the cache's), then the tiles of ``grid``;
        ``tile_owner [A]`` is :func:`plan_tiles`'s owner tile per annotation (``-1``: the whole view)."""
        num_i = dataset.num_images
        train = ~dataset.iscrowd & (dataset.boxes[:, 2:] > 0).all(axis=1)
        xyxy = dataset.boxes_xyxy()
        owner = np.where(tile_owner >= 0, num_i + tile_owner, dataset.ann_image_index)
        owner = np.where(~dataset.iscrowd, owner, -1)
        rows = np.flatnonzero(~dataset.iscrowd)                   # whole views: every non-crowd box, as trained before
        whole_box = xyxy[rows] * image_scale[dataset.ann_image_index[rows]][:, None]
        parts = [(dataset.ann_image_index[rows], rows, whole_box, owner[rows] == dataset.ann_image_index[rows])]
        if grid.num_tiles:
            pair_row, pair_tile = _pairs(dataset, np.flatnonzero(train), grid)
            clipped, share = _visible(xyxy[pair_row], grid.origin[pair_tile], grid.extent(pair_tile))
            logged = owner[pair_row] == num_i + pair_tile
            keep = (share >= MIN_VISIBLE) | logged
            pair_row, pair_tile, clipped, logged = pair_row[keep], pair_tile[keep], clipped[keep], logged[keep]
            tile_box = (clipped - np.tile(grid.origin[pair_tile], 2)) * grid.scale[pair_tile][:, None]
            parts.append((num_i + pair_tile, pair_row, tile_box, logged))
        view = np.concatenate([p[0] for p in parts]).astype(np.int64)
        order = np.argsort(view, kind="stable")
        num_v = num_i + grid.num_tiles
        offsets = np.concatenate([[0], np.cumsum(np.bincount(view, minlength=num_v))]).astype(np.int64)
        return cls(num_images=num_i,
                   image=np.concatenate([np.arange(num_i, dtype=np.int64), grid.image]),
                   origin=np.concatenate([np.zeros((num_i, 2)), grid.origin]),
                   scale=np.concatenate([np.asarray(image_scale, np.float64), grid.scale]),
                   offsets=offsets,
                   target_row=np.concatenate([p[1] for p in parts]).astype(np.int64)[order],
                   target_box=np.concatenate([p[2] for p in parts]).astype(np.float32)[order],
                   target_logged=np.concatenate([p[3] for p in parts]).astype(bool)[order],
                   owner=owner)

    def targets(self, views: np.ndarray) -> np.ndarray:
        """Target positions (into ``target_*``) of ``views``, view by view (int64)."""
        return concatenated_ranges(self.offsets[views], self.offsets[views + 1] - self.offsets[views])

    def to_original(self, boxes_xyxy: np.ndarray, views: np.ndarray) -> np.ndarray:
        """``[n, 4]`` xyxy view px of ``views [n]`` -> xyxy original px."""
        return boxes_xyxy / self.scale[views][:, None] + np.tile(self.origin[views], 2)


def logged_view_sides(dataset: CocoDataset, image_size: int, grid: TileGrid, tile_owner: np.ndarray) -> np.ndarray:
    """``sqrt(w h)`` of every non-crowd box in the view that logs it (px, float64 ``[n]``): its tile's scale when a
    tile owns it, else its whole view's."""
    scale = whole_view_scale(dataset, image_size)[dataset.ann_image_index]
    if grid.num_tiles:
        scale = np.where(tile_owner >= 0, grid.scale[np.maximum(tile_owner, 0)], scale)
    return (_box_sides(dataset) * scale)[~dataset.iscrowd]
