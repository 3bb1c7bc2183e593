"""Object crops at the original resolution, cut once while each image is decoded for the image cache.

Every annotation gets one square-resampled crop of :data:`CONTEXT` times its box around the box's centre
(``STORE x STORE`` px, uint8 RGB), so the crop model can later cut any window near the box (the centred
window of two box sides, jittered training windows, a loosened probe box) without reading the image again.
Objects keep their own resolution however large the image is: a 20 px object in a 3000 px frame is as sharp
in its crop as in the file. Parts of the window outside the image are grey 114 (the cache's padding).

Stored in the image cache folder as ``crops.u8`` (uint8 ``[A, STORE, STORE, 3]``, rows = annotation rows).
"""

from __future__ import annotations

import cv2
import numpy as np

#: Side of a stored crop, px.
STORE = 64
#: A stored crop covers this many box sides around the box centre, on each axis.
CONTEXT = 4.0
#: Boxes are widened to at least this many original px before the window is taken.
MIN_SIDE = 4.0
PAD_VALUE = 114
#: Bilinear samples per output pixel and axis; larger windows are cut from a shrunk image.
SAMPLES = 2
#: Boxes sampled by one cv2.remap call (its maps must stay under 32767 rows).
CHUNK = 200
CROPS_FILE = "crops.u8"


def crop_extent() -> tuple[float, float]:
    """The stored crop's span in box units (the box is ``[0, 1]`` on each axis)."""
    return 0.5 - CONTEXT / 2, 0.5 + CONTEXT / 2


def crop_bytes(num_annotations: int) -> int:
    """Bytes of ``crops.u8`` for ``num_annotations`` crops."""
    return int(num_annotations) * STORE * STORE * 3


def object_crops(image_rgb: np.ndarray, boxes_xywh: np.ndarray) -> np.ndarray:
    """``uint8 [n, STORE, STORE, 3]`` crops of ``boxes_xywh [n, 4]`` (pixel coordinates of ``image_rgb``).

    Each output pixel averages :data:`SAMPLES` x :data:`SAMPLES` bilinear samples of its window (the sampling of
    torchvision's roi_align with ``aligned=True``), computed with one ``cv2.remap`` per :data:`CHUNK` boxes (the
    boxes' sample grids stacked) and an area resize; no torch, because this runs in the forked decode workers.
    Windows wider than ``SAMPLES * STORE`` px are cut from the image shrunk by a power of two (OpenCV area
    interpolation), so large boxes are shrunk without aliasing. Outside the image is grey 114.
    """
    boxes = np.asarray(boxes_xywh, dtype=np.float64).reshape(-1, 4)
    out = np.zeros((len(boxes), STORE, STORE, 3), np.uint8)
    if not len(boxes):
        return out
    side = np.maximum(boxes[:, 2:], MIN_SIDE)
    centre = boxes[:, :2] + boxes[:, 2:] / 2
    windows = np.concatenate([centre - side * CONTEXT / 2, centre + side * CONTEXT / 2], axis=1)
    span = (side * CONTEXT).max(axis=1)
    octave = np.maximum(0, np.ceil(np.log2(span / (SAMPLES * STORE)))).astype(np.int64)
    fine = STORE * SAMPLES
    steps = ((np.arange(fine) + 0.5) / fine).astype(np.float64)                   # sample positions in 0..1
    for k in np.unique(octave):
        rows = np.flatnonzero(octave == k)
        image = image_rgb
        if k:
            h, w = image_rgb.shape[:2]
            size = (max(1, int(round(w / 2 ** k))), max(1, int(round(h / 2 ** k))))
            image = cv2.resize(image_rgb, size, interpolation=cv2.INTER_AREA)
        factor = np.array([image.shape[1] / image_rgb.shape[1], image.shape[0] / image_rgb.shape[0]] * 2)
        for start in range(0, len(rows), CHUNK):
            part = rows[start:start + CHUNK]
            win = windows[part] * factor
            xs = win[:, None, 0] + steps[None, :] * (win[:, None, 2] - win[:, None, 0]) - 0.5    # [c, fine]
            ys = win[:, None, 1] + steps[None, :] * (win[:, None, 3] - win[:, None, 1]) - 0.5
            map_x = np.broadcast_to(xs[:, None, :], (len(part), fine, fine)).reshape(-1, fine).astype(np.float32)
            map_y = np.broadcast_to(ys[:, :, None], (len(part), fine, fine)).reshape(-1, fine).astype(np.float32)
            sampled = cv2.remap(image, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                                borderValue=(PAD_VALUE,) * 3)
            small = cv2.resize(sampled, (STORE, STORE * len(part)), interpolation=cv2.INTER_AREA)
            out[part] = small.reshape(len(part), STORE, STORE, 3)
    return out
