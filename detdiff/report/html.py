"""The offline HTML report of a run: ``RUNDIR/report/index.html`` (+ ``thumbs/``) and ``RUNDIR/plots/*.png``.

The page opens from disk with no network: CSS and JavaScript are inlined (``assets/``), images are relative
paths (``thumbs/*.jpg`` next to the page, ``../plots/*.png``), and a Content-Security-Policy allows only
those inlined blocks (by hash) and local images, so even a string that slipped through could not run.

Every string from the dataset (file names, category names, evidence, lint messages) passes through
:func:`el`, which escapes text and attribute values by default and refuses event-handler attributes and
URL schemes. Boxes are drawn as inline SVG over the thumbnails: annotated boxes solid blue with a square
mark, the detector's boxes dashed orange with a round mark, suggested fixes dotted purple with a diamond
mark (line style and shape, not colour alone).

``thumbnails=False`` copies no dataset pixels: no ``thumbs/`` folder, no embedded images; each card shows
the box layout on a blank frame and lists the boxes as text. Scores are accumulated losses: higher = harder.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math
import os
import re
import shutil
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Iterable
from urllib.parse import quote

import cv2
import numpy as np
import pandas as pd

from detdiff.data.coco import UnsafeImagePath, resolve_image_path
from detdiff.report.plots import hardest_rows, write_plots
from detdiff.report.summary import (STREAM_TITLES, STREAMS, SUSPECT_KINDS, Advice, RunFolder, descriptor_words,
                                    format_ap, format_percent, lift_sentence, lint_code_counts, lint_totals,
                                    significant_causes, sourcing_advice)
from detdiff.train.loss_log import epoch_dir, finished_epochs

STREAM_EXPLAINED: dict[str, str] = {
    "loc": "Smooth L1 on the box offsets of the anchors matched to each object: high when boxes are hard to fit "
           "(tight crowds, odd shapes, loose or shifted labels).",
    "pos": "Classification loss on the anchors matched to objects: high when labelled objects are hard to "
           "recognise as their class (small, occluded, rare, or possibly labelled with the wrong class).",
    "neg": "Classification loss on background anchors: high when unlabelled regions look like objects "
           "(clutter, look-alikes, or objects nobody annotated).",
}
KIND_TITLES: dict[str, str] = {"wrong_class": "Wrong class", "missing_box": "Missing box",
                               "loose_box": "Loose box", "duplicate_box": "Duplicate box"}
KIND_EXPLAINED: dict[str, str] = {
    "wrong_class": "The detector persistently prefers another class for this box.",
    "missing_box": "The detector persistently finds an object here that has no annotation.",
    "loose_box": "The detector's box persistently disagrees with the annotated extent.",
    "duplicate_box": "Two annotations of the same object.",
}
_NAV = [("overview", "Overview"), ("actions", "What to do"), ("stream-loc", "Box regression"),
        ("stream-pos", "Positive class"), ("stream-neg", "Background class"), ("suspects", "Suspects"),
        ("classes", "Classes"), ("map", "Object map"), ("settings", "Settings")]

# ------------------------------------------------------------------------------------ safe HTML building


class Markup(str):
    """HTML built here and therefore safe; any plain ``str`` is escaped when it meets markup."""

    __slots__ = ()


_ATTR_NAME = re.compile(r"^[a-zA-Z][a-zA-Z0-9_:.-]*$")
_URL_SCHEME = re.compile(r"^\s*[a-zA-Z][a-zA-Z0-9+.-]*:")
_VOID_TAGS = frozenset({"img", "meta", "br", "hr", "input", "link"})
_SVG_EMPTY_TAGS = frozenset({"rect", "circle", "polygon", "line", "path"})


def escape(value: Any) -> Markup:
    """Text escaped for HTML content and quoted attributes (``html.escape(quote=True)``)."""
    if isinstance(value, Markup):
        return value
    return Markup(html.escape(str(value), quote=True))


def join(children: Iterable[Any]) -> Markup:
    """Concatenate children (strings escaped, ``None`` / ``False`` dropped, nested lists flattened)."""
    parts: list[str] = []
    for child in children:
        if child is None or child is False:
            continue
        if isinstance(child, (list, tuple)):
            parts.append(join(child))
        else:
            parts.append(escape(child))
    return Markup("".join(parts))


def el(tag: str, attrs: dict[str, Any] | None = None, *children: Any) -> Markup:
    """One element. Attribute values are escaped and double-quoted; ``None`` / ``False`` values are left out.

    Refused (``ValueError``): odd attribute names, ``on*`` event handlers, and ``src`` / ``href`` values that
    carry a URL scheme (``javascript:``, ``http:``, ``data:``): this page links only to relative files.
    """
    out = [f"<{tag}"]
    for name, value in (attrs or {}).items():
        if value is None or value is False:
            continue
        if not _ATTR_NAME.match(name) or name.lower().startswith("on"):
            raise ValueError(f"attribute {name!r} is not allowed on <{tag}>")
        if name in ("src", "href") and _URL_SCHEME.match(str(value)):
            raise ValueError(f"<{tag} {name}={str(value)[:40]!r}>: only relative links are allowed")
        out.append(f" {name}" if value is True else f' {name}="{escape(value)}"')
    if tag in _VOID_TAGS:
        return Markup("".join(out) + ">")
    if tag in _SVG_EMPTY_TAGS and not children:
        return Markup("".join(out) + "/>")
    return Markup("".join(out) + ">" + join(children) + f"</{tag}>")


def _fmt(value: Any, digits: int = 3) -> str:
    """A number for people: ``1,234``, ``12.35``, ``0.0412``; missing as an en dash."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(number):
        return "\u2013"
    if number == int(number) and abs(number) < 1e15:
        return f"{int(number):,}"
    if abs(number) >= 100:
        return f"{number:,.0f}"
    if abs(number) >= 1:
        return f"{number:.2f}"
    return f"{number:.{digits}g}"


