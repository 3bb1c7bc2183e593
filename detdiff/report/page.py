"""The page model: the state every card and section of the report reads (:class:`Page`).

It holds the run, the lookups built once (rows by image and annotation id, category names, boxes), the
detector's boxes shown on the cards, and the thumbnails asked for and written. With ``thumbnails=False`` no
dataset pixels are used: each card shows the box layout on a blank frame and lists the boxes as text.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pandas as pd

from detdiff.report.elements import Markup, el
from detdiff.report.run_folder import RunFolder
from detdiff.report.thumbnails import Layer, Shot, box_svg, xywh_text
from detdiff.train.loss_log import epoch_dir, finished_epochs


@dataclass
class Page:
    """State shared by the cards and sections: the run, what gets a thumbnail, and lookups built once."""

    run: RunFolder
    top: int
    thumbnails: bool
    thumbnail_size: int
    plots: dict[str, Path] = field(default_factory=dict)
    shots: list[Shot] = field(default_factory=list)
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
        self.detections: dict[int, tuple[np.ndarray, list[str]]] = {}   # filled by plan_cards for the images shown
        self.pred_boxes = _last_epoch_pred_boxes(self.run)
        self.easiest = max(1, self.top // 3)

    def size_of(self, row: int) -> tuple[float, float]:
        """Width and height of the image at images.csv ``row``, in annotated pixels."""
        images = self.run.images
        return float(images["width"].iloc[row]), float(images["height"].iloc[row])

    def request(self, name: str, row: int, rect: tuple[float, float, float, float], size: int) -> None:
        """Ask for a thumbnail (only with thumbnails on, for a usable image and a non-empty region)."""
        if self.thumbnails and bool(self.run.images["usable"].iloc[row]) and min(rect[2], rect[3]) > 0:
            self.shots.append(Shot(name, row, rect, size))

    def annotated_layer(self, image_id: int, focus_annotation: int | None = None) -> Layer:
        """The image's annotated boxes, ``focus_annotation`` highlighted."""
        rows = self.objects_of_image.get(image_id, np.zeros(0, np.int64))
        objects = self.run.objects
        labels = [f"annotated {a}: {n}" for a, n in zip(objects["annotation_id"].iloc[rows].tolist(),
                                                         objects["category_name"].iloc[rows].tolist())]
        focus = None
        if focus_annotation is not None and focus_annotation in self.row_of_annotation:
            hits = np.flatnonzero(rows == self.row_of_annotation[focus_annotation])
            focus = int(hits[0]) if len(hits) else None
        return Layer(self.object_boxes[rows], labels, focus)

    def frame(self, name: str, row: int, view: tuple[float, float, float, float], layers: dict[str, Layer],
              *, square: bool, alt: str) -> Markup:
        """Picture + box overlay (or, without thumbnails / unreadable image, the boxes on a blank frame)."""
        classes = "frame square" if square else "frame"
        if self.thumbnails and name in self.written:
            return el("div", {"class": classes}, el("img", {"src": f"thumbs/{quote(name)}.jpg", "alt": alt}),
                      box_svg(view, layers, None))
        note = None
        if self.thumbnails:
            note = el("div", {"class": "missing"}, "image not readable" if self.run.images["usable"].iloc[row]
                      else "unusable image: not decoded")
        return el("div", {"class": classes + " blank"}, box_svg(view, layers, self.size_of(row)), note)

    def box_list(self, layers: dict[str, Layer]) -> Markup:
        """Boxes as text (the no-thumbnails form), a few per card."""
        if self.thumbnails:
            return Markup("")
        items = [el("li", None, f"{label} {xywh_text(box)}")
                 for layer in layers.values() for box, label in zip(layer.boxes, layer.labels)
                 if np.isfinite(box).all()]
        more = el("li", None, f"\u2026 {len(items) - 6} more") if len(items) > 6 else None
        return el("ul", {"class": "boxlist"}, items[:6], more) if items else Markup("")


def load_detections(run: RunFolder, image_ids: set[int], per_image: int = 30
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
