"""Training batches read straight from the image cache's views, and the flips applied to them.

What is trained on is exactly what is logged: :class:`BatchMaker` indexes the cache's uint8 memmaps
(``detdiff.data.image_cache``): each image's letterboxed whole view and the tiles where its small boxes need
them (``detdiff.data.views``: a batch is a set of views, each annotation logged by one of them); there is no decode
and no other augmentation. The only augmentation is flipping
(``train.flips``: none, horizontal, both axes, or ``dihedral``: both axes and the transpose), drawn per image
and epoch from the seed; each maps the square view and its anchor grid onto themselves, so an object's losses
stay comparable across epochs, and logged boxes are mapped back (:meth:`Batch.unflip`) before they are
written. Flips halve (down to an eighth of) how often the detector sees the identical view, which slows its
memorising of wrong labels: on the demo's planted wrong classes they raised the accumulated positive-class
AUROC (issue notes).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import ImageCache
from detdiff.data.views import TileGrid, ViewTable


@dataclass
class Batch:
    """One training batch of views; ``object_index`` are dataset annotation rows of the targets, in order, and
    ``object_logged`` marks the targets whose losses are logged (the view is the annotation's owner)."""

    image_index: np.ndarray                  # int64 [B] dataset image row of each view
    images: torch.Tensor                     # float32 [B, 3, S, S] in 0..1
    targets: list[dict[str, torch.Tensor]]   # per view {"boxes": [n_b, 4] xyxy view px, "labels": int64 [n_b]}
    object_index: np.ndarray                 # int64 [T] annotation rows of the views' targets, view by view
    image_scale: np.ndarray                  # float64 [B] view px per original px
    object_scale: np.ndarray                 # float64 [T] scale of each target's view
    flips: np.ndarray | None = None          # bool [B, 3] (horizontal, vertical, transpose) applied to each view
    object_flips: np.ndarray | None = None   # bool [T, 3] flips of each target's view
    view_index: np.ndarray | None = None     # int64 [B] views (= image_index without tiles)
    image_origin: np.ndarray | None = None   # float64 [B, 2] original px of each view's top-left corner
    object_origin: np.ndarray | None = None  # float64 [T, 2] origin of each target's view
    object_logged: np.ndarray | None = None  # bool [T] the target's losses are logged (None: all are)

    def unflip(self, boxes: torch.Tensor, flips: np.ndarray | None) -> torch.Tensor:
        """``[n, 4]`` xyxy boxes on the flipped views -> boxes on the cache's views (``flips [n, 3]``)."""
        if flips is None or not flips.any():
            return boxes
        return flip_view_boxes(boxes, torch.from_numpy(flips).to(boxes.device), self.images.shape[-1], inverse=True)


#: ``train.flips`` -> which of (horizontal flip, vertical flip, transpose) may be drawn. ``dihedral`` adds the
#: transpose (x <-> y) to both flips: the eight rotations and reflections of a square view.
FLIP_MODES = {"none": (False, False, False), "horizontal": (True, False, False), "both": (True, True, False),
              "dihedral": (True, True, True)}


def flip_view_boxes(boxes: torch.Tensor, flips: torch.Tensor, size: int, *, inverse: bool = False) -> torch.Tensor:
    """Map ``[n, 4]`` xyxy boxes of an ``S x S`` view onto its flipped view, ``flips [n, 3]`` = (horizontal,
    vertical, transpose).

    The view is transposed first (x <-> y), then mirrored; ``inverse=True`` undoes that (mirror, then
    transpose). Without a transpose the map is its own inverse.
    """
    def mirror(b: torch.Tensor) -> torch.Tensor:
        x1, y1, x2, y2 = b.unbind(-1)
        h, v = flips[:, 0], flips[:, 1]
        return torch.stack([torch.where(h, size - x2, x1), torch.where(v, size - y2, y1),
                            torch.where(h, size - x1, x2), torch.where(v, size - y1, y2)], dim=-1)

    def transpose(b: torch.Tensor) -> torch.Tensor:
        return torch.where(flips[:, 2:3], b[:, [1, 0, 3, 2]], b)

    return transpose(mirror(boxes)) if inverse else mirror(transpose(boxes))


class BatchMaker:
    """Builds :class:`Batch` es of views from the memmaps: index, ``torch.from_numpy``, permute, ``/ 255``; no decode.

    Targets of a whole view are the non-crowd annotations of its image, boxes ``xywh original -> xyxy view = xyxy *
    scale``; those of a tile are the boxes it shows enough of, clipped (:class:`detdiff.data.views.ViewTable`).
    ``flips`` (a :data:`FLIP_MODES` key): each allowed axis is flipped (and the view transposed) with
    probability 1/2 per image, drawn by :meth:`set_epoch` from ``PCG64([seed, epoch, 1])`` (flips) and
    ``PCG64([seed, epoch, 2])`` (transpose) for all images at once, so the draw does not depend on batch
    order, rank or resumption, and ``both`` draws the same flips as before the transpose existed.
    """

    def __init__(self, dataset: CocoDataset, cache: ImageCache, device: torch.device, *,
                 flips: str = "none", seed: int = 0) -> None:
        if flips not in FLIP_MODES:
            raise ValueError(f"train.flips must be one of {', '.join(FLIP_MODES)}, got {flips!r}")
        self.allowed = np.array(FLIP_MODES[flips])
        self.seed, self.epoch_flips = seed, None
        self.cache, self.device = cache, device
        self.views = cache_views(dataset, cache)
        self.labels = dataset.labels.astype(np.int64)

    def set_epoch(self, epoch: int) -> None:
        """Draw this epoch's flips of every image (no-op without flips)."""
        if self.allowed.any():
            draw = np.random.default_rng([self.seed, epoch, 1]).random((self.views.num_views, 2)) < 0.5
            turn = np.random.default_rng([self.seed, epoch, 2]).random((self.views.num_views, 1)) < 0.5
            self.epoch_flips = np.hstack([draw, turn]) & self.allowed

    @property
    def usable_views(self) -> np.ndarray:
        """The views of the cache's usable images, ascending: what an epoch trains on."""
        return self.views.usable_views(self.cache.usable)

    def _view_pixels(self, view_index: np.ndarray, flips: np.ndarray | None) -> np.ndarray:
        """``uint8 [B, S, S, 3]`` views of the batch, each transposed then mirrored as ``flips [B, 3]`` says.

        numpy's transpose and reversed slices are views of the memmap, so each view is copied once, flipped
        or not (a loop over the batch's views, not over boxes).
        """
        if flips is None or not flips.any():
            return self.cache.view_pixels(view_index)
        out = np.empty((len(view_index), *self.cache.images.shape[1:]), dtype=np.uint8)
        for b, (i, (h, v, t)) in enumerate(zip(view_index, flips)):
            view = self.cache.view_of(int(i))                          # [S, S, 3]: y, x, channel
            if t:
                view = view.transpose(1, 0, 2)
            if h:
                view = view[:, ::-1]
            if v:
                view = view[::-1]
            out[b] = view
        return out

    def __call__(self, view_index: np.ndarray) -> Batch:
        """The batch of views ``view_index`` (whole view ``i`` = image row ``i``), with this epoch's flips
        (:meth:`set_epoch`) applied."""
        view_index = np.asarray(view_index, np.int64)
        views = self.views
        counts = views.offsets[view_index + 1] - views.offsets[view_index]
        at = views.targets(view_index)
        flips = object_flips = None
        if self.epoch_flips is not None:
            flips = self.epoch_flips[view_index]
            object_flips = np.repeat(flips, counts, axis=0)
        pixels = torch.from_numpy(self._view_pixels(view_index, flips))                     # [B, S, S, 3] uint8
        images = pixels.to(self.device, non_blocking=True).permute(0, 3, 1, 2).float().div_(255.0)
        object_index = views.target_row[at]
        boxes = torch.from_numpy(views.target_box[at]).to(self.device)
        if object_flips is not None and object_flips.any():
            boxes = flip_view_boxes(boxes, torch.from_numpy(object_flips).to(self.device), images.shape[-1])
        labels = torch.from_numpy(self.labels[object_index]).to(self.device)
        targets = [{"boxes": b, "labels": lab}
                   for b, lab in zip(boxes.split(counts.tolist()), labels.split(counts.tolist()))]
        image_scale, origin = views.scale[view_index], views.origin[view_index]
        return Batch(views.image[view_index], images, targets, object_index, image_scale,
                     np.repeat(image_scale, counts), flips, object_flips, view_index, origin,
                     np.repeat(origin, counts, axis=0), views.target_logged[at])


def cache_views(dataset: CocoDataset, cache: ImageCache) -> ViewTable:
    """The views of ``cache`` (whole views at the cache's scales, then its tiles) with their targets."""
    grid = cache.grid if cache.grid is not None else TileGrid.empty(cache.image_size)
    owner = cache.tile_owner if cache.tile_owner is not None else np.full(dataset.num_annotations, -1, np.int64)
    return ViewTable.build(dataset, cache.scale, grid, owner)
