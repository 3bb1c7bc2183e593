"""COCO lint for ``detdiff check``: findings that name the record, its id and the field.

Every finding has a fixed severity (see :data:`CODES`):

- **error**: the record cannot be trusted for training; its id is in
  :meth:`LintReport.error_image_ids` / :meth:`LintReport.error_annotation_ids` and
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

Speed: per-field values are pulled out of the record dicts once into numpy arrays, and every check on
boxes runs over whole arrays; duplicates are found by sorting, pairs only inside one (image, class)
group. Without ``verify_images`` no image is opened: each folder named by a ``file_name`` is listed
once, and only names not found there as plain files are resolved and ``stat``-ed one by one.
"""

from __future__ import annotations

import json
import math
import os
import reprlib
import stat
import sys
import warnings
from collections import Counter
from dataclasses import asdict, dataclass
from itertools import chain
from pathlib import Path
from typing import Any, Callable, Iterable, TextIO

import numpy as np

from detdiff.boxes import group_offsets, group_pairs, pair_iou, xywh_to_xyxy
from detdiff.data.coco import (MAX_IMAGE_SIDE, CocoFormatError, UnsafeImagePath, check_coco_sections,
                               read_coco_json, resolve_image_path)

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

_MISSING = object()
_OK, _ABSENT, _BAD = 0, 1, 2    # status of one field of one record
_INT64_MIN, _INT64_MAX = -(2 ** 63), 2 ** 63 - 1
_RLE_MAX_PIXELS = 2 ** 31       # RLE masks larger than this are not handed to pycocotools
_RASTER_MAX_STEPS = 1e7         # polygons whose rasterisation would walk more boundary points are not either


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


@dataclass
class LintReport:
    """All findings of one annotation file plus what it holds (``counts``)."""

    ann_path: str
    findings: list[Finding]
    counts: dict[str, int]
    images_dir: str | None = None
    verify_images: bool = False

    @property
    def exit_status(self) -> int:
        """0 when clean or only info findings, 1 when there is any warning or error."""
        return int(any(f.severity != "info" for f in self.findings))

    def totals(self) -> dict[str, int]:
        """Number of findings per severity."""
        counted = Counter(f.severity for f in self.findings)
        return {s: counted.get(s, 0) for s in SEVERITIES}

    def _error_ids(self, record: str) -> set[int]:
        return {int(f.record_id) for f in self.findings
                if f.severity == "error" and f.record == record and not f.by_position}

    def error_image_ids(self) -> set[int]:
        """Ids of image records with an error: training must skip them (and their annotations)."""
        return self._error_ids("image")

    def error_annotation_ids(self) -> set[int]:
        """Ids of annotation records with an error: training must skip them."""
        return self._error_ids("annotation")

    def to_json(self, max_per_code: int | None = None) -> dict[str, Any]:
        """A JSON-ready dict; ``max_per_code`` caps the findings listed per code (totals stay exact)."""
        per_code = Counter(f.code for f in self.findings)
        listed: Counter[str] = Counter()
        findings = []
        for f in self.findings:
            if max_per_code is None or listed[f.code] < max_per_code:
                listed[f.code] += 1
                findings.append(asdict(f))
        return {
            "annotations": self.ann_path, "images_dir": self.images_dir, "verify_images": self.verify_images,
            "exit_status": self.exit_status, "counts": dict(self.counts), "totals": self.totals(),
            "codes": {c: {"severity": CODES[c][0], "count": n, "listed": listed[c]}
                      for c, n in sorted(per_code.items())},
            "findings": findings,
        }


_short = reprlib.Repr()
_short.maxstring = _short.maxother = 60
_short.maxlist = _short.maxdict = 6
_short.maxlevel = 3


def _one_line(exc: BaseException) -> str:
    """An exception's message with whitespace (newlines) collapsed, at most about 300 characters."""
    text = " ".join(str(exc).split())
    return text if len(text) <= 300 else f"{text[:300]}... ({len(text)} characters)"


def _show(value: Any) -> str:
    """A short, printable rendering of a value from the file (type and bounded repr)."""
    if value is _MISSING:
        return "nothing"
    return f"{type(value).__name__} {_short.repr(value)}"


class _Findings:
    """Collects findings; severity comes from :data:`CODES`."""

    def __init__(self, ann_file: str) -> None:
        self.ann_file = ann_file
        self.items: list[Finding] = []

    def add(self, code: str, record: str, record_id: int | str, field_name: str, message: str, *,
            by_position: bool = False, file: str | None = None) -> None:
        self.items.append(Finding(CODES[code][0], code, message, file or self.ann_file, record, record_id,
                                  field_name, by_position))

    def add_rows(self, code: str, section: _Section, rows: np.ndarray, field_name: str,
                 messages: Iterable[str]) -> None:
        """One finding per row of ``section`` (rows: int array), messages in the same order."""
        for row, message in zip(rows.tolist(), messages):
            record_id, by_position = section.record_id(row)
            self.add(code, section.kind, record_id, field_name, message, by_position=by_position)


