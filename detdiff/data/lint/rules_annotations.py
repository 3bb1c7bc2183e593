"""Lint rules for the annotation records: ids, references, boxes, ``iscrowd``, ``area`` and box placement.

Every check runs over whole columns (see :mod:`detdiff.data.lint.parse`); the segmentation checks
are in :mod:`detdiff.data.lint.areas` and the duplicate boxes in :mod:`detdiff.data.lint.rules_duplicates`.
Findings are added in a fixed order: ids, references, box shape, ``iscrowd``, ``area``, box in image,
segmentation, area against the box, crowd masks, duplicates.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from detdiff.data.lint.areas import disagree, lint_segmentation
from detdiff.data.lint.codes import BOX_TOLERANCE_FRACTION, BOX_TOLERANCE_PX, FindingCollector
from detdiff.data.lint.parse import (ABSENT, BAD, OK, Section, box_column, field_values, int_column,
                                     number_column, read_section, report_status, show)
from detdiff.data.lint.rules_duplicates import lint_duplicates
from detdiff.data.lint.rules_records import Images


@dataclass
class Annotations:
    """The annotation section with what the coverage check and the counts need."""

    section: Section
    image_row: np.ndarray       # int64 [A]: row of the image record, -1 unknown
    category_row: np.ndarray    # int64 [A]: row of the category record, -1 unknown
    crowd: np.ndarray           # bool [A]
    rle: np.ndarray             # bool [A]: segmentation is a valid RLE mask


def _gather(values: np.ndarray, rows: np.ndarray, fill: Any) -> np.ndarray:
    """``values[rows]`` with ``fill`` where a row is -1 (``values`` may be empty). [len(rows)]"""
    if len(values) == 0:
        return np.full(len(rows), fill)
    return np.where(rows >= 0, values[np.maximum(rows, 0)], fill)


def _lint_references(sec: Section, images: Images, cats: Section,
                     out: FindingCollector) -> tuple[np.ndarray, np.ndarray]:
    """``image_id`` and ``category_id``: present, integers, naming a record. Returns their rows (-1 unknown)."""
    refs = {}
    for key, target, code in (("image_id", images.section, "unknown_image"),
                              ("category_id", cats, "unknown_category")):
        values = field_values(sec.records, key)
        ref, status = int_column(values)
        report_status(out, sec, key, values, status, f"the integer id of {target.kind_article} record")
        row = np.where(sec.is_object & (status == OK), target.lookup(ref), -1)
        unknown = np.flatnonzero(sec.is_object & (status == OK) & (row < 0))
        out.add_rows(code, sec, unknown, key,
                     (f"expected the id of {target.kind_article} record, found {key} {ref[r]} that no record has"
                      for r in unknown.tolist()))
        refs[key] = row
    return refs["image_id"], refs["category_id"]


def _lint_box_shape(sec: Section, out: FindingCollector) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``bbox``: 4 finite numbers with width and height > 0. Returns (boxes [A, 4], has a box, positive size)."""
    box_values = field_values(sec.records, "bbox")
    boxes, box_status = box_column(box_values)
    report_status(out, sec, "bbox", box_values, box_status, "a list of 4 numbers [x, y, width, height]")
    has_box = sec.is_object & (box_status == OK)
    finite = np.isfinite(boxes).all(axis=1)
    rows = np.flatnonzero(has_box & ~finite)
    out.add_rows("box_nonfinite", sec, rows, "bbox",
                 (f"expected finite numbers, found {boxes[r].tolist()}" for r in rows.tolist()))
    w, h = boxes[:, 2], boxes[:, 3]
    with np.errstate(invalid="ignore"):
        positive = finite & (w > 0) & (h > 0)
    rows = np.flatnonzero(has_box & finite & ~positive)
    out.add_rows("box_nonpositive_size", sec, rows, "bbox",
                 (f"expected width and height > 0, found width {w[r]:g} and height {h[r]:g}" for r in rows.tolist()))
    return boxes, has_box, positive


def _lint_crowd(sec: Section, out: FindingCollector) -> np.ndarray:
    """``iscrowd``: 0 or 1 (``true`` / ``false`` accepted), filled with 0 when absent. Returns crowd, bool [A]."""
    obj = sec.is_object
    crowd_values = field_values(sec.records, "iscrowd")
    crowd_flag, crowd_status = int_column(crowd_values)
    as_bool = [r for r in np.flatnonzero(crowd_status == BAD).tolist() if type(crowd_values[r]) is bool]
    crowd_flag[as_bool], crowd_status[as_bool] = [int(crowd_values[r]) for r in as_bool], OK
    crowd = obj & (crowd_status == OK) & (crowd_flag == 1)
    rows = np.flatnonzero(obj & (crowd_status == ABSENT))
    out.add_rows("missing_iscrowd", sec, rows, "iscrowd",
                 ("expected key 'iscrowd' (COCOeval reads it), found none; 0 is used" for _ in rows))
    rows = np.flatnonzero(obj & ((crowd_status == BAD) | ((crowd_status == OK) & (crowd_flag != 0) & ~crowd)))
    out.add_rows("iscrowd_invalid", sec, rows, "iscrowd",
                 (f"expected iscrowd 0 or 1, found {show(crowd_values[r])}" for r in rows.tolist()))
    return crowd


