"""Crops of the places where the detector saw an object nobody annotated, cut from the original images.

The cross-fit's crop models judge each place out of sample (:mod:`detdiff.crossfit.folds`): is an object centred
there, to a model that never trained on the image? The places are known only after the detector's final pass,
so their images are decoded a second time; each JPEG is decoded at the largest reduction that keeps its smallest
place :data:`detdiff.data.image_cache.MIN_CROP_SIDE` px across (``Image.draft``, as the image cache does), and
the crops are cut exactly as an annotation's (:func:`detdiff.crossfit.crops.object_crops`).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from tqdm import tqdm

from detdiff.crossfit.crops import STORE, object_crops
from detdiff.crossfit.folds import Places
from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import Refused, decode_full, draft_reduction

#: Places moved per step when those of undecodable images are dropped (bounds the copy's memory).
COMPACT_ROWS = 4096


def _image_crops(path: Path, declared: tuple[int, int], boxes_xywh: np.ndarray, max_pixels: int) -> np.ndarray | None:
    """Crops of ``boxes_xywh`` (declared px) in one image, or None where the file cannot be decoded."""
    def reduce(file_w: int, file_h: int) -> int:
        return draft_reduction(file_w, file_h, boxes_xywh, 0) if sorted((file_w, file_h)) == sorted(declared) else 1

    try:
        full, _ = decode_full(path, max_pixels, reduce)
    except Refused:
        return None
    h, w = full.shape[:2]
    return object_crops(full, boxes_xywh * np.array([w / declared[0], h / declared[1]] * 2))


def place_crops_path(crossfit_dir: Path) -> Path:
    """The working file of the place crops in ``RUNDIR/crossfit`` while the fold models judge them: removed after,
    and by :mod:`detdiff.leftovers` when an interrupted run left it (the process id marks whose it is)."""
    return Path(crossfit_dir) / f"places.tmp-{os.getpid()}.npy"


def place_crops(dataset: CocoDataset, image: np.ndarray, box_xywh: np.ndarray, *, max_pixels: int,
                threads: int = 2, progress: bool = True, store: Path | None = None) -> Places:
    """:class:`Places` of ``image [N]`` rows and ``box_xywh [N, 4]``; places of an image that cannot be decoded (it
    changed since the cache was built) are left out. ``store``: a working file that holds the crops (a uint8 memory
    map, 12 KiB per place) instead of memory; the caller removes it when the places are judged."""
    image = np.asarray(image, dtype=np.int64)
    box_xywh = np.asarray(box_xywh, dtype=np.float64).reshape(-1, 4)
    shape = (len(image), STORE, STORE, 3)
    if store is None or not len(image):
        crops = np.zeros(shape, np.uint8)
    else:
        crops = np.lib.format.open_memmap(store, mode="w+", dtype=np.uint8, shape=shape)
    ok = np.zeros(len(image), dtype=bool)
    order = np.argsort(image, kind="stable")
    images, starts = np.unique(image[order], return_index=True)
    groups = np.split(order, starts[1:])

    def cut(job: tuple[int, np.ndarray]) -> tuple[np.ndarray, np.ndarray | None]:
        i, rows = job
        declared = (int(dataset.widths[i]), int(dataset.heights[i]))
        return rows, _image_crops(dataset.image_path(i), declared, box_xywh[rows], max_pixels)

    with ThreadPoolExecutor(max(1, int(threads))) as pool:
        for rows, cut_crops in tqdm(pool.map(cut, zip(images.tolist(), groups)), total=len(images),
                                    desc="cut place crops", unit="image", disable=not progress, leave=False):
            if cut_crops is not None:
                crops[rows], ok[rows] = cut_crops, True
    kept = np.flatnonzero(ok)
    for start in range(0, len(kept), COMPACT_ROWS):          # move the decoded places to the front, in place
        chunk = kept[start:start + COMPACT_ROWS]
        crops[start:start + len(chunk)] = crops[chunk]
    return Places(image[kept], box_xywh[kept], crops[:len(kept)])