def _values(records: list[dict], key: str) -> list[Any]:
    return [r.get(key, _MISSING) for r in records]


def _int_status(value: Any) -> int:
    if value is _MISSING:
        return _ABSENT
    return _OK if type(value) is int and _INT64_MIN <= value <= _INT64_MAX else _BAD


def _int_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """Integers (not bools) -> (int64 [n], status uint8 [n]); unusable entries hold 0."""
    n = len(values)
    if set(map(type, values)) <= {int}:
        try:
            return np.array(values, dtype=np.int64).reshape(n), np.zeros(n, np.uint8)
        except OverflowError:
            pass
    status = np.array([_int_status(v) for v in values], dtype=np.uint8).reshape(n)
    ints = np.array([v if s == _OK else 0 for v, s in zip(values, status.tolist())], dtype=np.int64)
    return ints.reshape(n), status


def _to_float(value: int | float) -> float:
    try:
        return float(value)
    except OverflowError:          # an int beyond float range
        return math.inf if value > 0 else -math.inf


def _number_status(value: Any) -> int:
    if value is _MISSING:
        return _ABSENT
    return _OK if type(value) in (int, float) else _BAD


def _number_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """JSON numbers (not bools) -> (float64 [n], status uint8 [n]); unusable entries hold NaN."""
    n = len(values)
    if set(map(type, values)) <= {int, float}:
        try:
            return np.array(values, dtype=np.float64).reshape(n), np.zeros(n, np.uint8)
        except OverflowError:
            pass
    status = np.array([_number_status(v) for v in values], dtype=np.uint8).reshape(n)
    nums = np.array([_to_float(v) if s == _OK else math.nan for v, s in zip(values, status.tolist())],
                    dtype=np.float64)
    return nums.reshape(n), status


def _box_status(value: Any) -> int:
    if value is _MISSING:
        return _ABSENT
    ok = type(value) is list and len(value) == 4 and all(type(v) in (int, float) for v in value)
    return _OK if ok else _BAD


def _box_column(values: list[Any]) -> tuple[np.ndarray, np.ndarray]:
    """``[x, y, w, h]`` lists -> (float64 [n, 4], status uint8 [n]); unusable rows hold NaN."""
    n = len(values)
    if set(map(type, values)) <= {list} and set(map(len, values)) <= {4}:
        flat = list(chain.from_iterable(values))
        if set(map(type, flat)) <= {int, float}:
            try:
                return np.array(flat, dtype=np.float64).reshape(n, 4), np.zeros(n, np.uint8)
            except OverflowError:
                pass
    status = np.array([_box_status(v) for v in values], dtype=np.uint8).reshape(n)
    nan_box = [math.nan] * 4
    boxes = [[_to_float(x) for x in v] if s == _OK else nan_box for v, s in zip(values, status.tolist())]
    return np.array(boxes, dtype=np.float64).reshape(n, 4), status


def _str_status(value: Any) -> int:
    if value is _MISSING:
        return _ABSENT
    return _OK if type(value) is str and value else _BAD


@dataclass
class _Section:
    """One of images / annotations / categories with its ids resolved."""

    kind: str                   # 'image' | 'annotation' | 'category'
    records: list[dict]         # records that are not objects are replaced by {}
    is_object: np.ndarray       # bool [n]
    ids: np.ndarray             # int64 [n], 0 where id_ok is False
    id_ok: np.ndarray           # bool [n]: an object whose id is an integer fitting int64
    unique_ids: np.ndarray      # int64 [u], sorted distinct usable ids
    first_row: np.ndarray       # int64 [u], row of the first record holding unique_ids[k]
    repeated: np.ndarray        # bool [n]: the id is shared with another record

    def __len__(self) -> int:
        return len(self.records)

    @property
    def kind_article(self) -> str:
        return f"an {self.kind}" if self.kind[0] in "aeiou" else f"a {self.kind}"

    def record_id(self, row: int) -> tuple[int, bool]:
        """(id, False) for a record with a usable id, else (position, True)."""
        return (int(self.ids[row]), False) if self.id_ok[row] else (row, True)

    def lookup(self, query: np.ndarray) -> np.ndarray:
        """Row of the first record with each queried id; -1 where no record has it. int64 [len(query)]."""
        if len(self.unique_ids) == 0:
            return np.full(len(query), -1, dtype=np.int64)
        pos = np.clip(np.searchsorted(self.unique_ids, query), 0, len(self.unique_ids) - 1)
        return np.where(self.unique_ids[pos] == query, self.first_row[pos], -1)


