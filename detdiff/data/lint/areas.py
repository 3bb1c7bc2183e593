"""Segmentation checks of the COCO lint: valid polygons / RLE masks and ``area`` against the mask's area.

Polygons are measured exactly (shoelace, vectorised over all annotations) and, only where that
disagrees with ``area``, rasterised by pycocotools.mask; RLE masks are validated before pycocotools
sees them, so its C code never reads counts past their end.
"""

from __future__ import annotations

import math
from itertools import chain
from typing import Any

import numpy as np

from detdiff.data.lint.codes import AREA_TOLERANCE, FindingCollector
from detdiff.data.lint.parse import MISSING, Section, field_values, show, to_float

_RLE_MAX_PIXELS = 2 ** 31       # RLE masks larger than this are not handed to pycocotools
_RASTER_MAX_STEPS = 1e7         # polygons whose rasterisation would walk more boundary points are not either


def flatten_polygons(segs: list[list[Any]]) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Polygon segmentations as flat arrays, or None unless every one is valid.

    Valid: each part a list of an even number (>= 6) of finite numbers. Returns parts per annotation
    int64 [m], coordinates per part int64 [p] and all coordinates ``x0, y0, x1, y1, ...`` float64 [k].
    """
    parts = list(chain.from_iterable(segs))
    if not set(map(type, parts)) <= {list}:
        return None
    coords_per_part = np.fromiter(map(len, parts), dtype=np.int64, count=len(parts))
    if (coords_per_part < 6).any() or (coords_per_part % 2).any():
        return None
    flat = list(chain.from_iterable(parts))
    if not set(map(type, flat)) <= {int, float}:
        return None
    try:
        coords = np.array(flat, dtype=np.float64)
    except OverflowError:
        return None
    if not np.isfinite(coords).all():
        return None
    return np.fromiter(map(len, segs), dtype=np.int64, count=len(segs)), coords_per_part, coords


def _polygon_valid(seg: list[Any]) -> bool:
    return all(type(p) is list and len(p) >= 6 and len(p) % 2 == 0
               and all(type(c) in (int, float) and math.isfinite(to_float(c)) for c in p) for p in seg)


def shoelace_areas(parts_per_ann: np.ndarray, coords_per_part: np.ndarray,
                   coords: np.ndarray) -> np.ndarray:
    """Exact polygon area per annotation (sum over its parts), float64 [m].

    Inputs as returned by :func:`flatten_polygons` (no annotation without parts).
    """
    xs, ys = coords[0::2], coords[1::2]
    points_per_part = coords_per_part // 2
    part_start = np.r_[0, np.cumsum(points_per_part)[:-1]]
    following = np.arange(len(xs)) + 1
    following[part_start + points_per_part - 1] = part_start       # close each ring
    with np.errstate(over="ignore", invalid="ignore"):
        cross = xs * ys[following] - xs[following] * ys
        part_area = 0.5 * np.abs(np.add.reduceat(cross, part_start))
    return np.add.reduceat(part_area, np.r_[0, np.cumsum(parts_per_ann)[:-1]])


def _rle_area(seg: dict, height: float, width: float) -> tuple[float | None, str]:
    """Pixel count of an RLE mask by pycocotools.mask, or (None, why it is not a valid RLE).

    Validated first so pycocotools' C code never sees counts it could read past.
    """
    from pycocotools import mask as mask_utils

    size, counts = seg.get("size"), seg.get("counts")
    if not (type(size) is list and len(size) == 2 and all(type(s) is int and s > 0 for s in size)):
        return None, f"expected RLE 'size' [height, width] of positive integers, found {show(size)}"
    if size[0] * size[1] > _RLE_MAX_PIXELS:
        return None, f"RLE 'size' {size} is too large"
    if (size[0], size[1]) != (height, width):
        return None, f"expected RLE 'size' [{height:g}, {width:g}] (the image), found {size}"
    if type(counts) is list:
        if not all(type(c) is int and 0 <= c < 2 ** 32 for c in counts) or sum(counts) != size[0] * size[1]:
            return None, "expected RLE 'counts' of non-negative integers summing to height x width"
        return float(mask_utils.area(mask_utils.frPyObjects(seg, size[0], size[1]))), ""
    if type(counts) is str and counts and all(48 <= ord(ch) < 112 for ch in counts) \
            and not (ord(counts[-1]) - 48) & 0x20:
        return float(mask_utils.area({"size": size, "counts": counts})), ""
    return None, f"expected RLE 'counts' as a list of integers or a compressed string, found {show(counts)}"


def _raster_steps(seg: list[list[float]]) -> float:
    """Boundary points pycocotools allocates to rasterise ``seg`` (it walks each edge at 5x resolution)."""
    total = 0.0
    for part in seg:
        ring = np.asarray(part, dtype=np.float64).reshape(-1, 2)
        total += float(np.abs(ring - np.roll(ring, -1, axis=0)).max(axis=1).sum())
    return 5.0 * total


def _polygon_raster_area(seg: list[list[float]], height: float, width: float) -> float:
    from pycocotools import mask as mask_utils

    return float(mask_utils.area(mask_utils.merge(mask_utils.frPyObjects(seg, int(height), int(width)))))


def disagree(area: np.ndarray | float, reference: np.ndarray | float) -> np.ndarray:
    """|area - reference| > AREA_TOLERANCE x the larger of the two (bool, elementwise)."""
    return np.abs(area - reference) > AREA_TOLERANCE * np.maximum(np.maximum(area, reference), 1e-12)


def lint_segmentation(sec: Section, width: np.ndarray, height: np.ndarray, area: np.ndarray,
                      area_ok: np.ndarray, placed: np.ndarray,
                      out: FindingCollector) -> tuple[np.ndarray, np.ndarray]:
    """Validate segmentations and compare ``area`` with the mask area.

    ``width`` / ``height``: float64 [A], the annotation's image size (NaN when unknown or unusable).
    Returns (valid RLE mask, any segmentation present), bool [A] each.
    """
    seg_values = field_values(sec.records, "segmentation")
    seg_types = list(map(type, seg_values))
    poly_rows = [r for r, t in enumerate(seg_types) if t is list and seg_values[r]]
    dict_rows = [r for r, t in enumerate(seg_types) if t is dict]
    other_rows = [r for r, t in enumerate(seg_types)
                  if t not in (list, dict) and seg_values[r] is not MISSING and seg_values[r] is not None]
    has_seg = np.zeros(len(sec), bool)
    has_seg[poly_rows + dict_rows + other_rows] = True
    has_seg &= sec.is_object
    is_rle = np.zeros(len(sec), bool)
    invalid = [(r, f"expected polygons or an RLE dict, found {show(seg_values[r])}")
               for r in other_rows if sec.is_object[r]]

    segs = [seg_values[r] for r in poly_rows]
    flat = flatten_polygons(segs)
    if flat is None:
        keep = [_polygon_valid(s) for s in segs]
        invalid += [(r, "expected polygons as lists of an even number (>= 6) of finite coordinates, found "
                     + show(s)) for r, s, k in zip(poly_rows, segs, keep) if not k]
        poly_rows = [r for r, k in zip(poly_rows, keep) if k]
        segs = [s for s, k in zip(segs, keep) if k]
        flat = flatten_polygons(segs)
    mismatch_rows, messages = [], []
    if poly_rows and flat is not None:
        poly_idx = np.array(poly_rows, dtype=np.int64)
        shoelace = shoelace_areas(*flat)
        img_h, img_w = height[poly_idx], width[poly_idx]
        with np.errstate(over="ignore", invalid="ignore"):
            candidates = np.flatnonzero(placed[poly_idx] & area_ok[poly_idx] & disagree(area[poly_idx], shoelace))
        for k in candidates.tolist():
            row = poly_rows[k]
            text = f"expected area close to the polygon's area {shoelace[k]:g}"
            if _raster_steps(segs[k]) <= _RASTER_MAX_STEPS and img_h[k] * img_w[k] <= _RLE_MAX_PIXELS:
                pixels = _polygon_raster_area(segs[k], img_h[k], img_w[k])
                if not disagree(area[row], pixels):
                    continue
                text += f" or to its {pixels:g} pixels (pycocotools.mask)"
            mismatch_rows.append(row)
            messages.append(f"{text}, found {area[row]:g}")

    for r in dict_rows:
        if not np.isfinite(width[r]):
            continue
        pixels, why = _rle_area(seg_values[r], height[r], width[r])
        if pixels is None:
            invalid.append((r, why))
            continue
        is_rle[r] = True
        if placed[r] and area_ok[r] and disagree(area[r], pixels):
            mismatch_rows.append(r)
            messages.append(f"expected area close to the RLE mask's {pixels:g} pixels (pycocotools.mask), "
                            f"found {area[r]:g}")
    out.add_rows("area_mask_mismatch", sec, np.array(mismatch_rows, dtype=np.int64), "area", messages)
    invalid.sort()
    out.add_rows("segmentation_invalid", sec, np.array([r for r, _ in invalid], dtype=np.int64), "segmentation",
                 [m for _, m in invalid])
    return is_rle, has_seg
