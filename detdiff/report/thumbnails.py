"""Thumbnails for the report cards: crop regions, pictures cut from the dataset images, and the box overlays.

Pictures are written as ``RUNDIR/report/thumbs/<name>.jpg``, each dataset image decoded once. Boxes are drawn
as inline SVG over the thumbnails: annotated boxes solid blue with a square mark, the detector's boxes dashed
orange with a round mark, suggested fixes dotted purple with a diamond mark (line style and shape, not
colour alone); :func:`legend` is the key.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

from detdiff.data.coco import UnsafeImagePath, resolve_image_path
from detdiff.report.elements import Markup, el
from detdiff.report.run_folder import RunFolder


def crop_regions(first: np.ndarray, second: np.ndarray, width: np.ndarray, height: np.ndarray) -> np.ndarray:
    """Square regions that show both boxes with context, shifted to stay inside the image: xywh ``[n, 4]``.

    ``first`` / ``second`` are xywh ``[n, 4]`` (rows may be all-NaN in one of them, not both); ``width`` /
    ``height`` ``[n]`` are the image sizes. The side is 1.8x the union's longer side + 24 px, at most the
    image's longer side.
    """
    boxes = np.stack([first, second])                                  # [2, n, 4]
    x1 = np.nanmin(boxes[..., 0], axis=0)
    y1 = np.nanmin(boxes[..., 1], axis=0)
    x2 = np.nanmax(boxes[..., 0] + boxes[..., 2], axis=0)
    y2 = np.nanmax(boxes[..., 1] + boxes[..., 3], axis=0)
    side = np.minimum(1.8 * np.maximum(x2 - x1, y2 - y1) + 24.0, np.maximum(width, height))
    x0 = np.clip((x1 + x2 - side) / 2, 0, np.maximum(0, width - side))
    y0 = np.clip((y1 + y2 - side) / 2, 0, np.maximum(0, height - side))
    return np.stack([x0, y0, side, side], axis=1)


@dataclass(frozen=True)
class Shot:
    """One picture to cut from a dataset image: ``rect`` xywh in the image's annotated pixel frame."""

    name: str
    row: int
    rect: tuple[float, float, float, float]
    size: int


_FRAME_BGR = (56, 49, 43)          # the card frame colour, shown where a crop reaches past the image
_REDUCED_READ = {1: cv2.IMREAD_COLOR, 2: cv2.IMREAD_REDUCED_COLOR_2, 4: cv2.IMREAD_REDUCED_COLOR_4,
                 8: cv2.IMREAD_REDUCED_COLOR_8}


def _decode_factor(shots: list[Shot]) -> int:
    """Largest JPEG/PNG decode reduction (1, 2, 4, 8) that still gives every shot its full output resolution."""
    need = max(shot.size / max(shot.rect[2], shot.rect[3]) for shot in shots)   # output px per annotated px
    return next((factor for factor in (8, 4, 2) if need * factor <= 1.0), 1)


def _cut(pixels: np.ndarray, shot: Shot, fx: float, fy: float, width: float, height: float) -> np.ndarray:
    """The shot's region resampled to its output size, uint8 BGR ``[out_h, out_w, 3]``.

    ``fx`` / ``fy``: decoded pixels per annotated pixel. Only the part of the region inside the image is
    read and resized (memory stays bounded by the output size); the rest is frame colour. Edges land within
    half an output pixel of where the boxes are drawn.
    """
    x, y, w, h = shot.rect
    scale = shot.size / max(w, h)                                   # output px per annotated px
    out_w, out_h = max(1, round(w * scale)), max(1, round(h * scale))
    picture = np.full((out_h, out_w, 3), _FRAME_BGR, np.uint8)
    sx0, sy0 = max(0, math.floor(max(x, 0) * fx)), max(0, math.floor(max(y, 0) * fy))
    sx1 = min(pixels.shape[1], math.ceil(min(x + w, width) * fx))
    sy1 = min(pixels.shape[0], math.ceil(min(y + h, height) * fy))
    if sx1 <= sx0 or sy1 <= sy0:
        return picture
    dx0, dx1 = round((sx0 / fx - x) * scale), round((sx1 / fx - x) * scale)
    dy0, dy1 = round((sy0 / fy - y) * scale), round((sy1 / fy - y) * scale)
    if dx1 <= dx0 or dy1 <= dy0:
        return picture
    source = pixels[sy0:sy1, sx0:sx1]
    shrink = (dx1 - dx0) < source.shape[1]
    resized = cv2.resize(source, (dx1 - dx0, dy1 - dy0), interpolation=cv2.INTER_AREA if shrink else cv2.INTER_LINEAR)
    cx0, cy0 = max(0, dx0), max(0, dy0)
    cx1, cy1 = min(out_w, dx1), min(out_h, dy1)
    if cx1 > cx0 and cy1 > cy0:
        picture[cy0:cy1, cx0:cx1] = resized[cy0 - dy0:cy1 - dy0, cx0 - dx0:cx1 - dx0]
    return picture


