"""Entry points of the lint: :func:`lint_coco` (all rules on one COCO file), :func:`run_check` (``detdiff check``).

Rules run in a fixed order (empty sections, images, categories, annotations, coverage, image files),
which is the order of the findings in the report.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any, TextIO

from detdiff.data.coco import CocoFormatError, check_coco_sections, read_coco_json
from detdiff.data.lint.codes import FindingCollector
from detdiff.data.lint.report import LintReport, format_text
from detdiff.data.lint.rules_annotations import lint_annotations
from detdiff.data.lint.rules_files import lint_image_files
from detdiff.data.lint.rules_records import lint_categories, lint_coverage, lint_images


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
    out = FindingCollector(source)
    for key in ("images", "annotations", "categories"):
        if not data[key]:
            out.add("section_empty", "file", key, key, f"expected at least one record in {key!r}, found none")
    images = lint_images(data["images"], out)
    cats = lint_categories(data["categories"], out)
    anns = lint_annotations(data["annotations"], images, cats, out)
    counts = {"images": len(images.section), "annotations": len(anns.section), "categories": len(cats),
              "crowd_annotations": int(anns.crowd.sum()), "crowd_rle_masks": int((anns.crowd & anns.rle).sum())}
    counts.update(lint_coverage(images, cats, anns.image_row, anns.category_row, out))
    if images_dir is not None:
        counts.update(lint_image_files(images, Path(images_dir), verify_images, out))
    return LintReport(source, out.items, counts, None if images_dir is None else str(images_dir), verify_images)


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
