"""The report's cards: hardest and easiest images, hardest objects and suspects, each a picture and a caption.

Every card function runs twice: first with ``plan=True`` (or through :func:`plan_cards`) to ask the page for
the thumbnails it needs, then to build the card once the thumbnails are written. Scores are accumulated
losses: higher = harder.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from detdiff.report.elements import Markup, count_text, el, fmt, ordinal, tag_list
from detdiff.report.page import Page, load_detections
from detdiff.report.plots import hardest_rows
from detdiff.report.run_folder import STREAMS, SUSPECT_KINDS
from detdiff.report.thumbnails import Layer, Shot, crop_regions, xywh_text


def _plan_image_card(page: Page, row: int) -> None:
    image_id = int(page.run.images["image_id"].iloc[row])
    width, height = page.size_of(row)
    page.request(f"i{image_id}", row, (0.0, 0.0, width, height), page.thumbnail_size)


def image_card(page: Page, row: int, stream: str, rank: int) -> Markup:
    """One image with its annotated and detected boxes, ranked in ``stream``'s list."""
    images = page.run.images
    image_id = int(images["image_id"].iloc[row])
    file_name = str(images["file_name"].iloc[row])
    width, height = page.size_of(row)
    detections = page.detections.get(image_id, (np.zeros((0, 4)), []))
    layers = {"ann": page.annotated_layer(image_id), "pred": Layer(*detections)}
    caption = el("figcaption", None,
                 el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                    el("span", {"class": "score"}, f"score {fmt(images[f'{stream}_score'].iloc[row])}")),
                 el("div", {"class": "pct"}, ordinal(float(images[f"{stream}_pct"].iloc[row])),
                    f" \u00b7 {count_text(len(layers['ann'].boxes), 'box', 'boxes')} \u00b7 "
                    f"{count_text(len(detections[0]), 'detection', 'detections')}"),
                 el("div", {"class": "name", "title": file_name}, f"{image_id} \u00b7 {file_name}"),
                 tag_list(images["why"].iloc[row]), page.box_list(layers))
    frame = page.frame(f"i{image_id}", row, (0.0, 0.0, width, height), layers, square=False, alt=file_name)
    return el("figure", {"class": "card"}, frame, caption)


def _object_view(page: Page, rows: np.ndarray) -> np.ndarray:
    """Crop regions for objects.csv rows (annotated box + last-epoch predicted box): xywh ``[n, 4]``."""
    objects = page.run.objects
    image_rows = np.array([page.row_of_image.get(int(i), -1) for i in objects["image_id"].iloc[rows]])
    sizes = np.array([page.size_of(r) if r >= 0 else (np.nan, np.nan) for r in image_rows]).reshape(-1, 2)
    predicted = page.pred_boxes[rows] if page.pred_boxes is not None else np.full((len(rows), 4), np.nan)
    return crop_regions(page.object_boxes[rows], predicted, sizes[:, 0], sizes[:, 1])


def object_cards(page: Page, stream: str, plan: bool) -> list[Markup]:
    """The hardest objects of ``stream``, each cropped around its box; ``plan`` only asks for thumbnails."""
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
                  "pred": Layer(predicted, ["detector's box at the last epoch"] * len(predicted))}
        z = objects[f"{stream}_z"].iloc[row] if f"{stream}_z" in objects else math.nan
        file_name = str(page.run.images["file_name"].iloc[image_row])
        caption = el("figcaption", None,
                     el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                        el("span", {"class": "score"}, f"score {fmt(objects[f'{stream}_score'].iloc[row])}")),
                     el("div", {"class": "cls"}, category),
                     el("div", {"class": "pct"}, ordinal(float(objects[f"{stream}_pct"].iloc[row])),
                        f" \u00b7 z in class {fmt(z)}" if pd.notna(z) else None),
                     el("div", {"class": "name", "title": file_name}, f"box {annotation_id} \u00b7 {file_name}"),
                     tag_list(objects["why"].iloc[row]), page.box_list(layers))
        frame = page.frame(name, image_row, tuple(float(v) for v in view), layers, square=True,
                           alt=f"{category} in {file_name}")
        cards.append(el("figure", {"class": "card"}, frame, caption))
    return cards


def stream_rows(page: Page, stream: str) -> tuple[np.ndarray, np.ndarray]:
    """images.csv rows of the hardest and the easiest usable images of ``stream``."""
    images = page.run.images
    scores = images[f"{stream}_score"].where(images["usable"].astype(bool))
    return hardest_rows(scores, page.top), hardest_rows(scores, page.easiest, easiest=True)


def _suspect_order(page: Page, kind: str) -> pd.DataFrame:
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


def _suspect_fix(page: Page, record: pd.Series, suggested: np.ndarray) -> str:
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
        return f"Add {what} at {xywh_text(suggested)}" if np.isfinite(suggested).all() else f"Add {what}"
    if kind == "missing_place":
        what = f"an unannotated '{suggested_name}'" if suggested_name else "an unannotated object"
        return f"Look for {what} at {xywh_text(suggested)}"
    if kind == "loose_box":
        return f"Set the box to {xywh_text(suggested)}" if np.isfinite(suggested).all() else "Tighten the box"
    if kind == "duplicate_box":
        return f"Delete annotation {int(annotation)}" if pd.notna(annotation) else "Delete the duplicate"
    return "Review"