def render_shots(run: RunFolder, shots: list[Shot], out_dir: Path) -> set[str]:
    """Write each shot as ``out_dir/<name>.jpg``; returns the names written. Each image is decoded once.

    Only usable images are read (unusable ones may be corrupt or oversized), through
    :func:`resolve_image_path` so no file outside the image root is opened, and at the coarsest decode
    reduction the shots allow. Where the decoded size differs from images.csv, the picture is rescaled to
    the annotated frame so the boxes still line up.
    """
    images_dir = run.run.get("images_dir")
    if not shots or not images_dir:
        return set()
    out_dir.mkdir(parents=True, exist_ok=True)
    written: set[str] = set()
    by_row: dict[int, list[Shot]] = {}
    for shot in shots:
        by_row.setdefault(shot.row, []).append(shot)
    images = run.images
    for row, row_shots in by_row.items():
        try:
            path = resolve_image_path(images_dir, str(images["file_name"].iloc[row]))
        except UnsafeImagePath:
            continue
        pixels = cv2.imread(str(path), _REDUCED_READ[_decode_factor(row_shots)]) if path.is_file() else None
        if pixels is None:
            continue
        width, height = float(images["width"].iloc[row]), float(images["height"].iloc[row])
        fx, fy = pixels.shape[1] / width, pixels.shape[0] / height
        for shot in row_shots:
            picture = _cut(pixels, shot, fx, fy, width, height)
            encoded, jpeg = cv2.imencode(".jpg", picture, [cv2.IMWRITE_JPEG_QUALITY, 85])
            if encoded:                     # written by Python, so a full disk raises instead of returning False
                (out_dir / f"{shot.name}.jpg").write_bytes(jpeg.tobytes())
                written.add(shot.name)
    return written


@dataclass
class Layer:
    """Boxes of one kind on a card: xywh ``[n, 4]`` original px and a tooltip per box."""

    boxes: np.ndarray
    labels: list[str]
    focus: int | None = None


def box_svg(view: tuple[float, float, float, float], layers: dict[str, Layer], extent: tuple[float, float] | None
            ) -> Markup:
    """Inline SVG of the boxes in ``view`` (xywh, original px); ``extent`` draws the image bounds (blank cards)."""
    x, y, w, h = view
    mark = 0.028 * max(w, h)
    parts: list[Markup] = []
    if extent is not None:
        parts.append(el("rect", {"class": "extent", "x": 0, "y": 0, "width": f"{extent[0]:.1f}",
                                 "height": f"{extent[1]:.1f}"}))
    for kind in ("ann", "sugg", "pred"):
        layer = layers.get(kind)
        if layer is None or not len(layer.boxes):
            continue
        items = []
        for k, (box, label) in enumerate(zip(layer.boxes, layer.labels)):
            if not np.isfinite(box).all():
                continue
            bx, by, bw, bh = (float(v) for v in box)
            if kind == "ann":
                shape = el("rect", {"class": "mark", "x": f"{bx - mark / 2:.1f}", "y": f"{by - mark / 2:.1f}",
                                    "width": f"{mark:.1f}", "height": f"{mark:.1f}"})
            elif kind == "pred":
                shape = el("circle", {"class": "mark", "cx": f"{bx + bw:.1f}", "cy": f"{by + bh:.1f}",
                                      "r": f"{mark / 2:.1f}"})
            else:
                cx, cy, r = bx + bw, by, mark * 0.65
                shape = el("polygon", {"class": "mark",
                                       "points": f"{cx:.1f},{cy - r:.1f} {cx + r:.1f},{cy:.1f} {cx:.1f},{cy + r:.1f} "
                                                 f"{cx - r:.1f},{cy:.1f}"})
            items.append(el("g", {"class": "focus" if k == layer.focus else None}, el("title", None, label),
                            el("rect", {"x": f"{bx:.1f}", "y": f"{by:.1f}", "width": f"{bw:.1f}",
                                        "height": f"{bh:.1f}"}), shape))
        parts.append(el("g", {"class": kind}, items))
    focused = any(layer.focus is not None for layer in layers.values())
    return el("svg", {"class": "boxes has-focus" if focused else "boxes",
                      "viewBox": f"{x:.1f} {y:.1f} {w:.1f} {h:.1f}", "aria-hidden": "true"}, parts)


def xywh_text(box: np.ndarray) -> str:
    """``[x, y, w, h]`` with one decimal, ``.0`` dropped."""
    return "[" + ", ".join(f"{float(v):.1f}".removesuffix(".0") for v in box) + "]"


def legend(*, predicted: bool = True, suggested: bool = False, toggle: bool = False) -> Markup:
    """The box key: solid + square = annotated, dashed + circle = detector, dotted + diamond = suggested."""
    def key(kind: str, text: str, mark: Markup) -> Markup:
        svg = el("svg", {"class": "boxes", "viewBox": "0 0 46 16", "aria-hidden": "true"},
                 el("g", {"class": kind}, el("rect", {"x": 3, "y": 3, "width": 40, "height": 10}), mark))
        return el("span", {"class": "key"}, svg, text)

    keys = [key("ann", "annotated box (solid, square mark)", el("rect", {"class": "mark", "x": 0.5, "y": 0.5,
                                                                          "width": 5, "height": 5}))]
    if predicted:
        keys.append(key("pred", "detector's box (dashed, round mark)",
                        el("circle", {"class": "mark", "cx": 43, "cy": 13, "r": 2.6})))
    if suggested:
        keys.append(key("sugg", "suggested box (dotted, diamond mark)",
                        el("polygon", {"class": "mark", "points": "43,0 46,3 43,6 40,3"})))
    if toggle:
        keys.append(el("label", None, el("input", {"type": "checkbox", "class": "toggle-pred", "checked": True}),
                       "show detector boxes"))
    return el("div", {"class": "legend"}, keys)