def _same_as_previous(equal_to_previous: np.ndarray, n: int) -> np.ndarray:
    """[n - 1] "row k+1 equals row k" -> bool [n] "row equals the one before" (row 0: False)."""
    flags = np.zeros(n, bool)
    flags[1:] = equal_to_previous
    return flags


def _read_section(kind: str, raw: list[Any], out: _Findings) -> _Section:
    """Objects and ids of one section; reports non-objects, bad ids and duplicate ids."""
    is_object = np.fromiter((isinstance(r, dict) for r in raw), dtype=bool, count=len(raw))
    records = raw if is_object.all() else [r if ok else {} for r, ok in zip(raw, is_object.tolist())]
    for row in np.flatnonzero(~is_object).tolist():
        out.add("record_not_object", kind, row, "", f"expected a JSON object, found {_show(raw[row])}",
                by_position=True)
    id_values = _values(records, "id")
    ids, status = _int_column(id_values)
    status[~is_object] = _OK      # already reported as a whole
    id_ok = is_object & (status == _OK)
    section = _Section(kind, records, is_object, ids, id_ok, np.zeros(0, np.int64), np.zeros(0, np.int64),
                       np.zeros(len(raw), bool))
    _report_status(out, section, "id", id_values, status, "an integer (64-bit)")

    rows = np.flatnonzero(id_ok)
    order = rows[np.argsort(ids[rows], kind="stable")]
    sorted_ids = ids[order]
    again = _same_as_previous(sorted_ids[1:] == sorted_ids[:-1], len(sorted_ids))
    group_start = np.maximum.accumulate(np.where(~again, np.arange(len(order)), 0))
    section.unique_ids = sorted_ids[~again]
    section.first_row = order[~again]
    section.repeated = id_ok & np.isin(ids, sorted_ids[again])
    first_of = order[group_start[again]]
    out.add_rows("duplicate_id", section, order[again], "id",
                 (f"expected a unique id, found id {i} again (first used at position {p})"
                  for i, p in zip(sorted_ids[again].tolist(), first_of.tolist())))
    return section


def _report_status(out: _Findings, section: _Section, field_name: str, values: list[Any], status: np.ndarray,
                   expected: str) -> None:
    """missing_key / wrong_type findings for a required field (non-objects are skipped)."""
    absent = np.flatnonzero(section.is_object & (status == _ABSENT))
    out.add_rows("missing_key", section, absent, field_name,
                 (f"expected key {field_name!r} ({expected}), found no such key" for _ in absent))
    bad = np.flatnonzero(section.is_object & (status == _BAD))
    out.add_rows("wrong_type", section, bad, field_name,
                 (f"expected {field_name!r} to be {expected}, found {_show(values[r])}" for r in bad.tolist()))


@dataclass
class _Images:
    section: _Section
    names: list[Any]
    name_ok: np.ndarray         # bool [n]
    widths: np.ndarray          # float64 [n]
    heights: np.ndarray         # float64 [n]
    size_ok: np.ndarray         # bool [n]: width and height both from 1 to MAX_IMAGE_SIDE


def _lint_images(raw: list[Any], out: _Findings) -> _Images:
    section = _read_section("image", raw, out)
    names = _values(section.records, "file_name")
    name_status = np.array([_str_status(v) for v in names], dtype=np.uint8).reshape(len(names))
    _report_status(out, section, "file_name", names, name_status, "a non-empty string")
    sizes = {}
    for key in ("width", "height"):
        values = _values(section.records, key)
        size, status = _number_column(values)
        _report_status(out, section, key, values, status, "a positive number of pixels")
        usable = section.is_object & (status == _OK) & (size >= 1) & (size <= MAX_IMAGE_SIDE)
        bad = np.flatnonzero(section.is_object & (status == _OK) & ~usable)
        out.add_rows("image_size_invalid", section, bad, key,
                     (f"expected {key} between 1 and {MAX_IMAGE_SIDE} px, found {size[r]:g}" for r in bad.tolist()))
        sizes[key] = (size, usable)
    name_ok = section.is_object & (name_status == _OK)
    first_with_name: dict[str, int] = {}
    repeats, firsts = [], []
    for row in np.flatnonzero(name_ok).tolist():
        first = first_with_name.setdefault(names[row], row)
        if first != row:
            repeats.append(row)
            firsts.append(first)
    out.add_rows("duplicate_file_name", section, np.array(repeats, dtype=np.int64), "file_name",
                 (f"expected each file to appear once, found {_show(names[r])} already used by the image "
                  f"record at position {f}" for r, f in zip(repeats, firsts)))
    return _Images(section, names, name_ok, sizes["width"][0], sizes["height"][0],
                   sizes["width"][1] & sizes["height"][1])


