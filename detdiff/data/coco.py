"""COCO annotations in one neutral, array-based form that everything downstream reads.

COCO boxes are ``[x, y, width, height]`` in pixels with a top-left origin (COCO data format,
cocodataset.org). Ids are arbitrary integers: nothing here assumes they start at 0 or 1 or are
contiguous. Images, categories and annotations are sorted by id so every run sees the same order;
a row's *index* (position in these arrays) is what the training log stores.

Example of one image's records after ingest::

    image_ids[i] = 1042, file_names[i] = "shelf/0001.jpg", widths[i] = 640, heights[i] = 480
    annotations of image i: ann_slice(i) -> rows j with ann_ids[j], labels[j] (category index),
    boxes[j] = [x, y, w, h] (float64, original pixels), iscrowd[j]
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from detdiff.boxes import xywh_to_xyxy


class CocoFormatError(ValueError):
    """The file is not usable as COCO at all (not JSON, or not an object with COCO sections)."""


def read_coco_json(path: str | Path) -> dict[str, Any]:
    """Read a COCO annotation file; raise :class:`CocoFormatError` with one clear sentence if unusable."""
    path = Path(path)
    try:
        text = path.read_bytes()
    except OSError as exc:
        raise CocoFormatError(f"{path}: cannot read file: {exc.strerror or exc}") from exc
    try:
        data = json.loads(text)
    except (ValueError, RecursionError) as exc:
        raise CocoFormatError(f"{path}: not valid JSON ({exc})") from exc
    return check_coco_sections(data, path)


def check_coco_sections(data: Any, source: str | Path) -> dict[str, Any]:
    """Return ``data`` if it is an object whose images/annotations/categories are lists, else raise
    :class:`CocoFormatError` naming ``source``."""
    if not isinstance(data, dict):
        raise CocoFormatError(f"{source}: top level must be a JSON object with 'images', 'annotations' "
                              f"and 'categories', got {type(data).__name__}")
    missing = [k for k in ("images", "annotations", "categories") if k not in data]
    if missing:
        raise CocoFormatError(f"{source}: not a COCO detection file: missing top-level key(s) {missing}")
    not_lists = [f"{k!r} is {type(data[k]).__name__}" for k in ("images", "annotations", "categories")
                 if not isinstance(data[k], list)]
    if not_lists:
        raise CocoFormatError(f"{source}: COCO sections must be JSON lists, but {', '.join(not_lists)}")
    return data


@dataclass
class CocoDataset:
    """Images, categories and annotations as sorted numpy arrays (see module docstring)."""

    image_ids: np.ndarray                 # int64 [I]
    file_names: list[str]                 # [I]
    widths: np.ndarray                    # int64 [I]
    heights: np.ndarray                   # int64 [I]
    category_ids: np.ndarray              # int64 [C]
    category_names: list[str]             # [C]
    supercategories: list[str]            # [C]
    ann_ids: np.ndarray                   # int64 [A], sorted by (image index, ann id)
    ann_image_index: np.ndarray           # int64 [A], row in image arrays
    labels: np.ndarray                    # int64 [A], row in category arrays (0..C-1)
    boxes: np.ndarray                     # float64 [A, 4] xywh, original pixels
    areas: np.ndarray                     # float64 [A], the file's `area` (w*h where absent)
    iscrowd: np.ndarray                   # bool [A]
    ann_path: Path | None = None
    images_dir: Path | None = None
    image_offsets: np.ndarray = field(init=False)  # int64 [I+1]: annotations of image i are offsets[i]:offsets[i+1]

    def __post_init__(self) -> None:
        counts = np.bincount(self.ann_image_index, minlength=len(self.image_ids))
        self.image_offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)

    @property
    def num_images(self) -> int:
        return len(self.image_ids)

    @property
    def num_annotations(self) -> int:
        return len(self.ann_ids)

    @property
    def num_classes(self) -> int:
        return len(self.category_ids)

    def ann_slice(self, image_index: int) -> slice:
        """Rows of the annotation arrays that belong to image ``image_index``."""
        return slice(int(self.image_offsets[image_index]), int(self.image_offsets[image_index + 1]))

    def image_path(self, image_index: int) -> Path:
        root = self.images_dir if self.images_dir is not None else Path(".")
        return root / self.file_names[image_index]

    def boxes_xyxy(self) -> np.ndarray:
        """All boxes as ``[x1, y1, x2, y2]`` float64 [A, 4]."""
        return xywh_to_xyxy(self.boxes)

    def subset_images(self, image_indices: np.ndarray) -> CocoDataset:
        """A dataset holding only the given images (rows), e.g. a shard for one process."""
        image_indices = np.sort(np.asarray(image_indices, dtype=np.int64))
        remap = np.full(self.num_images, -1, dtype=np.int64)
        remap[image_indices] = np.arange(len(image_indices))
        keep = remap[self.ann_image_index] >= 0
        return CocoDataset(
            image_ids=self.image_ids[image_indices], file_names=[self.file_names[i] for i in image_indices],
            widths=self.widths[image_indices], heights=self.heights[image_indices],
            category_ids=self.category_ids, category_names=self.category_names,
            supercategories=self.supercategories, ann_ids=self.ann_ids[keep],
            ann_image_index=remap[self.ann_image_index[keep]], labels=self.labels[keep],
            boxes=self.boxes[keep], areas=self.areas[keep], iscrowd=self.iscrowd[keep],
            ann_path=self.ann_path, images_dir=self.images_dir)

    def to_coco_dict(self) -> dict[str, Any]:
        """A clean COCO dict of what was ingested (for pycocotools' COCOeval: every field it needs)."""
        images = [{"id": int(i), "file_name": f, "width": int(w), "height": int(h)}
                  for i, f, w, h in zip(self.image_ids, self.file_names, self.widths, self.heights)]
        cats = [{"id": int(c), "name": n, "supercategory": s}
                for c, n, s in zip(self.category_ids, self.category_names, self.supercategories)]
        anns = [{"id": int(a), "image_id": int(self.image_ids[ii]), "category_id": int(self.category_ids[lb]),
                 "bbox": [float(v) for v in box], "area": float(ar), "iscrowd": int(cr)}
                for a, ii, lb, box, ar, cr in zip(self.ann_ids, self.ann_image_index, self.labels,
                                                  self.boxes, self.areas, self.iscrowd)]
        return {"images": images, "annotations": anns, "categories": cats}


MAX_IMAGE_SIDE = 2 ** 31 - 1   # declared width/height above this are refused (int32 limit of image libraries)


def _finite_number(value: Any) -> bool:
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        return False
    try:
        return math.isfinite(value)
    except OverflowError:          # an int too large for a float
        return False


def _int_id(value: Any) -> bool:
    """An integer id (not a bool) that fits int64."""
    return isinstance(value, int) and not isinstance(value, bool) and -(2 ** 63) <= value < 2 ** 63


def build_dataset(data: dict[str, Any], *, ann_path: str | Path | None = None,
                  images_dir: str | Path | None = None, drop_image_ids: set[int] = frozenset(),
                  drop_ann_ids: set[int] = frozenset(), min_box_side: float = 0.0) -> CocoDataset:
    """Build a :class:`CocoDataset` from a COCO dict, keeping only records that are usable for training.

    Records that are malformed (lint reports them as errors) are skipped rather than trusted: images
    without a valid id/file_name/size, annotations of unknown images or categories, non-finite or
    non-positive boxes, and ids listed in ``drop_image_ids`` / ``drop_ann_ids``. Duplicate ids keep the
    first record. Nothing here raises on a bad record; :func:`detdiff.data.lint.lint_coco` names them.
    """
    images: dict[int, tuple[str, int, int]] = {}
    for rec in data.get("images") or []:
        if not isinstance(rec, dict):
            continue
        iid, name, w, h = rec.get("id"), rec.get("file_name"), rec.get("width"), rec.get("height")
        if (_int_id(iid) and isinstance(name, str) and name
                and _finite_number(w) and _finite_number(h) and 1 <= w <= MAX_IMAGE_SIDE and 1 <= h <= MAX_IMAGE_SIDE
                and iid not in images and iid not in drop_image_ids):
            images[iid] = (name, int(w), int(h))
    cats: dict[int, tuple[str, str]] = {}
    for rec in data.get("categories") or []:
        if isinstance(rec, dict) and _int_id(rec.get("id")):
            if rec["id"] not in cats:
                cats[rec["id"]] = (str(rec.get("name", rec["id"])), str(rec.get("supercategory", "")))
    image_ids = np.array(sorted(images), dtype=np.int64)
    category_ids = np.array(sorted(cats), dtype=np.int64)
    image_row = {int(i): r for r, i in enumerate(image_ids)}
    cat_row = {int(c): r for r, c in enumerate(category_ids)}

    rows: list[tuple[int, int, int, float, float, float, float, float, bool]] = []
    seen: set[int] = set()
    for rec in data.get("annotations") or []:
        if not isinstance(rec, dict):
            continue
        aid, iid, cid, bbox = rec.get("id"), rec.get("image_id"), rec.get("category_id"), rec.get("bbox")
        if not _int_id(aid) or aid in seen or aid in drop_ann_ids:
            continue
        if not (_int_id(iid) and iid in image_row and _int_id(cid) and cid in cat_row) \
                or not isinstance(bbox, list) or len(bbox) != 4:
            continue
        if not all(_finite_number(v) for v in bbox) or bbox[2] <= 0 or bbox[3] <= 0:
            continue
        if bbox[2] < min_box_side or bbox[3] < min_box_side:
            continue
        area = rec.get("area")
        area = float(area) if _finite_number(area) else float(bbox[2] * bbox[3])
        seen.add(aid)
        rows.append((image_row[iid], aid, cat_row[cid], *map(float, bbox), area, bool(rec.get("iscrowd", 0))))
    rows.sort(key=lambda r: (r[0], r[1]))
    index = np.array([r[:3] for r in rows], dtype=np.int64).reshape(-1, 3)     # ids stay exact above 2**53
    arr = np.array([r[3:8] for r in rows], dtype=np.float64).reshape(-1, 5)
    return CocoDataset(
        image_ids=image_ids, file_names=[images[int(i)][0] for i in image_ids],
        widths=np.array([images[int(i)][1] for i in image_ids], dtype=np.int64),
        heights=np.array([images[int(i)][2] for i in image_ids], dtype=np.int64),
        category_ids=category_ids, category_names=[cats[int(c)][0] for c in category_ids],
        supercategories=[cats[int(c)][1] for c in category_ids],
        ann_ids=index[:, 1].copy(), ann_image_index=index[:, 0].copy(),
        labels=index[:, 2].copy(), boxes=arr[:, :4].copy(), areas=arr[:, 4].copy(),
        iscrowd=np.array([r[8] for r in rows], dtype=bool),
        ann_path=Path(ann_path) if ann_path else None, images_dir=Path(images_dir) if images_dir else None)


class UnsafeImagePath(ValueError):
    """A ``file_name`` that would read outside the image root (``..``, absolute path, symlink out)."""


def resolve_image_path(images_dir: str | Path, file_name: str) -> Path:
    """Return the image file for ``file_name`` under ``images_dir``; refuse anything that leaves the root.

    Refused: absolute paths, any ``..`` component, and symlinks (at any level) that resolve outside
    the root. The file need not exist; callers report missing files themselves.
    """
    root = Path(images_dir).resolve()
    rel = Path(file_name)
    if rel.is_absolute() or file_name.startswith(("/", "\\")) or (len(file_name) > 1 and file_name[1] == ":"):
        raise UnsafeImagePath(f"absolute path {file_name!r} is not allowed; file_name must be relative to {root}")
    if ".." in rel.parts or ".." in file_name.replace("\\", "/").split("/"):
        raise UnsafeImagePath(f"{file_name!r} contains '..' and would leave the image root {root}")
    target = (root / rel).resolve()
    if target != root and root not in target.parents:
        raise UnsafeImagePath(f"{file_name!r} resolves to {target}, outside the image root {root} (symlink)")
    return root / rel


def save_dataset(dataset: CocoDataset, path: str | Path) -> None:
    """Store the ingested dataset in a run folder (arrays in ``.npz``, strings in JSON), atomically."""
    path = Path(path)
    arrays = {k: getattr(dataset, k) for k in ("image_ids", "widths", "heights", "category_ids", "ann_ids",
                                               "ann_image_index", "labels", "boxes", "areas", "iscrowd")}
    strings = {"file_names": dataset.file_names, "category_names": dataset.category_names,
               "supercategories": dataset.supercategories,
               "ann_path": str(dataset.ann_path) if dataset.ann_path else None,
               "images_dir": str(dataset.images_dir) if dataset.images_dir else None}
    tmp = path.with_name(path.name + ".tmp.npz")
    np.savez(tmp, strings=np.array(json.dumps(strings)), **arrays)
    tmp.replace(path)


def load_saved_dataset(path: str | Path) -> CocoDataset:
    """Read a dataset written by :func:`save_dataset`."""
    with np.load(path, allow_pickle=False) as z:
        strings = json.loads(str(z["strings"]))
        arrays = {k: z[k] for k in z.files if k != "strings"}
    return CocoDataset(**arrays, file_names=strings["file_names"], category_names=strings["category_names"],
                       supercategories=strings["supercategories"],
                       ann_path=Path(strings["ann_path"]) if strings["ann_path"] else None,
                       images_dir=Path(strings["images_dir"]) if strings["images_dir"] else None)