def _lint_area_value(sec: Section, out: FindingCollector) -> tuple[np.ndarray, np.ndarray]:
    """``area``: a finite number >= 0 when present. Returns (area float64 [A], usable bool [A])."""
    obj = sec.is_object
    area_values = field_values(sec.records, "area")
    area, area_status = number_column(area_values)
    rows = np.flatnonzero(obj & (area_status == ABSENT))
    out.add_rows("missing_area", sec, rows, "area",
                 ("expected key 'area' (COCOeval's size ranges read it), found none; width x height is used"
                  for _ in rows))
    area_ok = obj & (area_status == OK) & np.isfinite(area) & (area >= 0)
    rows = np.flatnonzero(obj & (area_status != ABSENT) & ~area_ok)
    out.add_rows("area_invalid", sec, rows, "area",
                 (f"expected a finite number >= 0, found {show(area_values[r])}" for r in rows.tolist()))
    return area, area_ok


def _lint_box_in_image(sec: Section, boxes: np.ndarray, placed: np.ndarray, width: np.ndarray,
                       height: np.ndarray, out: FindingCollector) -> None:
    """Boxes (``placed``: usable box on an image of usable size) outside or past their image."""
    x, y, w, h = boxes.T
    with np.errstate(over="ignore", invalid="ignore"):
        x2, y2 = x + w, y + h
        outside = placed & ((x >= width) | (y >= height) | (x2 <= 0) | (y2 <= 0))
        tol_x = np.maximum(BOX_TOLERANCE_PX, BOX_TOLERANCE_FRACTION * width)
        tol_y = np.maximum(BOX_TOLERANCE_PX, BOX_TOLERANCE_FRACTION * height)
        exceeds = placed & ~outside & ((x < -tol_x) | (y < -tol_y) | (x2 > width + tol_x) | (y2 > height + tol_y))
    rows = np.flatnonzero(outside)
    out.add_rows("box_outside_image", sec, rows, "bbox",
                 (f"expected a box overlapping the {width[r]:g}x{height[r]:g} image, found {boxes[r].tolist()}"
                  for r in rows.tolist()))
    rows = np.flatnonzero(exceeds)
    out.add_rows("box_exceeds_image", sec, rows, "bbox",
                 (f"expected the box inside the {width[r]:g}x{height[r]:g} image (tolerance "
                  f"{tol_x[r]:g}x{tol_y[r]:g} px), found {boxes[r].tolist()}" for r in rows.tolist()))


def lint_annotations(raw: list[Any], images: Images, cats: Section, out: FindingCollector) -> Annotations:
    """All checks of the annotation records (see the module docstring for their order)."""
    sec = read_section("annotation", raw, out)
    zero = np.flatnonzero(sec.id_ok & (sec.ids == 0))
    out.add_rows("annotation_id_zero", sec, zero, "id",
                 ("expected a non-zero id (pycocotools COCOeval treats id 0 as 'unmatched'), found 0"
                  for _ in zero))
    image_row, category_row = _lint_references(sec, images, cats, out)
    boxes, has_box, positive = _lint_box_shape(sec, out)
    crowd = _lint_crowd(sec, out)
    area, area_ok = _lint_area_value(sec, out)

    sized = _gather(images.size_ok, image_row, False)         # the annotation's image has a usable size
    width = np.where(sized, _gather(images.widths, image_row, np.nan), np.nan)
    height = np.where(sized, _gather(images.heights, image_row, np.nan), np.nan)
    placed = has_box & positive & sized
    _lint_box_in_image(sec, boxes, placed, width, height, out)

    is_rle, has_seg = lint_segmentation(sec, width, height, area, area_ok, placed, out)
    with np.errstate(over="ignore", invalid="ignore"):
        box_area = boxes[:, 2] * boxes[:, 3]
        rows = np.flatnonzero(placed & area_ok & ~crowd & ~has_seg & disagree(area, box_area))
    out.add_rows("area_box_mismatch", sec, rows, "area",
                 (f"expected area close to bbox width x height {box_area[r]:g} (no segmentation), "
                  f"found {area[r]:g}" for r in rows.tolist()))
    rows = np.flatnonzero(crowd & is_rle)
    out.add_rows("crowd_rle_mask", sec, rows, "segmentation",
                 ("iscrowd annotation with an RLE mask: counted, ignored as a training target" for _ in rows))

    lint_duplicates(sec, placed & ~crowd & (category_row >= 0), image_row, category_row, boxes, out)
    return Annotations(sec, image_row, category_row, crowd, is_rle)