def _lint_categories(raw: list[Any], out: _Findings) -> _Section:
    section = _read_section("category", raw, out)
    names = _values(section.records, "name")
    status = np.array([_str_status(v) for v in names], dtype=np.uint8).reshape(len(names))
    _report_status(out, section, "name", names, status, "a non-empty string")
    return section


def _flatten_polygons(segs: list[list[Any]]) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
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
               and all(type(c) in (int, float) and math.isfinite(_to_float(c)) for c in p) for p in seg)


def _shoelace_areas(parts_per_ann: np.ndarray, coords_per_part: np.ndarray,
                    coords: np.ndarray) -> np.ndarray:
    """Exact polygon area per annotation (sum over its parts), float64 [m].

    Inputs as returned by :func:`_flatten_polygons` (no annotation without parts).
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
        return None, f"expected RLE 'size' [height, width] of positive integers, found {_show(size)}"
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
    return None, f"expected RLE 'counts' as a list of integers or a compressed string, found {_show(counts)}"


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


def _disagree(area: np.ndarray | float, reference: np.ndarray | float) -> np.ndarray:
    """|area - reference| > AREA_TOLERANCE x the larger of the two (bool, elementwise)."""
    return np.abs(area - reference) > AREA_TOLERANCE * np.maximum(np.maximum(area, reference), 1e-12)


@dataclass
class _Annotations:
    section: _Section
    image_row: np.ndarray       # int64 [A]: row of the image record, -1 unknown
    category_row: np.ndarray    # int64 [A]: row of the category record, -1 unknown
    crowd: np.ndarray           # bool [A]
    rle: np.ndarray             # bool [A]: segmentation is a valid RLE mask


def _lint_annotations(raw: list[Any], images: _Images, cats: _Section, out: _Findings) -> _Annotations:
    sec = _read_section("annotation", raw, out)
    obj = sec.is_object
    zero = np.flatnonzero(sec.id_ok & (sec.ids == 0))
    out.add_rows("annotation_id_zero", sec, zero, "id",
                 ("expected a non-zero id (pycocotools COCOeval treats id 0 as 'unmatched'), found 0"
                  for _ in zero))

    refs = {}
    for key, target, code in (("image_id", images.section, "unknown_image"),
                              ("category_id", cats, "unknown_category")):
        values = _values(sec.records, key)
        ref, status = _int_column(values)
        _report_status(out, sec, key, values, status, f"the integer id of {target.kind_article} record")
        row = np.where(obj & (status == _OK), target.lookup(ref), -1)
        unknown = np.flatnonzero(obj & (status == _OK) & (row < 0))
        out.add_rows(code, sec, unknown, key,
                     (f"expected the id of {target.kind_article} record, found {key} {ref[r]} that no record has"
                      for r in unknown.tolist()))
        refs[key] = row
    image_row, category_row = refs["image_id"], refs["category_id"]

    box_values = _values(sec.records, "bbox")
    boxes, box_status = _box_column(box_values)
    _report_status(out, sec, "bbox", box_values, box_status, "a list of 4 numbers [x, y, width, height]")
    has_box = obj & (box_status == _OK)
    finite = np.isfinite(boxes).all(axis=1)
    rows = np.flatnonzero(has_box & ~finite)
    out.add_rows("box_nonfinite", sec, rows, "bbox",
                 (f"expected finite numbers, found {boxes[r].tolist()}" for r in rows.tolist()))
    x, y, w, h = boxes.T
    with np.errstate(invalid="ignore"):
        positive = finite & (w > 0) & (h > 0)
    rows = np.flatnonzero(has_box & finite & ~positive)
    out.add_rows("box_nonpositive_size", sec, rows, "bbox",
                 (f"expected width and height > 0, found width {w[r]:g} and height {h[r]:g}" for r in rows.tolist()))

    crowd_values = _values(sec.records, "iscrowd")
    crowd_flag, crowd_status = _int_column(crowd_values)
    as_bool = [r for r in np.flatnonzero(crowd_status == _BAD).tolist() if type(crowd_values[r]) is bool]
    crowd_flag[as_bool], crowd_status[as_bool] = [int(crowd_values[r]) for r in as_bool], _OK
    crowd = obj & (crowd_status == _OK) & (crowd_flag == 1)
    rows = np.flatnonzero(obj & (crowd_status == _ABSENT))
    out.add_rows("missing_iscrowd", sec, rows, "iscrowd",
                 ("expected key 'iscrowd' (COCOeval reads it), found none; 0 is used" for _ in rows))
    rows = np.flatnonzero(obj & ((crowd_status == _BAD) | ((crowd_status == _OK) & (crowd_flag != 0) & ~crowd)))
    out.add_rows("iscrowd_invalid", sec, rows, "iscrowd",
                 (f"expected iscrowd 0 or 1, found {_show(crowd_values[r])}" for r in rows.tolist()))

    area_values = _values(sec.records, "area")
    area, area_status = _number_column(area_values)
    rows = np.flatnonzero(obj & (area_status == _ABSENT))
    out.add_rows("missing_area", sec, rows, "area",
                 ("expected key 'area' (COCOeval's size ranges read it), found none; width x height is used"
                  for _ in rows))
    area_ok = obj & (area_status == _OK) & np.isfinite(area) & (area >= 0)
    rows = np.flatnonzero(obj & (area_status != _ABSENT) & ~area_ok)
    out.add_rows("area_invalid", sec, rows, "area",
                 (f"expected a finite number >= 0, found {_show(area_values[r])}" for r in rows.tolist()))

    sized = _gather(images.size_ok, image_row, False)         # the annotation's image has a usable size
    width = np.where(sized, _gather(images.widths, image_row, np.nan), np.nan)
    height = np.where(sized, _gather(images.heights, image_row, np.nan), np.nan)
    placed = has_box & positive & sized
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

    is_rle, has_seg = _lint_segmentation(sec, width, height, area, area_ok, placed, out)
    with np.errstate(over="ignore", invalid="ignore"):
        box_area = w * h
        rows = np.flatnonzero(placed & area_ok & ~crowd & ~has_seg & _disagree(area, box_area))
    out.add_rows("area_box_mismatch", sec, rows, "area",
                 (f"expected area close to bbox width x height {box_area[r]:g} (no segmentation), "
                  f"found {area[r]:g}" for r in rows.tolist()))
    rows = np.flatnonzero(crowd & is_rle)
    out.add_rows("crowd_rle_mask", sec, rows, "segmentation",
                 ("iscrowd annotation with an RLE mask: counted, ignored as a training target" for _ in rows))

    _lint_duplicates(sec, placed & ~crowd & (category_row >= 0), image_row, category_row, boxes, out)
    return _Annotations(sec, image_row, category_row, crowd, is_rle)


def _lint_segmentation(sec: _Section, width: np.ndarray, height: np.ndarray, area: np.ndarray,
                       area_ok: np.ndarray, placed: np.ndarray, out: _Findings) -> tuple[np.ndarray, np.ndarray]:
    """Validate segmentations and compare ``area`` with the mask area.

    ``width`` / ``height``: float64 [A], the annotation's image size (NaN when unknown or unusable).
    Returns (valid RLE mask, any segmentation present), bool [A] each.
    """
    seg_values = _values(sec.records, "segmentation")
    seg_types = list(map(type, seg_values))
    poly_rows = [r for r, t in enumerate(seg_types) if t is list and seg_values[r]]
    dict_rows = [r for r, t in enumerate(seg_types) if t is dict]
    other_rows = [r for r, t in enumerate(seg_types)
                  if t not in (list, dict) and seg_values[r] is not _MISSING and seg_values[r] is not None]
    has_seg = np.zeros(len(sec), bool)
    has_seg[poly_rows + dict_rows + other_rows] = True
    has_seg &= sec.is_object
    is_rle = np.zeros(len(sec), bool)
    invalid = [(r, f"expected polygons or an RLE dict, found {_show(seg_values[r])}")
               for r in other_rows if sec.is_object[r]]

    segs = [seg_values[r] for r in poly_rows]
    flat = _flatten_polygons(segs)
    if flat is None:
        keep = [_polygon_valid(s) for s in segs]
        invalid += [(r, "expected polygons as lists of an even number (>= 6) of finite coordinates, found "
                     + _show(s)) for r, s, k in zip(poly_rows, segs, keep) if not k]
        poly_rows = [r for r, k in zip(poly_rows, keep) if k]
        segs = [s for s, k in zip(segs, keep) if k]
        flat = _flatten_polygons(segs)
    mismatch_rows, messages = [], []
    if poly_rows and flat is not None:
        poly_idx = np.array(poly_rows, dtype=np.int64)
        shoelace = _shoelace_areas(*flat)
        img_h, img_w = height[poly_idx], width[poly_idx]
        with np.errstate(over="ignore", invalid="ignore"):
            candidates = np.flatnonzero(placed[poly_idx] & area_ok[poly_idx] & _disagree(area[poly_idx], shoelace))
        for k in candidates.tolist():
            row = poly_rows[k]
            text = f"expected area close to the polygon's area {shoelace[k]:g}"
            if _raster_steps(segs[k]) <= _RASTER_MAX_STEPS and img_h[k] * img_w[k] <= _RLE_MAX_PIXELS:
                pixels = _polygon_raster_area(segs[k], img_h[k], img_w[k])
                if not _disagree(area[row], pixels):
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
        if placed[r] and area_ok[r] and _disagree(area[r], pixels):
            mismatch_rows.append(r)
            messages.append(f"expected area close to the RLE mask's {pixels:g} pixels (pycocotools.mask), "
                            f"found {area[r]:g}")
    out.add_rows("area_mask_mismatch", sec, np.array(mismatch_rows, dtype=np.int64), "area", messages)
    invalid.sort()
    out.add_rows("segmentation_invalid", sec, np.array([r for r, _ in invalid], dtype=np.int64), "segmentation",
                 [m for _, m in invalid])
    return is_rle, has_seg


def _gather(values: np.ndarray, rows: np.ndarray, fill: Any) -> np.ndarray:
    """``values[rows]`` with ``fill`` where a row is -1 (``values`` may be empty). [len(rows)]"""
    if len(values) == 0:
        return np.full(len(rows), fill)
    return np.where(rows >= 0, values[np.maximum(rows, 0)], fill)


def _lint_duplicates(sec: _Section, usable: np.ndarray, image_row: np.ndarray, category_row: np.ndarray,
                     boxes: np.ndarray, out: _Findings) -> None:
    """Exact and near-duplicate boxes (same image and class), found by sorting; pairs only within groups."""
    rows = np.flatnonzero(usable)
    b = boxes[rows]
    order = np.lexsort((b[:, 3], b[:, 2], b[:, 1], b[:, 0], category_row[rows], image_row[rows]))
    rows, b = rows[order], b[order]
    group = image_row[rows] * (int(category_row.max(initial=0)) + 1) + category_row[rows]
    same_as_previous = _same_as_previous((group[1:] == group[:-1]) & (b[1:] == b[:-1]).all(axis=1), len(rows))
    run_start = np.maximum.accumulate(np.where(~same_as_previous, np.arange(len(rows)), 0))
    dup = np.flatnonzero(same_as_previous)
    out.add_rows("duplicate_box", sec, rows[dup], "bbox",
                 (f"expected one annotation per object, found the same class and box {b[k].tolist()} as "
                  f"annotation {_record_label(sec, rows[run_start[k]])}" for k in dup.tolist()))

    flagged: dict[int, tuple[int, float]] = {}
    xyxy = xywh_to_xyxy(b)
    for left, right in group_pairs(group_offsets(group)):
        later = left < right                             # each unordered pair once
        left, right = left[later], right[later]
        iou = pair_iou(xyxy, left, right)
        near = np.flatnonzero((iou > NEAR_DUPLICATE_IOU) & ~(b[left] == b[right]).all(axis=1))
        for k in near.tolist():
            flagged.setdefault(int(right[k]), (int(left[k]), float(iou[k])))
    picks = sorted(flagged)
    out.add_rows("near_duplicate_box", sec, rows[np.array(picks, dtype=np.int64)], "bbox",
                 (f"expected distinct objects, found IoU {flagged[k][1]:.3f} (> {NEAR_DUPLICATE_IOU}) with "
                  f"annotation {_record_label(sec, rows[flagged[k][0]])} of the same class" for k in picks))


def _record_label(sec: _Section, row: int) -> str:
    record_id, by_position = sec.record_id(int(row))
    return f"at position {record_id}" if by_position else str(record_id)


def _lint_coverage(images: _Images, cats: _Section, anns: _Annotations, out: _Findings) -> dict[str, int]:
    """Images and categories that no annotation names."""
    img_sec = images.section
    used = np.zeros(len(img_sec), bool)
    used[anns.image_row[anns.image_row >= 0]] = True
    lonely = np.flatnonzero(img_sec.id_ok & ~img_sec.repeated & ~used)
    out.add_rows("image_without_annotations", img_sec, lonely, "id",
                 ("no annotation names this image (a background-only image)" for _ in lonely))
    used_cats = np.zeros(len(cats), bool)
    used_cats[anns.category_row[anns.category_row >= 0]] = True
    empty = np.flatnonzero(cats.id_ok & ~cats.repeated & ~used_cats)
    out.add_rows("category_without_annotations", cats, empty, "id",
                 ("expected at least one annotation of this category, found none" for _ in empty))
    return {"images_without_annotations": len(lonely), "categories_without_annotations": len(empty)}


def _regular_files(root: Path, root_resolved: Path, folder: str) -> set[str]:
    """Names of plain (non-symlink) files in ``root/folder``; empty when the folder path has a symlink."""
    try:
        if Path(os.path.realpath(root / folder)) != root_resolved.joinpath(folder):
            return set()
        with os.scandir(root / folder) as entries:
            return {e.name for e in entries if e.is_file(follow_symlinks=False)}
    except (OSError, ValueError):
        return set()


def _image_header(path: Path) -> tuple[int, int, tuple[str, ...], str]:
    """(width, height, bands, deep mode) from the file header; no pixels are decoded.

    ``deep mode`` names the stored sample format when it has 16 bits or more per sample (PIL's mode,
    or the raw mode of the first tile for 16-bit RGB(A) PNGs that PIL opens as 8-bit), else "".
    """
    from PIL import Image

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with Image.open(path) as im:
            width, height = im.size
            bands = im.getbands()
            args = im.tile[0].args if im.tile else ""         # PNG: the raw mode; TIFF: (raw mode, ...)
            raw_mode = args if isinstance(args, str) else str(args[0]) if isinstance(args, tuple) and args else ""
            deep = im.mode if im.mode in ("I", "F") or "16" in im.mode else raw_mode if "16" in raw_mode else ""
    return width, height, bands, deep


def _lint_image_files(images: _Images, images_dir: Path, verify: bool, out: _Findings) -> dict[str, int]:
    """Existence and safety of each file_name; with ``verify`` also header size and pixel format.

    Fast path: each folder named by a file_name is listed once, and a name found there as a plain file
    (no symlink on the way) exists and stays inside the root. Every other name goes through
    :func:`detdiff.data.coco.resolve_image_path` and ``os.stat``.
    """
    sec = images.section
    root, root_resolved = str(images_dir), images_dir.resolve()
    listings: dict[str, set[str]] = {}

    def listed(name: str) -> bool:
        if name.startswith(("/", "\\")) or name[1:2] == ":" or ".." in name:
            return False
        folder, base = os.path.split(name)
        if folder not in listings:
            listings[folder] = _regular_files(images_dir, root_resolved, folder)
        return base in listings[folder]

    def report(row: int, code: str, message: str, field_name: str = "file_name") -> None:
        record_id, by_position = sec.record_id(row)
        out.add(code, "image", record_id, field_name, message, by_position=by_position,
                file=os.path.join(root, images.names[row]))

    rows = np.flatnonzero(images.name_ok).tolist()
    present = [row for row in rows if listed(images.names[row])]
    for row in sorted(set(rows) - set(present)):
        name = images.names[row]
        try:
            path = resolve_image_path(images_dir, name)
        except UnsafeImagePath as exc:
            report(row, "unsafe_file_name", f"expected a path inside the image root, refused: {_one_line(exc)}")
            continue
        except (OSError, ValueError) as exc:
            report(row, "image_file_missing", f"expected a usable file path, found {_show(name)} ({_one_line(exc)})")
            continue
        try:
            mode = os.stat(path).st_mode
        except (OSError, ValueError) as exc:
            reason = getattr(exc, "strerror", None) or _one_line(exc)
            report(row, "image_file_missing", f"expected an image file at {_show(str(path))}, found none ({reason})")
            continue
        if not stat.S_ISREG(mode):
            report(row, "image_file_missing", f"expected a regular file at {_show(str(path))}, found something else")
            continue
        present.append(row)
    if verify:
        for row in sorted(present):
            _verify_image_file(images, row, Path(os.path.join(root, images.names[row])), report)
    return {"image_files_checked": len(rows), "image_files_verified": len(present) if verify else 0}


def _verify_image_file(images: _Images, row: int, path: Path, report: Callable[..., None]) -> None:
    """Header checks of one existing image file: readable, declared size, grayscale / alpha / 16-bit."""
    try:
        file_w, file_h, bands, deep = _image_header(path)
    except Exception as exc:  # noqa: BLE001 - image decoders raise many types on corrupt headers
        report(row, "image_unreadable", f"expected a readable image, found {type(exc).__name__}: {_one_line(exc)}")
        return
    declared = (images.widths[row], images.heights[row])
    if images.size_ok[row] and declared != (file_w, file_h):
        swapped = " (width and height swapped: EXIF rotation?)" if declared == (file_h, file_w) else ""
        report(row, "image_size_mismatch", f"expected the declared size {declared[0]:g}x{declared[1]:g}, found "
               f"{file_w}x{file_h} in the file{swapped}", "width" if declared[0] != file_w else "height")
    colour = set(bands) - {"A"}
    if colour and colour <= {"L", "1", "I", "F"}:
        report(row, "image_grayscale", f"single-channel image file (bands {''.join(bands)})")
    if "A" in bands:
        report(row, "image_has_alpha", f"image file with an alpha channel (bands {''.join(bands)})")
    if deep:
        report(row, "image_16bit", f"image file with 16 bits or more per sample ({deep})")


def lint_coco(ann_path: str | Path, images_dir: str | Path | None = None, *, verify_images: bool = False,
              data: dict[str, Any] | None = None) -> LintReport:
    """Lint one COCO detection file; image files too when ``images_dir`` is given.

    Parameters
    ----------
    ann_path : the annotation file (read unless ``data`` is given; always used to name the file).
    images_dir : image root that ``file_name`` is relative to; ``None`` skips all file checks.
    verify_images : also open each image's header (size, corrupt files, grayscale / alpha / 16-bit).
    data : an already-read COCO dict.

    Raises
    ------
    CocoFormatError : the input is not usable as COCO at all (not JSON, sections missing or not lists).
    NotADirectoryError : ``images_dir`` is not a folder.
    """
    source = str(ann_path)
    data = read_coco_json(ann_path) if data is None else check_coco_sections(data, ann_path)
    if images_dir is not None and not Path(images_dir).is_dir():
        raise NotADirectoryError(f"{images_dir}: image folder does not exist or is not a folder")
    out = _Findings(source)
    for key in ("images", "annotations", "categories"):
        if not data[key]:
            out.add("section_empty", "file", key, key, f"expected at least one record in {key!r}, found none")
    images = _lint_images(data["images"], out)
    cats = _lint_categories(data["categories"], out)
    anns = _lint_annotations(data["annotations"], images, cats, out)
    counts = {"images": len(images.section), "annotations": len(anns.section), "categories": len(cats),
              "crowd_annotations": int(anns.crowd.sum()), "crowd_rle_masks": int((anns.crowd & anns.rle).sum())}
    counts.update(_lint_coverage(images, cats, anns, out))
    if images_dir is not None:
        counts.update(_lint_image_files(images, Path(images_dir), verify_images, out))
    return LintReport(source, out.items, counts, None if images_dir is None else str(images_dir), verify_images)


def format_text(report: LintReport, *, per_code: int = 10) -> str:
    """Human summary: counts, then findings grouped by severity and code, ``per_code`` listed per code."""
    c = report.counts
    lines = [f"{report.ann_path}: {c['images']} images, {c['annotations']} annotations, {c['categories']} "
             f"categories ({c['crowd_annotations']} crowd, {c['crowd_rle_masks']} with RLE masks)"]
    if "image_files_checked" in c:
        lines.append(f"image files under {report.images_dir}: {c['image_files_checked']} checked"
                     + (f", {c['image_files_verified']} opened" if report.verify_images else ""))
    by_code: dict[str, list[Finding]] = {}
    for f in report.findings:
        by_code.setdefault(f.code, []).append(f)
    for severity in SEVERITIES:
        codes = sorted((code for code in by_code if CODES[code][0] == severity),
                       key=lambda code: (-len(by_code[code]), code))
        if not codes:
            continue
        lines.append("")
        lines.append(f"{severity.upper()}S" if severity != "info" else "INFO")
        for code in codes:
            found = by_code[code]
            lines.append(f"  {code} ({len(found)}): {CODES[code][1]}")
            for f in found[:per_code]:
                where = f"{f.record} at position {f.record_id}" if f.by_position else f"{f.record} {f.record_id}"
                file = f" [{f.file}]" if f.file != report.ann_path else ""
                lines.append(f"    {where}, {f.field or 'record'}: {f.message}{file}")
            if len(found) > per_code:
                lines.append(f"    ... and {len(found) - per_code} more")
    totals = report.totals()
    lines.append("")
    if report.findings:
        lines.append(f"{totals['error']} errors, {totals['warning']} warnings, {totals['info']} info; "
                     f"exit status {report.exit_status}"
                     + ("; records with errors are skipped by training" if totals["error"] else ""))
    else:
        lines.append("no problems found; exit status 0")
    return "\n".join(lines)


def _printable(text: str, stream: TextIO) -> str:
    """``text`` with anything the stream's encoding cannot take (lone surrogates...) backslash-escaped."""
    encoding = getattr(stream, "encoding", None) or "utf-8"
    return text.encode(encoding, "backslashreplace").decode(encoding)


def run_check(ann_path: str | Path, images_dir: str | Path | None = None, *, as_json: bool = False,
              verify_images: bool = False, out: TextIO | None = None) -> int:
    """``detdiff check``: print the lint as text or JSON and return the exit status.

    0: clean or info only; 1: warnings or errors; 2: the input is unusable (one message on stderr).
    """
    out = sys.stdout if out is None else out
    try:
        report = lint_coco(ann_path, images_dir, verify_images=verify_images)
    except (CocoFormatError, NotADirectoryError) as exc:
        print(_printable(f"detdiff check: {exc}", sys.stderr), file=sys.stderr)
        return 2
    text = json.dumps(report.to_json(), indent=2) if as_json else format_text(report)
    out.write(_printable(text, out) + "\n")
    return report.exit_status
