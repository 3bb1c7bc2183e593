"""Lint rules for the image and category records, and for those that no annotation names.

Image records: ``file_name`` a non-empty string used once, ``width`` / ``height`` numbers from 1 to
:data:`~detdiff.data.coco.MAX_IMAGE_SIDE`. Category records: ``name`` a non-empty string. Ids of
both are checked by :func:`~detdiff.data.lint.parse.read_section`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from detdiff.data.coco import MAX_IMAGE_SIDE
from detdiff.data.lint.codes import FindingCollector
from detdiff.data.lint.parse import (OK, Section, field_values, number_column, read_section, report_status,
                                     show, str_status)


@dataclass
class Images:
    """The image section with the columns later rules need."""

    section: Section
    names: list[Any]
    name_ok: np.ndarray         # bool [n]
    widths: np.ndarray          # float64 [n]
    heights: np.ndarray         # float64 [n]
    size_ok: np.ndarray         # bool [n]: width and height both from 1 to MAX_IMAGE_SIDE


def lint_images(raw: list[Any], out: FindingCollector) -> Images:
    """Ids, ``file_name`` (present, a string, used once) and declared ``width`` / ``height``."""
    section = read_section("image", raw, out)
    names = field_values(section.records, "file_name")
    name_status = np.array([str_status(v) for v in names], dtype=np.uint8).reshape(len(names))
    report_status(out, section, "file_name", names, name_status, "a non-empty string")
    sizes = {}
    for key in ("width", "height"):
        values = field_values(section.records, key)
        size, status = number_column(values)
        report_status(out, section, key, values, status, "a positive number of pixels")
        usable = section.is_object & (status == OK) & (size >= 1) & (size <= MAX_IMAGE_SIDE)
        bad = np.flatnonzero(section.is_object & (status == OK) & ~usable)
        out.add_rows("image_size_invalid", section, bad, key,
                     (f"expected {key} between 1 and {MAX_IMAGE_SIDE} px, found {size[r]:g}" for r in bad.tolist()))
        sizes[key] = (size, usable)
    name_ok = section.is_object & (name_status == OK)
    first_with_name: dict[str, int] = {}
    repeats, firsts = [], []
    for row in np.flatnonzero(name_ok).tolist():
        first = first_with_name.setdefault(names[row], row)
        if first != row:
            repeats.append(row)
            firsts.append(first)
    out.add_rows("duplicate_file_name", section, np.array(repeats, dtype=np.int64), "file_name",
                 (f"expected each file to appear once, found {show(names[r])} already used by the image "
                  f"record at position {f}" for r, f in zip(repeats, firsts)))
    return Images(section, names, name_ok, sizes["width"][0], sizes["height"][0],
                  sizes["width"][1] & sizes["height"][1])


def lint_categories(raw: list[Any], out: FindingCollector) -> Section:
    """Ids and ``name`` (present, a non-empty string) of the category records."""
    section = read_section("category", raw, out)
    names = field_values(section.records, "name")
    status = np.array([str_status(v) for v in names], dtype=np.uint8).reshape(len(names))
    report_status(out, section, "name", names, status, "a non-empty string")
    return section


def lint_coverage(images: Images, cats: Section, image_row: np.ndarray, category_row: np.ndarray,
                  out: FindingCollector) -> dict[str, int]:
    """Images and categories that no annotation names.

    ``image_row`` / ``category_row``: int64 [A], each annotation's image / category row, -1 unknown.
    """
    img_sec = images.section
    used = np.zeros(len(img_sec), bool)
    used[image_row[image_row >= 0]] = True
    lonely = np.flatnonzero(img_sec.id_ok & ~img_sec.repeated & ~used)
    out.add_rows("image_without_annotations", img_sec, lonely, "id",
                 ("no annotation names this image (a background-only image)" for _ in lonely))
    used_cats = np.zeros(len(cats), bool)
    used_cats[category_row[category_row >= 0]] = True
    empty = np.flatnonzero(cats.id_ok & ~cats.repeated & ~used_cats)
    out.add_rows("category_without_annotations", cats, empty, "id",
                 ("expected at least one annotation of this category, found none" for _ in empty))
    return {"images_without_annotations": len(lonely), "categories_without_annotations": len(empty)}