def suspect_cards(page: Page, kind: str, plan: bool) -> list[Markup]:
    """The top suspects of ``kind``, each cropped around its boxes; ``plan`` only asks for thumbnails."""
    return _cards(page, _suspect_order(page, kind), plan, "s")


def missing_place_order(page: Page) -> pd.DataFrame:
    """Suspect-like rows of the images most likely to lack a box: the usable images ranked by ``missing_box_score``
    (their strongest detection that matches no annotation), each with that detection as the suggested box."""
    images = page.run.images
    columns = ["missing_box_score", "missing_box_x", "missing_box_y", "missing_box_w", "missing_box_h"]
    if not set(columns) <= set(images.columns):
        return pd.DataFrame()
    values = images[columns].apply(pd.to_numeric, errors="coerce")
    ranked = values[(values["missing_box_score"] > 0) & images["usable"].astype(bool)
                    & np.isfinite(values[columns[1:]]).all(axis=1)]
    ranked = ranked.sort_values("missing_box_score", ascending=False, kind="stable").head(page.top)
    category = (pd.to_numeric(images["missing_box_category_id"], errors="coerce").reindex(ranked.index)
                if "missing_box_category_id" in images else pd.Series(np.nan, index=ranked.index))
    return pd.DataFrame({
        "kind": "missing_place", "image_id": images["image_id"].reindex(ranked.index), "annotation_id": np.nan,
        "x": np.nan, "y": np.nan, "w": np.nan, "h": np.nan, "suggested_category_id": category,
        "suggested_x": ranked["missing_box_x"], "suggested_y": ranked["missing_box_y"],
        "suggested_w": ranked["missing_box_w"], "suggested_h": ranked["missing_box_h"],
        "score": ranked["missing_box_score"],
        "evidence": [f"strongest detection matching no annotation here (image evidence {v:.2f})"
                     for v in ranked["missing_box_score"]]})


def missing_place_cards(page: Page, plan: bool) -> list[Markup]:
    """The images most likely to lack a box (:func:`missing_place_order`), each cropped around its best place."""
    return _cards(page, missing_place_order(page), plan, "m")


def _cards(page: Page, part: pd.DataFrame, plan: bool, prefix: str) -> list[Markup]:
    """Cards of suspect-layout rows, each cropped around its annotated and suggested boxes (thumbnail names
    ``prefix`` + row label); ``plan`` only asks for thumbnails."""
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
        name = f"{prefix}{index}"
        if plan:
            page.request(name, int(image_row), tuple(float(v) for v in view), max(160, page.thumbnail_size * 3 // 4))
            continue
        image_id = int(page.run.images["image_id"].iloc[image_row])
        annotation = pd.to_numeric(record["annotation_id"], errors="coerce")
        focus = int(annotation) if pd.notna(annotation) else None
        layers = {"ann": page.annotated_layer(image_id, focus)}
        k = rank - 1
        if np.isfinite(suggested[k]).all():
            layers["sugg"] = Layer(suggested[k:k + 1], ["suggested box"])
        file_name = str(page.run.images["file_name"].iloc[image_row])
        where = f"box {focus} \u00b7 {file_name}" if focus is not None else f"image {image_id} \u00b7 {file_name}"
        caption = el("figcaption", None,
                     el("div", {"class": "head"}, el("span", {"class": "rank"}, f"#{rank}"),
                        el("span", {"class": "score"}, f"score {fmt(record['score'])}")),
                     el("div", {"class": "fix"}, _suspect_fix(page, record, suggested[k])),
                     el("div", {"class": "evidence"}, str(record["evidence"])),
                     el("div", {"class": "name", "title": file_name}, where), page.box_list(layers))
        frame = page.frame(name, int(image_row), tuple(float(v) for v in view), layers, square=True, alt=file_name)
        cards.append(el("figure", {"class": "card"}, frame, caption))
    return cards


def plan_cards(page: Page) -> None:
    """Decide every thumbnail the page shows and load the detections of the images it shows."""
    shown: list[np.ndarray] = []
    for stream in STREAMS:
        hardest, easiest = stream_rows(page, stream)
        shown += [hardest, easiest]
        for row in np.concatenate([hardest, easiest]):
            _plan_image_card(page, int(row))
        if stream in ("loc", "pos"):
            object_cards(page, stream, plan=True)
    for kind in SUSPECT_KINDS:
        suspect_cards(page, kind, plan=True)
    missing_place_cards(page, plan=True)
    unique: dict[str, Shot] = {shot.name: shot for shot in page.shots}
    page.shots = list(unique.values())
    rows = np.unique(np.concatenate(shown)).astype(np.int64)
    page.detections = load_detections(page.run, set(page.run.images["image_id"].iloc[rows].astype(np.int64)))
