"""Lint rules for the image files: each ``file_name`` exists inside the image root, and optionally its header.

Without ``verify`` no image is opened: each folder named by a ``file_name`` is listed once, and only
names not found there as plain files are resolved and ``stat``-ed one by one. With ``verify`` each
existing file's header is read (size, corrupt files, grayscale / alpha / 16-bit); no pixels are decoded.
"""

from __future__ import annotations

import os
import stat
import warnings
from pathlib import Path
from typing import Callable

import numpy as np

from detdiff.data.coco import UnsafeImagePath, resolve_image_path
from detdiff.data.lint.codes import FindingCollector
from detdiff.data.lint.parse import one_line, show
from detdiff.data.lint.rules_records import Images


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


def lint_image_files(images: Images, images_dir: Path, verify: bool, out: FindingCollector) -> dict[str, int]:
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
            report(row, "unsafe_file_name", f"expected a path inside the image root, refused: {one_line(exc)}")
            continue
        except (OSError, ValueError) as exc:
            report(row, "image_file_missing", f"expected a usable file path, found {show(name)} ({one_line(exc)})")
            continue
        try:
            mode = os.stat(path).st_mode
        except (OSError, ValueError) as exc:
            reason = getattr(exc, "strerror", None) or one_line(exc)
            report(row, "image_file_missing", f"expected an image file at {show(str(path))}, found none ({reason})")
            continue
        if not stat.S_ISREG(mode):
            report(row, "image_file_missing", f"expected a regular file at {show(str(path))}, found something else")
            continue
        present.append(row)
    if verify:
        for row in sorted(present):
            _verify_image_file(images, row, Path(os.path.join(root, images.names[row])), report)
    return {"image_files_checked": len(rows), "image_files_verified": len(present) if verify else 0}


def _verify_image_file(images: Images, row: int, path: Path, report: Callable[..., None]) -> None:
    """Header checks of one existing image file: readable, declared size, grayscale / alpha / 16-bit."""
    try:
        file_w, file_h, bands, deep = _image_header(path)
    except Exception as exc:  # noqa: BLE001 - image decoders raise many types on corrupt headers
        report(row, "image_unreadable", f"expected a readable image, found {type(exc).__name__}: {one_line(exc)}")
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
