"""What the COCO lint can report: finding codes with their fixed severities, tolerances, the finding record.

Every finding has a fixed severity (see :data:`CODES`):

- **error**: the record cannot be trusted for training; its id is in
  :meth:`~detdiff.data.lint.report.LintReport.error_image_ids` /
  :meth:`~detdiff.data.lint.report.LintReport.error_annotation_ids` and
  :func:`detdiff.data.coco.build_dataset` skips it. For duplicate ids every record with that id is
  skipped, because the id no longer names one record.
- **warning**: usable, but probably wrong (box beyond the image, area disagreeing with the box or
  mask, duplicate boxes, empty categories, annotation id 0).
- **info**: worth knowing, nothing to fix (missing ``area``/``iscrowd`` that we fill, crowd RLE masks,
  images without annotations, grayscale / alpha / 16-bit files).

Tolerances (chosen here, common practice rather than a published source; documented once):

- a box may extend past the image by ``max(2 px, 1 % of the side)`` before it is a warning
  (room for rounding and for exporters that write x2 = width instead of width - 1);
- ``area`` disagrees with a box or mask when they differ by more than 10 % of the larger of the two.
  Without segmentation (non-crowd) the reference is ``w * h``. With a polygon the ``area`` must
  disagree both with the polygon's exact (shoelace) area *and* with its rasterised pixel count from
  pycocotools.mask, since exporters write either convention; with an RLE mask the reference is the
  pixel count from pycocotools.mask;
- near duplicates: same image, same class, IoU > 0.95 (boxes not identical).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Iterable

import numpy as np

if TYPE_CHECKING:
    from detdiff.data.lint.parse import Section

#: code -> (severity, what it means). Severity is fixed per code.
CODES: dict[str, tuple[str, str]] = {
    "record_not_object": ("error", "a record of images/annotations/categories is not a JSON object"),
    "missing_key": ("error", "a required key is missing"),
    "wrong_type": ("error", "a required key holds the wrong type"),
    "duplicate_id": ("error", "two records of one section share an id"),
    "unknown_image": ("error", "annotation image_id names no image record"),
    "unknown_category": ("error", "annotation category_id names no category record"),
    "image_size_invalid": ("error", "declared width/height is not a number from 1 to 2^31 - 1"),
    "box_nonfinite": ("error", "bbox holds NaN or infinity"),
    "box_nonpositive_size": ("error", "bbox width or height <= 0"),
    "box_outside_image": ("error", "bbox does not overlap its image at all"),
    "iscrowd_invalid": ("error", "iscrowd is neither 0 nor 1"),
    "unsafe_file_name": ("error", "file_name would read outside the image root"),
    "image_file_missing": ("error", "no image file for file_name"),
    "image_unreadable": ("error", "the image file cannot be opened or its header is corrupt"),
    "image_size_mismatch": ("error", "declared width/height differ from the image file"),
    "annotation_id_zero": ("warning", "annotation id 0 breaks pycocotools COCOeval matching"),
    "section_empty": ("warning", "images, annotations or categories is an empty list"),
    "duplicate_file_name": ("warning", "two image records name the same file"),
    "box_exceeds_image": ("warning", "bbox extends past the image beyond the tolerance"),
    "area_invalid": ("warning", "area is not a finite number >= 0 (w*h is used instead)"),
    "area_box_mismatch": ("warning", "area differs from bbox w*h by more than 10% (no segmentation)"),
    "area_mask_mismatch": ("warning", "area differs from the segmentation's area by more than 10%"),
    "segmentation_invalid": ("warning", "segmentation is neither valid polygons nor a valid RLE"),
    "duplicate_box": ("warning", "same image, class and box as another annotation"),
    "near_duplicate_box": ("warning", "same image and class as another box with IoU > 0.95"),
    "category_without_annotations": ("warning", "no annotation uses the category"),
    "missing_area": ("info", "no area: COCOeval needs it; w*h is filled in"),
    "missing_iscrowd": ("info", "no iscrowd: COCOeval needs it; 0 is filled in"),
    "crowd_rle_mask": ("info", "iscrowd annotation with an RLE mask (not a training target)"),
    "image_without_annotations": ("info", "no annotation names the image"),
    "image_grayscale": ("info", "single-channel image file"),
    "image_has_alpha": ("info", "image file with an alpha channel"),
    "image_16bit": ("info", "image file with 16 bits or more per sample"),
}
SEVERITIES = ("error", "warning", "info")

BOX_TOLERANCE_PX = 2.0
BOX_TOLERANCE_FRACTION = 0.01
AREA_TOLERANCE = 0.10
NEAR_DUPLICATE_IOU = 0.95


@dataclass
class Finding:
    """One problem in one record.

    ``record_id`` is the record's id, or its position in its section when it has no usable id
    (then ``by_position`` is True). ``file`` is the annotation file, or the image file concerned.
    """

    severity: str
    code: str
    message: str
    file: str
    record: str
    record_id: int | str
    field: str
    by_position: bool = False


class FindingCollector:
    """Collects findings in the order the rules report them; severity comes from :data:`CODES`."""

    def __init__(self, ann_file: str) -> None:
        self.ann_file = ann_file
        self.items: list[Finding] = []

    def add(self, code: str, record: str, record_id: int | str, field_name: str, message: str, *,
            by_position: bool = False, file: str | None = None) -> None:
        """One finding; ``file`` defaults to the annotation file."""
        self.items.append(Finding(CODES[code][0], code, message, file or self.ann_file, record, record_id,
                                  field_name, by_position))

    def add_rows(self, code: str, section: Section, rows: np.ndarray, field_name: str,
                 messages: Iterable[str]) -> None:
        """One finding per row of ``section`` (rows: int array), messages in the same order."""
        for row, message in zip(rows.tolist(), messages):
            record_id, by_position = section.record_id(row)
            self.add(code, section.kind, record_id, field_name, message, by_position=by_position)
