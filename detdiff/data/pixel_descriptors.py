"""What an image's pixels look like: blur, light, contrast and background clutter.

Computed once per image while it is decoded for the training cache (see ``detdiff.data.image_cache``), so no
image is read twice: on the training view (the letterboxed image without padding) when large JPEGs may be
decoded at reduced size (``data.reduced_decode``, the default), else on the full-resolution image.
"""

from __future__ import annotations

import cv2
import numpy as np

#: Column order of :func:`pixel_descriptors`.
PIXEL_DESCRIPTOR_NAMES: tuple[str, ...] = ("blur_laplacian_var", "brightness", "contrast", "clutter_edge_density")


def laplacian_variance(gray: np.ndarray) -> float:
    """Variance of the Laplacian, a sharpness measure: higher = sharper (Pech-Pacheco et al., ICPR 2000)."""
    return float(cv2.Laplacian(gray, cv2.CV_64F).var())


def edge_density(gray: np.ndarray, mask: np.ndarray | None = None) -> float:
    """Fraction of Canny(100, 200) edge pixels, optionally only where ``mask`` is true.

    Thresholds 100/200 are common practice (Canny, IEEE TPAMI 1986 defines the detector).
    """
    edges = cv2.Canny(gray, 100, 200) > 0
    if mask is None:
        return float(edges.mean())
    n = int(mask.sum())
    return float(edges[mask].sum() / n) if n else 0.0


def background_mask(height: int, width: int, boxes_xywh: np.ndarray) -> np.ndarray:
    """True outside every box (boxes in pixels, xywh); the whole image when there are no boxes."""
    mask = np.ones((height, width), dtype=bool)
    if len(boxes_xywh):
        b = np.asarray(boxes_xywh, dtype=np.float64)
        x1 = np.clip(np.floor(b[:, 0]), 0, width).astype(int)
        y1 = np.clip(np.floor(b[:, 1]), 0, height).astype(int)
        x2 = np.clip(np.ceil(b[:, 0] + b[:, 2]), 0, width).astype(int)
        y2 = np.clip(np.ceil(b[:, 1] + b[:, 3]), 0, height).astype(int)
        cover = np.zeros((height + 1, width + 1), dtype=np.int32)   # 2-D difference array, no loop over pixels
        np.add.at(cover, (y1, x1), 1)
        np.add.at(cover, (y1, x2), -1)
        np.add.at(cover, (y2, x1), -1)
        np.add.at(cover, (y2, x2), 1)
        mask = cover.cumsum(0).cumsum(1)[:height, :width] == 0
    return mask


def pixel_descriptors(image_rgb: np.ndarray, boxes_xywh: np.ndarray) -> np.ndarray:
    """Descriptors of one uint8 RGB image ``[H, W, 3]`` in the order of :data:`PIXEL_DESCRIPTOR_NAMES`.

    blur: Laplacian variance of the grey image; brightness: mean grey level (0-255); contrast: std of the
    grey level; clutter: Canny edge density outside the annotated boxes (background clutter).
    """
    gray = cv2.cvtColor(image_rgb, cv2.COLOR_RGB2GRAY) if image_rgb.ndim == 3 else image_rgb
    h, w = gray.shape
    return np.array([laplacian_variance(gray), float(gray.mean()), float(gray.std()),
                     edge_density(gray, background_mask(h, w, boxes_xywh))], dtype=np.float32)