def _count(n: int, one: str, many: str) -> str:
    return f"{n:,} {one if n == 1 else many}"


def _ordinal(percent: float) -> str:
    if not math.isfinite(percent):
        return ""
    n = int(round(percent))
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix} percentile"


def _num_cell(value: Any, text: str | None = None) -> Markup:
    """Right-aligned numeric cell; ``data-v`` holds the raw number for sorting."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    raw = repr(number) if math.isfinite(number) else ""
    return el("td", {"class": "num", "data-v": raw}, _fmt(value) if text is None else text)


def _table(columns: list[tuple[str, str]], rows: list[list[Any]], *, row_classes: list[str] | None = None,
           sortable: bool = True, scroll: bool = False) -> Markup:
    """A data table; ``columns`` = (header, "num" | "text"); cells are Markup (from :func:`_num_cell`) or text."""
    head = el("tr", None, [el("th", {"class": "num" if kind == "num" else None, "data-type": kind, "scope": "col"},
                              el("button", {"type": "button"}, label) if sortable else label)
                           for label, kind in columns])
    body = [el("tr", {"class": (row_classes[i] or None) if row_classes else None},
               [cell if isinstance(cell, Markup) and cell.startswith("<td") else el("td", None, cell) for cell in row])
            for i, row in enumerate(rows)]
    table = el("table", {"class": "data sortable" if sortable else "data"}, el("thead", None, head),
               el("tbody", None, body))
    return el("div", {"class": "scroll"}, table) if scroll else table


def _tags(why: str) -> Markup:
    tags = [t.strip() for t in str(why).split(";") if t.strip()]
    return el("div", {"class": "tags"}, [el("span", {"class": "tag"}, t) for t in tags]) if tags else Markup("")


def _plot(plots: dict[str, Path], name: str, alt: str) -> Markup:
    if name not in plots:
        return Markup("")
    return el("div", {"class": "plot"}, el("img", {"src": f"../plots/{quote(plots[name].name)}", "alt": alt}))


# ------------------------------------------------------------------------------------------- geometry


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
class _Shot:
    """One picture to cut from a dataset image: ``rect`` xywh in the image's annotated pixel frame."""

    name: str
    row: int
    rect: tuple[float, float, float, float]
    size: int


_FRAME_BGR = (56, 49, 43)          # the card frame colour, shown where a crop reaches past the image
_REDUCED_READ = {1: cv2.IMREAD_COLOR, 2: cv2.IMREAD_REDUCED_COLOR_2, 4: cv2.IMREAD_REDUCED_COLOR_4,
                 8: cv2.IMREAD_REDUCED_COLOR_8}


def _decode_factor(shots: list[_Shot]) -> int:
    """Largest JPEG/PNG decode reduction (1, 2, 4, 8) that still gives every shot its full output resolution."""
    need = max(shot.size / max(shot.rect[2], shot.rect[3]) for shot in shots)   # output px per annotated px
    return next((factor for factor in (8, 4, 2) if need * factor <= 1.0), 1)


def _cut(pixels: np.ndarray, shot: _Shot, fx: float, fy: float, width: float, height: float) -> np.ndarray:
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


def _render_shots(run: RunFolder, shots: list[_Shot], out_dir: Path) -> set[str]:
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
    by_row: dict[int, list[_Shot]] = {}
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
            if cv2.imwrite(str(out_dir / f"{shot.name}.jpg"), picture, [cv2.IMWRITE_JPEG_QUALITY, 85]):
                written.add(shot.name)
    return written


@dataclass
class _Layer:
    """Boxes of one kind on a card: xywh ``[n, 4]`` original px and a tooltip per box."""

    boxes: np.ndarray
    labels: list[str]
    focus: int | None = None


def _box_svg(view: tuple[float, float, float, float], layers: dict[str, _Layer], extent: tuple[float, float] | None
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


def _xywh_text(box: np.ndarray) -> str:
    """``[x, y, w, h]`` with one decimal, ``.0`` dropped."""
    return "[" + ", ".join(f"{float(v):.1f}".removesuffix(".0") for v in box) + "]"


def _legend(*, predicted: bool = True, suggested: bool = False, toggle: bool = False) -> Markup:
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


# ----------------------------------------------------------------------------------------- the page


@dataclass
class _Page:
    """State shared by the sections: the run, what gets a thumbnail, and lookups built once."""

    run: RunFolder
    top: int
    thumbnails: bool
    thumbnail_size: int
    plots: dict[str, Path] = field(default_factory=dict)
    shots: list[_Shot] = field(default_factory=list)
    written: set[str] = field(default_factory=set)

    def __post_init__(self) -> None:
        images, objects = self.run.images, self.run.objects
        self.row_of_image = {int(i): r for r, i in enumerate(pd.to_numeric(images["image_id"]).tolist())}
        self.objects_of_image = ({int(k): v for k, v in objects.groupby("image_id").indices.items()}
                                 if len(objects) else {})
        self.row_of_annotation = ({int(a): r for r, a in enumerate(pd.to_numeric(objects["annotation_id"]).tolist())}
                                  if len(objects) else {})
        self.names = self.run.category_names()
        self.object_boxes = objects[["x", "y", "w", "h"]].apply(pd.to_numeric, errors="coerce").to_numpy(float)
        self.detections: dict[int, tuple[np.ndarray, list[str]]] = {}   # filled by _plan for the images shown
        self.pred_boxes = _last_epoch_pred_boxes(self.run)
        self.easiest = max(1, self.top // 3)

    def size_of(self, row: int) -> tuple[float, float]:
        images = self.run.images
        return float(images["width"].iloc[row]), float(images["height"].iloc[row])

    def request(self, name: str, row: int, rect: tuple[float, float, float, float], size: int) -> None:
        if self.thumbnails and bool(self.run.images["usable"].iloc[row]) and min(rect[2], rect[3]) > 0:
            self.shots.append(_Shot(name, row, rect, size))

    def annotated_layer(self, image_id: int, focus_annotation: int | None = None) -> _Layer:
        rows = self.objects_of_image.get(image_id, np.zeros(0, np.int64))
        objects = self.run.objects
        labels = [f"annotated {a}: {n}" for a, n in zip(objects["annotation_id"].iloc[rows].tolist(),
                                                         objects["category_name"].iloc[rows].tolist())]
        focus = None
        if focus_annotation is not None and focus_annotation in self.row_of_annotation:
            hits = np.flatnonzero(rows == self.row_of_annotation[focus_annotation])
            focus = int(hits[0]) if len(hits) else None
        return _Layer(self.object_boxes[rows], labels, focus)

    def frame(self, name: str, row: int, view: tuple[float, float, float, float], layers: dict[str, _Layer],
              *, square: bool, alt: str) -> Markup:
        """Picture + box overlay (or, without thumbnails / unreadable image, the boxes on a blank frame)."""
        classes = "frame square" if square else "frame"
        if self.thumbnails and name in self.written:
            return el("div", {"class": classes}, el("img", {"src": f"thumbs/{quote(name)}.jpg", "alt": alt}),
                      _box_svg(view, layers, None))
        note = None
        if self.thumbnails:
            note = el("div", {"class": "missing"}, "image not readable" if self.run.images["usable"].iloc[row]
                      else "unusable image: not decoded")
        return el("div", {"class": classes + " blank"}, _box_svg(view, layers, self.size_of(row)), note)

    def box_list(self, layers: dict[str, _Layer]) -> Markup:
        """Boxes as text (the no-thumbnails form), a few per card."""
        if self.thumbnails:
            return Markup("")
        items = [el("li", None, f"{label} {_xywh_text(box)}")
                 for layer in layers.values() for box, label in zip(layer.boxes, layer.labels)
                 if np.isfinite(box).all()]
        more = el("li", None, f"\u2026 {len(items) - 6} more") if len(items) > 6 else None
        return el("ul", {"class": "boxlist"}, items[:6], more) if items else Markup("")


def _load_detections(run: RunFolder, image_ids: set[int], per_image: int = 30
                     ) -> dict[int, tuple[np.ndarray, list[str]]]:
    """Confident detections per image from detections.json: image_id -> (xywh [n, 4], tooltips [n]).

    Kept: score >= the run's ``log.detect_score`` (0.3 when not recorded), at most ``per_image`` per image.
    """
    path = run.root / "detections.json"
    if not path.exists():
        return {}
    try:
        records = json.loads(path.read_text())
    except ValueError as exc:
        raise ValueError(f"{path}: not valid JSON ({exc})") from exc
    if not isinstance(records, list) or not records:
        return {}
    table = pd.DataFrame.from_records([r for r in records if isinstance(r, dict)],
                                      columns=["image_id", "category_id", "bbox", "score"])
    table = table[table["bbox"].map(lambda b: isinstance(b, list) and len(b) == 4)]
    table = table[pd.to_numeric(table["score"], errors="coerce") >= float(run.setting("log", "detect_score", 0.3))]
    table = table[table["image_id"].isin(image_ids)]
    table = table.sort_values("score", ascending=False, kind="stable").groupby("image_id").head(per_image)
    boxes = np.array(table["bbox"].tolist(), dtype=float).reshape(-1, 4)
    names = run.category_names()
    labels = [f"detector: {names.get(int(c), f'category {c}')} {float(s):.2f}"
              for c, s in zip(table["category_id"], table["score"])]
    out: dict[int, tuple[np.ndarray, list[str]]] = {}
    for image_id, rows in table.groupby("image_id").indices.items():
        out[int(image_id)] = (boxes[rows], [labels[r] for r in rows])
    return out


def _last_epoch_pred_boxes(run: RunFolder) -> np.ndarray | None:
    """The log's last-epoch predicted box per object (xywh original px, ``[A, 4]``), or None if unavailable."""
    epochs = finished_epochs(run.root / "log")
    if not epochs:
        return None
    path = epoch_dir(run.root / "log", epochs[-1]) / "object.pred_box.npy"
    if not path.exists():
        return None
    boxes = np.load(path, mmap_mode="r")
    return np.asarray(boxes, dtype=float) if boxes.shape == (len(run.objects), 4) else None


def _plan_image_card(page: _Page, row: int) -> None:
    image_id = int(page.run.images["image_id"].iloc[row])
    width, height = page.size_of(row)
    page.request(f"i{image_id}", row, (0.0, 0.0, width, height), page.thumbnail_size)


def _image_card(page: _Page, row: int, stream: str, rank: int) -> Markup:
    images = page.run.images
    image_id = int(images["image_id"].iloc[row])
    file_name = str(images["file_name"].iloc[row])
    width, height = page.size_of(row)
    detections = page.detections.get(image_id, (np.zeros((0, 4)), []))
    layers = {"ann": page.annotated_layer(image_id), "pred": _Layer(*detections)}
    caption = el("figcaption", None,
                 el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                    el("span", {"class": "score"}, f"score {_fmt(images[f'{stream}_score'].iloc[row])}")),
                 el("div", {"class": "pct"}, _ordinal(float(images[f"{stream}_pct"].iloc[row])),
                    f" \u00b7 {_count(len(layers['ann'].boxes), 'box', 'boxes')} \u00b7 "
                    f"{_count(len(detections[0]), 'detection', 'detections')}"),
                 el("div", {"class": "name", "title": file_name}, f"{image_id} \u00b7 {file_name}"),
                 _tags(images["why"].iloc[row]), page.box_list(layers))
    frame = page.frame(f"i{image_id}", row, (0.0, 0.0, width, height), layers, square=False, alt=file_name)
    return el("figure", {"class": "card"}, frame, caption)


def _object_view(page: _Page, rows: np.ndarray) -> np.ndarray:
    """Crop regions for objects.csv rows (annotated box + last-epoch predicted box): xywh ``[n, 4]``."""
    objects = page.run.objects
    image_rows = np.array([page.row_of_image.get(int(i), -1) for i in objects["image_id"].iloc[rows]])
    sizes = np.array([page.size_of(r) if r >= 0 else (np.nan, np.nan) for r in image_rows]).reshape(-1, 2)
    predicted = page.pred_boxes[rows] if page.pred_boxes is not None else np.full((len(rows), 4), np.nan)
    return crop_regions(page.object_boxes[rows], predicted, sizes[:, 0], sizes[:, 1])


def _object_cards(page: _Page, stream: str, plan: bool) -> list[Markup]:
    objects = page.run.objects
    if not len(objects):
        return []
    rows = hardest_rows(objects[f"{stream}_score"], page.top)
    views = _object_view(page, rows)
    cards = []
    for rank, (row, view) in enumerate(zip(rows, views), start=1):
        image_id, annotation_id = int(objects["image_id"].iloc[row]), int(objects["annotation_id"].iloc[row])
        image_row = page.row_of_image.get(image_id)
        if image_row is None or not np.isfinite(view).all():
            continue
        name = f"o{annotation_id}"
        if plan:
            page.request(name, image_row, tuple(float(v) for v in view), max(160, page.thumbnail_size * 3 // 4))
            continue
        category = str(objects["category_name"].iloc[row])
        predicted = page.pred_boxes[[row]] if page.pred_boxes is not None else np.zeros((0, 4))
        layers = {"ann": page.annotated_layer(image_id, annotation_id),
                  "pred": _Layer(predicted, ["detector's box at the last epoch"] * len(predicted))}
        z = objects[f"{stream}_z"].iloc[row] if f"{stream}_z" in objects else math.nan
        file_name = str(page.run.images["file_name"].iloc[image_row])
        caption = el("figcaption", None,
                     el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                        el("span", {"class": "score"}, f"score {_fmt(objects[f'{stream}_score'].iloc[row])}")),
                     el("div", {"class": "cls"}, category),
                     el("div", {"class": "pct"}, _ordinal(float(objects[f"{stream}_pct"].iloc[row])),
                        f" \u00b7 z in class {_fmt(z)}" if pd.notna(z) else None),
                     el("div", {"class": "name", "title": file_name}, f"box {annotation_id} \u00b7 {file_name}"),
                     _tags(objects["why"].iloc[row]), page.box_list(layers))
        frame = page.frame(name, image_row, tuple(float(v) for v in view), layers, square=True,
                           alt=f"{category} in {file_name}")
        cards.append(el("figure", {"class": "card"}, frame, caption))
    return cards


def _stream_rows(page: _Page, stream: str) -> tuple[np.ndarray, np.ndarray]:
    images = page.run.images
    scores = images[f"{stream}_score"].where(images["usable"].astype(bool))
    return hardest_rows(scores, page.top), hardest_rows(scores, page.easiest, easiest=True)


def _suspect_order(page: _Page, kind: str) -> pd.DataFrame:
    suspects = page.run.suspects
    part = suspects[suspects["kind"] == kind].copy()
    part["_score"] = pd.to_numeric(part["score"], errors="coerce")
    return part.sort_values("_score", ascending=False, kind="stable", na_position="last").head(page.top)


def _suspect_boxes(part: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Annotated and suggested boxes; a missing_box has no annotated box (its x, y, w, h is the proposal)."""
    annotated = part[["x", "y", "w", "h"]].apply(pd.to_numeric, errors="coerce").to_numpy(float, copy=True).reshape(-1, 4)
    annotated[(part["kind"] == "missing_box").to_numpy()] = np.nan
    suggested = (part[["suggested_x", "suggested_y", "suggested_w", "suggested_h"]]
                 .apply(pd.to_numeric, errors="coerce").to_numpy(float).reshape(-1, 4))
    return annotated, suggested


def _suspect_fix(page: _Page, record: pd.Series, suggested: np.ndarray) -> str:
    """The suggested fix of one suspect in words."""
    kind = record["kind"]
    annotation = pd.to_numeric(record["annotation_id"], errors="coerce")
    labelled = ""
    if pd.notna(annotation) and int(annotation) in page.row_of_annotation:
        labelled = str(page.run.objects["category_name"].iloc[page.row_of_annotation[int(annotation)]])
    category = pd.to_numeric(record["suggested_category_id"], errors="coerce")
    suggested_name = page.names.get(int(category), f"category {int(category)}") if pd.notna(category) else ""
    if kind == "wrong_class":
        return f"Change class '{labelled}' \u2192 '{suggested_name}'" if suggested_name else "Check the class"
    if kind == "missing_box":
        what = f"a '{suggested_name}' box" if suggested_name else "a box"
        return f"Add {what} at {_xywh_text(suggested)}" if np.isfinite(suggested).all() else f"Add {what}"
    if kind == "loose_box":
        return f"Set the box to {_xywh_text(suggested)}" if np.isfinite(suggested).all() else "Tighten the box"
    if kind == "duplicate_box":
        return f"Delete annotation {int(annotation)}" if pd.notna(annotation) else "Delete the duplicate"
    return "Review"


def _suspect_cards(page: _Page, kind: str, plan: bool) -> list[Markup]:
    part = _suspect_order(page, kind)
    if part.empty:
        return []
    annotated, suggested = _suspect_boxes(part)
    image_rows = np.array([page.row_of_image.get(int(i), -1) if pd.notna(i) else -1
                           for i in pd.to_numeric(part["image_id"], errors="coerce")])
    sizes = np.array([page.size_of(r) if r >= 0 else (np.nan, np.nan) for r in image_rows]).reshape(-1, 2)
    both_missing = ~np.isfinite(annotated).all(axis=1) & ~np.isfinite(suggested).all(axis=1)
    views = crop_regions(np.where(both_missing[:, None], 0.0, annotated), suggested, sizes[:, 0], sizes[:, 1])
    cards = []
    for rank, ((index, record), image_row, view) in enumerate(zip(part.iterrows(), image_rows, views), start=1):
        if image_row < 0 or not np.isfinite(view).all():
            continue
        name = f"s{index}"
        if plan:
            page.request(name, int(image_row), tuple(float(v) for v in view), max(160, page.thumbnail_size * 3 // 4))
            continue
        image_id = int(page.run.images["image_id"].iloc[image_row])
        annotation = pd.to_numeric(record["annotation_id"], errors="coerce")
        focus = int(annotation) if pd.notna(annotation) else None
        layers = {"ann": page.annotated_layer(image_id, focus)}
        k = rank - 1
        if np.isfinite(suggested[k]).all():
            layers["sugg"] = _Layer(suggested[k:k + 1], ["suggested box"])
        file_name = str(page.run.images["file_name"].iloc[image_row])
        where = f"box {focus} \u00b7 {file_name}" if focus is not None else f"image {image_id} \u00b7 {file_name}"
        caption = el("figcaption", None,
                     el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                        el("span", {"class": "score"}, f"score {_fmt(record['score'])}")),
                     el("div", {"class": "fix"}, _suspect_fix(page, record, suggested[k])),
                     el("div", {"class": "evidence"}, str(record["evidence"])),
                     el("div", {"class": "name", "title": file_name}, where), page.box_list(layers))
        frame = page.frame(name, int(image_row), tuple(float(v) for v in view), layers, square=True, alt=file_name)
        cards.append(el("figure", {"class": "card"}, frame, caption))
    return cards


def _plan(page: _Page) -> None:
    """Decide every thumbnail the page shows and load the detections of the images it shows."""
    shown: list[np.ndarray] = []
    for stream in STREAMS:
        hardest, easiest = _stream_rows(page, stream)
        shown += [hardest, easiest]
        for row in np.concatenate([hardest, easiest]):
            _plan_image_card(page, int(row))
        if stream in ("loc", "pos"):
            _object_cards(page, stream, plan=True)
    for kind in SUSPECT_KINDS:
        _suspect_cards(page, kind, plan=True)
    unique: dict[str, _Shot] = {shot.name: shot for shot in page.shots}
    page.shots = list(unique.values())
    rows = np.unique(np.concatenate(shown)).astype(np.int64)
    page.detections = _load_detections(page.run, set(page.run.images["image_id"].iloc[rows].astype(np.int64)))


# ------------------------------------------------------------------------------------------- sections


def _tile(value: Any, label: str, bad: bool = False) -> Markup:
    return el("div", {"class": "tile bad" if bad else "tile"}, el("div", {"class": "value"}, value),
              el("div", {"class": "label"}, label))


def _warning_banner(run: RunFolder) -> Markup:
    warning = run.quality_warning()
    if not warning:
        return Markup("")
    return el("div", {"class": "banner", "role": "alert"},
              el("strong", None, "Detector quality too low: do not trust these scores yet"), warning)


def _findings_table(run: RunFolder) -> Markup:
    """Lint summary: findings per severity and per code, the listed findings, and what was checked."""
    findings = run.findings if isinstance(run.findings, dict) else {}
    totals = lint_totals(findings)
    codes = lint_code_counts(findings)
    checked = findings.get("counts")
    checked_rows = ([[str(k).replace("_", " "), _num_cell(v)] for k, v in checked.items()]
                    if isinstance(checked, dict) else [])
    checked_part = (el("details", None, el("summary", None, "What was checked"),
                       _table([("item", "text"), ("count", "num")], checked_rows, sortable=False))
                    if checked_rows else None)
    if codes.empty:
        return join([el("p", {"class": "note"}, "No lint findings: the annotation file passed every check."),
                     checked_part])
    chips = el("div", {"class": "chips"}, [el("span", {"class": f"chip {s}"}, f"{s}: {n:,}")
                                           for s, n in totals.items() if n])
    code_rows = [[r.severity, el("td", None, el("code", None, r.code)), _num_cell(r.count)]
                 for r in codes.itertuples()]
    parts = [chips, _table([("severity", "text"), ("code", "text"), ("count", "num")], code_rows)]
    listed = findings.get("findings")
    records = [f for f in listed if isinstance(f, dict)] if isinstance(listed, list) else []
    if records:
        columns = ["severity", "code", "message", "file", "record", "record_id", "field"]
        table = pd.DataFrame(records, columns=columns).fillna("").astype(str)
        shown = table.head(200)
        rows = [list(r)[1:] for r in shown.itertuples()]
        total = int(codes["count"].sum())
        parts.append(el("details", None, el("summary", None, f"Show findings ({len(shown):,} of {total:,})"),
                        _table([(c.replace("_", " "), "text") for c in columns], rows, scroll=True)))
    parts.append(checked_part)
    return join(parts)


def _quality_table(metrics: dict[str, Any]) -> Markup:
    rows = [["all sizes", _num_cell(metrics.get("AP"), format_ap(metrics.get("AP"))),
             _num_cell(metrics.get("AP50"), format_ap(metrics.get("AP50"))),
             _num_cell(metrics.get("AP75"), format_ap(metrics.get("AP75")))]]
    for size in ("small", "medium", "large"):
        ap, ap50 = metrics.get(f"AP_{size}"), metrics.get(f"AP50_{size}")
        rows.append([f"{size} objects", _num_cell(ap, format_ap(ap)), _num_cell(ap50, format_ap(ap50)),
                     _num_cell(None, "")])
    return _table([("objects", "text"), ("AP", "num"), ("AP50", "num"), ("AP75", "num")], rows, sortable=False)


def _overview(page: _Page) -> Markup:
    run = page.run
    info = run.run
    metrics = run.metrics
    suspects = len(run.suspects)
    usable = info.get("num_usable_images", int(run.images["usable"].sum()))
    num_images = info.get("num_images", len(run.images))
    errors = lint_totals(run.findings).get("error", 0)
    tiles = el("div", {"class": "tiles"},
               _tile(_fmt(num_images), "images"), _tile(_fmt(usable), "usable images", bad=usable != num_images),
               _tile(_fmt(info.get("num_annotations", len(run.objects))), "annotations"),
               _tile(_fmt(info.get("num_categories", len(run.classes))), "classes"),
               _tile(format_ap(metrics.get("AP50")), "detector AP50", bad=not run.trustworthy()),
               _tile(_fmt(suspects), "suspected label errors", bad=suspects > 0),
               _tile(_fmt(errors), "lint errors", bad=errors > 0))
    unusable = info.get("unusable_images") or []
    unusable_rows = [[_num_cell(u.get("image_id")), str(u.get("file_name", "")), str(u.get("reason", ""))]
                     for u in unusable[:200] if isinstance(u, dict)]
    quality_note = (f"COCO AP of the audit detector on the dataset itself (pycocotools COCOeval), used only to "
                    f"judge whether its losses are meaningful; warning below AP50 "
                    f"{format_ap(metrics.get('min_ap50'))}.")
    inline_warning = (el("p", {"class": "warn-line"}, "Not trustworthy: ", run.quality_warning())
                      if run.quality_warning() else None)
    left = el("div", None, el("h3", None, "Detector quality"), inline_warning, _quality_table(metrics),
              el("p", {"class": "note"}, quality_note))
    right = el("div", None, el("h3", None, "Annotation file check"), _findings_table(run))
    body = [el("h2", None, "Overview"), tiles, el("div", {"class": "columns"}, left, right)]
    if unusable_rows:
        body += [el("h3", None, "Unusable images", el("span", {"class": "sub"}, f"{len(unusable):,} not trained on")),
                 _table([("image id", "num"), ("file name", "text"), ("reason", "text")], unusable_rows, scroll=True)]
    return el("section", {"id": "overview"}, body)


def _advice_item(advice: Advice) -> Markup:
    """The sentence with the part that states its number set in bold."""
    start = advice.text.find(advice.emphasis) if advice.emphasis else -1
    if start < 0:
        return el("li", {"class": advice.action}, advice.text)
    end = start + len(advice.emphasis)
    return el("li", {"class": advice.action}, advice.text[:start], el("span", {"class": "num"}, advice.text[start:end]),
              advice.text[end:])


def _actions(page: _Page) -> Markup:
    advice = sourcing_advice(page.run)
    fixes = [a for a in advice if a.action in ("fix", "relabel")]
    collect = [a for a in advice if a.action == "collect"]
    body = [el("h2", None, "What to do", el("span", {"class": "sub"}, "relabel, fix and collect")),
            el("p", {"class": "lead"}, "Built from the suspected label errors and from the causes that are "
                                       "significantly over-represented among the hardest items. Each line "
                                       "carries its number; the sections below show the evidence.")]
    body.append(el("h3", None, "Fix and relabel"))
    body.append(el("ul", {"class": "advice"}, [_advice_item(a) for a in fixes]) if fixes
                else el("p", {"class": "empty"}, "No suspected label errors."))
    body.append(el("h3", None, "Collect more of these"))
    body.append(el("ul", {"class": "advice"}, [_advice_item(a) for a in collect]) if collect
                else el("p", {"class": "empty"}, "No descriptor is significantly over-represented among the hardest."))
    return el("section", {"id": "actions"}, body)


def _percent_text(value: Any) -> str:
    number = pd.to_numeric(value, errors="coerce")
    return format_percent(float(number)) if pd.notna(number) else "\u2013"


def _causes_table(page: _Page, stream: str) -> Markup:
    rows = page.run.causes[page.run.causes["stream"] == stream]
    if rows.empty:
        return el("p", {"class": "empty"}, "No cause statistics for this stream.")
    order = pd.to_numeric(rows["q_value"], errors="coerce").fillna(np.inf).to_numpy()
    rows = rows.iloc[np.argsort(order, kind="stable")]
    cells = [[r["level"], descriptor_words(str(r["descriptor"])), r["test"], r["bin"], _num_cell(r["effect"]),
              el("td", {"class": "num", "data-v": repr(float(r["ci_low"])) if pd.notna(r["ci_low"]) else ""},
                 f"{_fmt(r['ci_low'])} \u2026 {_fmt(r['ci_high'])}"),
              _num_cell(r["q_value"]), _num_cell(r["n"]),
              _num_cell(r["top_rate"], _percent_text(r["top_rate"])),
              _num_cell(r["base_rate"], _percent_text(r["base_rate"])),
              "yes" if r["significant"] else "no"] for _, r in rows.iterrows()]
    return _table([("level", "text"), ("descriptor", "text"), ("test", "text"), ("bin", "text"), ("effect", "num"),
                   ("95% CI", "num"), ("q (BH)", "num"), ("n", "num"), ("share hardest", "num"),
                   ("share all", "num"), ("significant", "text")], cells,
                  row_classes=["significant" if s else "" for s in rows["significant"]], scroll=True)


def _stream_section(page: _Page, stream: str) -> Markup:
    hardest, easiest = _stream_rows(page, stream)
    title = STREAM_TITLES[stream]
    body = [el("h2", None, title, el("span", {"class": "sub"}, f"{stream} stream")),
            el("p", {"class": "lead"}, STREAM_EXPLAINED[stream]),
            _legend(toggle=True)]
    sentences = significant_causes(page.run.causes, stream)
    sentences = [lift_sentence(r, page.run.top_fraction) for _, r in sentences.iterrows() if r["test"] == "lift"]
    if sentences:
        body.append(el("ul", {"class": "advice"}, [el("li", {"class": "collect"}, s) for s in sentences[:6]]))
    body.append(el("h3", None, "Hardest images", el("span", {"class": "sub"}, f"top {len(hardest)}")))
    body.append(el("div", {"class": "grid"}, [_image_card(page, int(r), stream, k) for k, r in enumerate(hardest, 1)])
                if len(hardest) else el("p", {"class": "empty"}, "No scored images."))
    if stream in ("loc", "pos"):
        cards = _object_cards(page, stream, plan=False)
        if cards:
            body.append(el("h3", None, "Hardest objects", el("span", {"class": "sub"}, f"top {len(cards)}")))
            body.append(el("div", {"class": "grid small"}, cards))
    if len(easiest):
        body.append(el("h3", None, "Easiest images", el("span", {"class": "sub"}, f"bottom {len(easiest)}")))
        body.append(el("div", {"class": "grid small"},
                       [_image_card(page, int(r), stream, k) for k, r in enumerate(easiest, 1)]))
    body.append(el("h3", None, "Loss per epoch"))
    body.append(_plot(page.plots, f"curves_{stream}", f"{title}: loss per epoch of the hardest items")
                or el("p", {"class": "empty"}, "No training log in this run folder."))
    body.append(el("h3", None, "What goes with a high score"))
    body.append(_plot(page.plots, f"causes_{stream}", f"{title}: effect of each descriptor with its CI"))
    body.append(_causes_table(page, stream))
    return el("section", {"id": f"stream-{stream}"}, body)


def _suspects_section(page: _Page) -> Markup:
    suspects = page.run.suspects
    counts = suspects["kind"].value_counts()
    body = [el("h2", None, "Suspected label errors", el("span", {"class": "sub"}, f"{len(suspects):,} in all")),
            el("p", {"class": "lead"}, "Items whose learning dynamics point at the label rather than the image. "
                                       "Each list is ordered by score; review before changing anything."),
            el("div", {"class": "chips"}, [el("a", {"class": "chip", "href": f"#suspects-{kind}"},
                                              f"{KIND_TITLES[kind]}: {int(counts.get(kind, 0)):,}")
                                           for kind in SUSPECT_KINDS]),
            _legend(predicted=False, suggested=True)]
    for kind in SUSPECT_KINDS:
        cards = _suspect_cards(page, kind, plan=False)
        total = int(counts.get(kind, 0))
        shown = f"top {len(cards)} of {total:,}" if total > len(cards) else f"{total:,}"
        body.append(el("h3", {"id": f"suspects-{kind}"}, KIND_TITLES[kind], el("span", {"class": "sub"}, shown)))
        body.append(el("p", {"class": "note"}, KIND_EXPLAINED[kind]))
        body.append(el("div", {"class": "grid small"}, cards) if cards else el("p", {"class": "empty"}, "None."))
    return el("section", {"id": "suspects"}, body)


def _per_category_ap50(metrics: dict[str, Any]) -> dict[int, float]:
    """metrics.json ``per_category`` as category_id -> AP50.

    Accepted: ``{"<id>": AP50 or null}`` (what detdiff.train.evaluate writes), ``{"<id>": {"AP50": ..}}`` or a
    list of records with ``category_id``. Missing values are left out.
    """
    entries = metrics.get("per_category")
    items: list[tuple[Any, Any]] = []
    if isinstance(entries, dict):
        items = list(entries.items())
    elif isinstance(entries, list):
        items = [(e.get("category_id", e.get("id")), e) for e in entries if isinstance(e, dict)]
    out: dict[int, float] = {}
    for key, value in items:
        ap50 = value.get("AP50") if isinstance(value, dict) else value
        try:
            out[int(key)] = float(ap50)
        except (TypeError, ValueError):
            continue
    return out


def _classes_section(page: _Page) -> Markup:
    classes = page.run.classes
    body = [el("h2", None, "Per class"),
            el("p", {"class": "lead"}, "Median scores of each class's objects (higher = harder) and the share of its "
                                       "objects among the suspects. Click a header to sort.")]
    if classes.empty:
        body.append(el("p", {"class": "empty"}, "No classes.csv in this run folder."))
        return el("section", {"id": "classes"}, body)
    ap50 = _per_category_ap50(page.run.metrics)
    rows = []
    for _, r in classes.iterrows():
        category = pd.to_numeric(r["category_id"], errors="coerce")
        value = ap50.get(int(category), math.nan) if pd.notna(category) else math.nan
        share = pd.to_numeric(r["suspect_share"], errors="coerce")
        rows.append([_num_cell(r["category_id"]), r["category_name"], _num_cell(r["images"]), _num_cell(r["objects"]),
                     _num_cell(r["median_loc_score"]), _num_cell(r["median_pos_score"]), _num_cell(r["suspects"]),
                     _num_cell(share, _percent_text(share)),
                     _num_cell(value, format_ap(value))])
    body.append(_table([("id", "num"), ("class", "text"), ("images", "num"), ("objects", "num"),
                        ("median box regression", "num"), ("median positive class", "num"), ("suspects", "num"),
                        ("suspect share", "num"), ("AP50", "num")], rows, scroll=len(rows) > 14))
    return el("section", {"id": "classes"}, body)


def _map_section(page: _Page) -> Markup:
    body = [el("h2", None, "Object map"),
            el("p", {"class": "lead"}, "Every object placed by its detector features (nearby = looks alike to the "
                                       "detector), coloured by score percentile; diamonds mark the hardest. Hard "
                                       "clusters are kinds of object to collect more of.")]
    body.append(_plot(page.plots, "object_map", "2-D map of objects coloured by score")
                or el("p", {"class": "empty"}, "No map coordinates in objects.csv."))
    body.append(_plot(page.plots, "scores", "distribution of image scores per stream"))
    return el("section", {"id": "map"}, body)


def _flatten(config: dict[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    for key, value in config.items():
        name = f"{prefix}{key}"
        out += _flatten(value, f"{name}.") if isinstance(value, dict) else [(name, value)]
    return out


def _settings_section(page: _Page) -> Markup:
    info = page.run.run
    seconds = info.get("train_seconds")
    facts = [("detdiff version", info.get("detdiff_version", "")), ("annotations", info.get("annotations", "")),
             ("images folder", info.get("images_dir", "")), ("device", info.get("device", "")),
             ("epochs trained", _fmt(info.get("epochs_done", ""))),
             ("training time", f"{_fmt(seconds)} s" if isinstance(seconds, (int, float)) else ""),
             ("images per second", _fmt(info.get("images_per_second", ""))),
             ("report", f"top {page.top} per list, thumbnails {'on' if page.thumbnails else 'off'}")]
    config_rows = [[el("td", None, el("code", None, k)), el("td", None, el("code", None, json.dumps(v)))]
                   for k, v in _flatten(page.run.config)]
    body = [el("h2", None, "Run settings"),
            _table([("setting", "text"), ("value", "text")], [[k, str(v)] for k, v in facts], sortable=False)]
    if config_rows:
        body.append(el("details", None, el("summary", None, "Full configuration"),
                       _table([("key", "text"), ("value", "text")], config_rows, scroll=True)))
    return el("section", {"id": "settings"}, body)


def _asset(name: str) -> str:
    return resources.files("detdiff.report").joinpath("assets", name).read_text(encoding="utf-8")


def _csp_hash(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode("ascii") + "'"


def _page_html(page: _Page) -> str:
    css, script = _asset("report.css"), _asset("report.js")
    policy = (f"default-src 'none'; img-src 'self' file:; style-src {_csp_hash(css)}; "
              f"script-src {_csp_hash(script)}; base-uri 'none'; form-action 'none'")
    annotations = Path(str(page.run.run.get("annotations", ""))).name or page.run.root.name
    head = el("head", None, el("meta", {"charset": "utf-8"}),
              el("meta", {"name": "viewport", "content": "width=device-width, initial-scale=1"}),
              el("meta", {"http-equiv": "Content-Security-Policy", "content": policy}),
              el("meta", {"name": "referrer", "content": "no-referrer"}),
              el("title", None, f"detdiff report \u2013 {annotations}"),
              Markup(f"<style>{css}</style>"))
    top = el("header", {"class": "top"},
             el("div", {"class": "brand"}, "detdiff", el("small", None, annotations)),
             el("nav", None, [el("a", {"href": f"#{anchor}"}, label) for anchor, label in _NAV]))
    sections = [_warning_banner(page.run), _overview(page), _actions(page)]
    sections += [_stream_section(page, stream) for stream in STREAMS]
    sections += [_suspects_section(page), _classes_section(page), _map_section(page), _settings_section(page)]
    footer = el("footer", None, f"Written by detdiff {page.run.run.get('detdiff_version', '')}. Scores are "
                                "accumulated training losses: higher = harder.")
    body = el("body", None, top, el("main", None, sections), footer, Markup(f"<script>{script}</script>"))
    return "<!DOCTYPE html>\n" + el("html", {"lang": "en"}, head, body) + "\n"


def write_report(rundir: str | Path, *, top: int = 24, thumbnails: bool = True, thumbnail_size: int = 256) -> Path:
    """Write ``RUNDIR/report/index.html`` (+ ``report/thumbs/*.jpg``) and ``RUNDIR/plots/*.png``; return the page.

    Parameters
    ----------
    rundir : the run folder written by ``detdiff audit`` (DEVELOPERS.md "Run folder").
    top : length bound of every list (hardest images, objects, each suspect kind); easiest lists get a third.
    thumbnails : copy downscaled dataset pixels into ``report/thumbs``. ``False`` copies none at all (an old
        ``thumbs`` folder is removed) and the cards show boxes and ids as text on a blank frame.
    thumbnail_size : longest side of an image thumbnail, px (crops get three quarters of it).
    """
    if top < 1:
        raise ValueError(f"top must be at least 1, got {top}")
    if thumbnail_size < 16:
        raise ValueError(f"thumbnail_size must be at least 16 px, got {thumbnail_size}")
    run = RunFolder.load(rundir)
    report_dir = run.root / "report"
    thumbs_dir = report_dir / "thumbs"
    report_dir.mkdir(parents=True, exist_ok=True)
    shutil.rmtree(thumbs_dir, ignore_errors=True)
    page = _Page(run, top, thumbnails, thumbnail_size)
    page.plots = write_plots(run, top=top)
    _plan(page)
    if thumbnails:
        page.written = _render_shots(run, page.shots, thumbs_dir)
    out = report_dir / "index.html"
    partial = report_dir / f".index.html.tmp-{os.getpid()}"
    partial.write_text(_page_html(page), encoding="utf-8")
    os.replace(partial, out)
    return out
