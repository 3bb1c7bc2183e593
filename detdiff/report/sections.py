"""The sections of the report page, in page order (:func:`page_sections`), and the menu that links them (:data:`NAV`).

Top to bottom: overview, what to do, one section per loss stream, suspects, classes, object map, run settings.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd

from detdiff.report.advice import Advice, cause_sentences, sourcing_advice
from detdiff.report.cards import image_card, missing_place_cards, object_cards, stream_rows, suspect_cards
from detdiff.report.elements import Markup, data_table, el, fmt, join, num_cell, plot_image
from detdiff.report.page import Page
from detdiff.report.run_folder import (
    STREAMS,
    SUSPECT_KINDS,
    RunFolder,
    epochs_cut,
    lean_clause,
    lint_code_counts,
    lint_totals,
)
from detdiff.report.thumbnails import legend
from detdiff.report.wording import STREAM_TITLES, descriptor_words, format_ap, format_percent

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
    "wrong_class": "Crop models that never trained on this image give another class a higher probability than "
                   "the label.",
    "missing_box": "The detector persistently finds an object here that has no annotation.",
    "loose_box": "Crop models that never trained on this image draw the object's box elsewhere.",
    "duplicate_box": "Two annotations of the same object.",
}
SELF_CHECK_NOTE = ("Before training, the audit made faults of its own: boxes left out of the detector's training "
                   "(missing boxes), and every box read with another class and with a loosened box by crop models "
                   "that never trained on its image. How well each kind of planted fault ranks above the real "
                   "items is the audit's accuracy on this dataset (AUROC, 95% interval); the same scores estimate "
                   "each suspect's probability of being a real fault, and each list stops where that probability "
                   "falls below the level shown. No planted fault is ever listed as a suspect. The "
                   "loose-box estimate usually reads high (the audit's loosened boxes are easier to spot than real "
                   "subtle ones) and has read low; the missing-box estimate has read high and low by up to a "
                   "quarter.")
MISSING_PLACES_NOTE = ("Every image ranked by its strongest detection that matches no annotation, in the late "
                       "epochs or after training (the dashed box): where an unannotated object is most likely, "
                       "whether or not it made the list above. A ranking, not a list of faults: the self-check's "
                       "missing-box AUROC per image says how well it separates images that lack a box here.")
#: (anchor, label) of each section, for the page's menu
NAV = [("overview", "Overview"), ("actions", "What to do"), ("stream-loc", "Box regression"),
       ("stream-pos", "Positive class"), ("stream-neg", "Background class"), ("suspects", "Suspects"),
       ("classes", "Classes"), ("map", "Object map"), ("settings", "Settings")]


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
    checked_rows = ([[str(k).replace("_", " "), num_cell(v)] for k, v in checked.items()]
                    if isinstance(checked, dict) else [])
    checked_part = (el("details", None, el("summary", None, "What was checked"),
                       data_table([("item", "text"), ("count", "num")], checked_rows, sortable=False))
                    if checked_rows else None)
    if codes.empty:
        return join([el("p", {"class": "note"}, "No lint findings: the annotation file passed every check."),
                     checked_part])
    chips = el("div", {"class": "chips"}, [el("span", {"class": f"chip {s}"}, f"{s}: {n:,}")
                                           for s, n in totals.items() if n])
    code_rows = [[r.severity, el("td", None, el("code", None, r.code)), num_cell(r.count)]
                 for r in codes.itertuples()]
    parts = [chips, data_table([("severity", "text"), ("code", "text"), ("count", "num")], code_rows)]
    listed = findings.get("findings")
    records = [f for f in listed if isinstance(f, dict)] if isinstance(listed, list) else []
    if records:
        columns = ["severity", "code", "message", "file", "record", "record_id", "field"]
        table = pd.DataFrame(records, columns=columns).fillna("").astype(str)
        shown = table.head(200)
        rows = [list(r)[1:] for r in shown.itertuples()]
        total = int(codes["count"].sum())
        parts.append(el("details", None, el("summary", None, f"Show findings ({len(shown):,} of {total:,})"),
                        data_table([(c.replace("_", " "), "text") for c in columns], rows, scroll=True)))
    parts.append(checked_part)
    return join(parts)


def _quality_table(metrics: dict[str, Any], objects: pd.DataFrame) -> Markup:
    """COCO AP by object size, with the number of annotated boxes behind each row: an AP over a handful of
    boxes (one large box in a dataset of small ones) reads as noise, not as a verdict on that size."""
    counts = (objects["size_bin"].astype(str).value_counts() if "size_bin" in objects.columns
              else pd.Series(dtype=np.int64))
    rows = [["all sizes", num_cell(len(objects), fmt(len(objects))),
             num_cell(metrics.get("AP"), format_ap(metrics.get("AP"))),
             num_cell(metrics.get("AP50"), format_ap(metrics.get("AP50"))),
             num_cell(metrics.get("AP75"), format_ap(metrics.get("AP75")))]]
    for size in ("small", "medium", "large"):
        ap, ap50 = metrics.get(f"AP_{size}"), metrics.get(f"AP50_{size}")
        boxes = int(counts.get(size, 0))
        rows.append([f"{size} objects", num_cell(boxes, fmt(boxes)), num_cell(ap, format_ap(ap)),
                     num_cell(ap50, format_ap(ap50)), num_cell(None, "")])
    return data_table([("objects", "text"), ("boxes", "num"), ("AP", "num"), ("AP50", "num"), ("AP75", "num")],
                      rows, sortable=False)


def _overview(page: Page) -> Markup:
    run = page.run
    info = run.run
    metrics = run.metrics
    suspects = len(run.suspects)
    usable = info.get("num_usable_images", int(run.images["usable"].sum()))
    num_images = info.get("num_images", len(run.images))
    errors = lint_totals(run.findings).get("error", 0)
    tiles = el("div", {"class": "tiles"},
               _tile(fmt(num_images), "images"), _tile(fmt(usable), "usable images", bad=usable != num_images),
               _tile(fmt(info.get("num_annotations", len(run.objects))), "annotations"),
               _tile(fmt(info.get("num_categories", len(run.classes))), "classes"),
               _tile(format_ap(metrics.get("AP50")), "detector AP50", bad=not run.trustworthy()),
               _tile(fmt(suspects), "suspected label errors", bad=suspects > 0),
               _tile(fmt(errors), "lint errors", bad=errors > 0))
    unusable = info.get("unusable_images") or []
    unusable_rows = [[num_cell(u.get("image_id")), str(u.get("file_name", "")), str(u.get("reason", ""))]
                     for u in unusable[:200] if isinstance(u, dict)]
    quality_note = (f"COCO AP of the audit detector on the dataset itself (pycocotools COCOeval), used only to "
                    f"judge whether its losses are meaningful; warning below AP50 "
                    f"{format_ap(metrics.get('min_ap50'))}.")
    inline_warning = (el("p", {"class": "warn-line"}, "Not trustworthy: ", run.quality_warning())
                      if run.quality_warning() else None)
    left = el("div", None, el("h3", None, "Detector quality"), inline_warning, _quality_table(metrics, run.objects),
              el("p", {"class": "note"}, quality_note))
    right = el("div", None, el("h3", None, "Annotation file check"), _findings_table(run))
    body = [el("h2", None, "Overview"), tiles, el("div", {"class": "columns"}, left, right)]
    if unusable_rows:
        body += [el("h3", None, "Unusable images", el("span", {"class": "sub"}, f"{len(unusable):,} not trained on")),
                 data_table([("image id", "num"), ("file name", "text"), ("reason", "text")], unusable_rows,
                            scroll=True)]
    return el("section", {"id": "overview"}, body)


def _advice_item(advice: Advice) -> Markup:
    """The sentence with the part that states its number set in bold."""
    start = advice.text.find(advice.emphasis) if advice.emphasis else -1
    if start < 0:
        return el("li", {"class": advice.action}, advice.text)
    end = start + len(advice.emphasis)
    return el("li", {"class": advice.action}, advice.text[:start], el("span", {"class": "num"}, advice.text[start:end]),
              advice.text[end:])


def _actions(page: Page) -> Markup:
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


def _causes_table(page: Page, stream: str) -> Markup:
    rows = page.run.causes[page.run.causes["stream"] == stream]
    if rows.empty:
        return el("p", {"class": "empty"}, "No cause statistics for this stream.")
    order = pd.to_numeric(rows["q_value"], errors="coerce").fillna(np.inf).to_numpy()
    rows = rows.iloc[np.argsort(order, kind="stable")]
    cells = [[r["level"], descriptor_words(str(r["descriptor"])), r["test"], r["bin"], num_cell(r["effect"]),
              el("td", {"class": "num", "data-v": repr(float(r["ci_low"])) if pd.notna(r["ci_low"]) else ""},
                 f"{fmt(r['ci_low'])} \u2026 {fmt(r['ci_high'])}"),
              num_cell(r["q_value"]), num_cell(r["n"]),
              num_cell(r["top_rate"], _percent_text(r["top_rate"])),
              num_cell(r["base_rate"], _percent_text(r["base_rate"])),
              "yes" if r["significant"] else "no"] for _, r in rows.iterrows()]
    return data_table([("level", "text"), ("descriptor", "text"), ("test", "text"), ("bin", "text"),
                       ("effect", "num"), ("95% CI", "num"), ("q (BH)", "num"), ("n", "num"), ("share hardest", "num"),
                       ("share all", "num"), ("significant", "text")], cells,
                      row_classes=["significant" if s else "" for s in rows["significant"]], scroll=True)


def _stream_section(page: Page, stream: str) -> Markup:
    hardest, easiest = stream_rows(page, stream)
    title = STREAM_TITLES[stream]
    body = [el("h2", None, title, el("span", {"class": "sub"}, f"{stream} stream")),
            el("p", {"class": "lead"}, STREAM_EXPLAINED[stream]),
            legend(toggle=True)]
    sentences = [text for text, _ in cause_sentences(page.run.causes, page.run.top_fraction, stream)]
    if sentences:
        body.append(el("ul", {"class": "advice"}, [el("li", {"class": "collect"}, s) for s in sentences[:6]]))
    body.append(el("h3", None, "Hardest images", el("span", {"class": "sub"}, f"top {len(hardest)}")))
    body.append(el("div", {"class": "grid"}, [image_card(page, int(r), stream, k) for k, r in enumerate(hardest, 1)])
                if len(hardest) else el("p", {"class": "empty"}, "No scored images."))
    if stream in ("loc", "pos"):
        cards = object_cards(page, stream, plan=False)
        if cards:
            body.append(el("h3", None, "Hardest objects", el("span", {"class": "sub"}, f"top {len(cards)}")))
            body.append(el("div", {"class": "grid small"}, cards))
    if len(easiest):
        body.append(el("h3", None, "Easiest images", el("span", {"class": "sub"}, f"bottom {len(easiest)}")))
        body.append(el("div", {"class": "grid small"},
                       [image_card(page, int(r), stream, k) for k, r in enumerate(easiest, 1)]))
    body.append(el("h3", None, "Loss per epoch"))
    body.append(plot_image(page.plots, f"curves_{stream}", f"{title}: loss per epoch of the hardest items")
                or el("p", {"class": "empty"}, "No training log in this run folder."))
    body.append(el("h3", None, "What goes with a high score"))
    body.append(plot_image(page.plots, f"causes_{stream}", f"{title}: effect of each descriptor with its CI"))
    body.append(_causes_table(page, stream))
    return el("section", {"id": f"stream-{stream}"}, body)


def _suspects_section(page: Page) -> Markup:
    suspects = page.run.suspects
    counts = suspects["kind"].value_counts()
    body = [el("h2", None, "Suspected label errors", el("span", {"class": "sub"}, f"{len(suspects):,} in all")),
            el("p", {"class": "lead"}, "Items whose evidence points at the label rather than the image. "
                                       "Each list is ordered by score; review before changing anything."),
            el("div", {"class": "chips"}, [el("a", {"class": "chip", "href": f"#suspects-{kind}"},
                                              f"{KIND_TITLES[kind]}: {int(counts.get(kind, 0)):,}")
                                           for kind in SUSPECT_KINDS]),
            legend(predicted=False, suggested=True)]
    check = _self_check_table(page.run)
    if check is not None:
        body[2:2] = [el("h3", {"id": "self-check"}, "Self-check: how well this audit finds faults here"), check,
                     el("p", {"class": "note"}, SELF_CHECK_NOTE)]
    for kind in SUSPECT_KINDS:
        cards = suspect_cards(page, kind, plan=False)
        total = int(counts.get(kind, 0))
        shown = f"top {len(cards)} of {total:,}" if total > len(cards) else f"{total:,}"
        body.append(el("h3", {"id": f"suspects-{kind}"}, KIND_TITLES[kind], el("span", {"class": "sub"}, shown)))
        body.append(el("p", {"class": "note"}, KIND_EXPLAINED[kind]))
        body.append(el("div", {"class": "grid small"}, cards) if cards else el("p", {"class": "empty"}, "None."))
        if kind == "missing_box":
            body += _missing_places(page)
    return el("section", {"id": "suspects"}, body)


def _missing_places(page: Page) -> list[Markup]:
    """The images ranked by their missing-box evidence: where to look for unannotated objects, list or not."""
    cards = missing_place_cards(page, plan=False)
    if not cards:
        return []
    return [el("h3", {"id": "missing-places"}, "Images to re-check for an unannotated object",
               el("span", {"class": "sub"}, f"top {len(cards)}")),
            el("p", {"class": "note"}, MISSING_PLACES_NOTE), el("div", {"class": "grid small"}, cards)]


def _precision_cell(run: RunFolder, kind: str) -> Markup:
    """A list's expected precision, with the way the estimate usually leans where it has one."""
    precision = run.expected_precision(kind)
    if precision is None:
        return num_cell(None)
    value, lean = precision
    return num_cell(value, f"{value:.3f}" + lean_clause(lean, " (", ")"))


def _self_check_table(run: RunFolder) -> Markup | None:
    """One row per calibrated kind: probes, self-measured AUROC, fault share, list size and expected precision."""
    rows = []
    for kind in ("wrong_class", "loose_box", "missing_box"):
        check = run.list_check(kind)
        if not check:
            continue
        ci = check.get("auroc_ci95") or [None, None]
        interval = f"{ci[0]:.3f}-{ci[1]:.3f}" if all(isinstance(v, (int, float)) for v in ci) else ""
        auroc = check.get("auroc")
        auroc_text = f"{auroc:.3f}" if isinstance(auroc, (int, float)) and auroc == auroc else None
        title = KIND_TITLES[kind] + (" (AUROC per image)" if kind == "missing_box" else "")
        rows.append([title, num_cell(check.get("probes")), num_cell(auroc, auroc_text), interval,
                     num_cell(check.get("fault_share"), format_percent(check["fault_share"])
                              if isinstance(check.get("fault_share"), (int, float)) else ""),
                     num_cell(check.get("listed")), _precision_cell(run, kind),
                     num_cell(check.get("level"))])
    if not rows:
        return None
    return data_table([("kind", "text"), ("probes", "num"), ("AUROC", "num"), ("95% interval", "text"),
                       ("estimated faulty", "num"), ("listed", "num"), ("expected precision", "num"),
                       ("list level", "num")], rows, sortable=False)


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


def _classes_section(page: Page) -> Markup:
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
        rows.append([num_cell(r["category_id"]), r["category_name"], num_cell(r["images"]), num_cell(r["objects"]),
                     num_cell(r["median_loc_score"]), num_cell(r["median_pos_score"]), num_cell(r["suspects"]),
                     num_cell(share, _percent_text(share)),
                     num_cell(value, format_ap(value))])
    body.append(data_table([("id", "num"), ("class", "text"), ("images", "num"), ("objects", "num"),
                            ("median box regression", "num"), ("median positive class", "num"), ("suspects", "num"),
                            ("suspect share", "num"), ("AP50", "num")], rows, scroll=len(rows) > 14))
    return el("section", {"id": "classes"}, body)


def _map_section(page: Page) -> Markup:
    body = [el("h2", None, "Object map"),
            el("p", {"class": "lead"}, "Every object placed by its detector features (nearby = looks alike to the "
                                       "detector), coloured by score percentile; diamonds mark the hardest. Hard "
                                       "clusters are kinds of object to collect more of.")]
    body.append(plot_image(page.plots, "object_map", "2-D map of objects coloured by score")
                or el("p", {"class": "empty"}, "No map coordinates in objects.csv."))
    body.append(plot_image(page.plots, "scores", "distribution of image scores per stream"))
    return el("section", {"id": "map"}, body)


def _flatten(config: dict[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    for key, value in config.items():
        name = f"{prefix}{key}"
        out += _flatten(value, f"{name}.") if isinstance(value, dict) else [(name, value)]
    return out


def _epochs_trained(info: dict) -> str:
    """Epochs done, with the planned count where the time limit ended training early."""
    cut = epochs_cut(info)
    return f"{cut[0]} of {cut[1]} (train.time_limit reached)" if cut else fmt(info.get("epochs_done", ""))


def _settings_section(page: Page) -> Markup:
    info = page.run.run
    seconds = info.get("train_seconds")
    facts = [("detdiff version", info.get("detdiff_version", "")), ("annotations", info.get("annotations", "")),
             ("images folder", info.get("images_dir", "")), ("device", info.get("device", "")),
             ("epochs trained", _epochs_trained(info)),
             ("training time", f"{fmt(seconds)} s" if isinstance(seconds, (int, float)) else ""),
             ("views per second (whole views and tiles)", fmt(info.get("images_per_second", ""))),
             ("report", f"top {page.top} per list, thumbnails {'on' if page.thumbnails else 'off'}")]
    config_rows = [[el("td", None, el("code", None, k)), el("td", None, el("code", None, json.dumps(v)))]
                   for k, v in _flatten(page.run.config)]
    body = [el("h2", None, "Run settings"),
            data_table([("setting", "text"), ("value", "text")], [[k, str(v)] for k, v in facts], sortable=False)]
    reasons = page.run.recipe.get("reasons") if isinstance(page.run.recipe, dict) else None
    if isinstance(reasons, dict) and reasons:
        recipe_rows = [[el("td", None, el("code", None, key)), el("td", None, str(text))] for key, text in reasons.items()]
        notes = [el("p", {"class": "note"}, str(n)) for n in page.run.recipe.get("traded", []) + page.run.recipe.get("notes", [])]
        body += [el("h3", None, "Recipe fitted to this dataset"),
                 data_table([("setting", "text"), ("why", "text")], recipe_rows, sortable=False), notes]
    if config_rows:
        body.append(el("details", None, el("summary", None, "Full configuration"),
                       data_table([("key", "text"), ("value", "text")], config_rows, scroll=True)))
    return el("section", {"id": "settings"}, body)


def page_sections(page: Page) -> list[Markup]:
    """Every section in page order, the detector-quality warning first (empty when the detector is fine)."""
    sections = [_warning_banner(page.run), _overview(page), _actions(page)]
    sections += [_stream_section(page, stream) for stream in STREAMS]
    sections += [_suspects_section(page), _classes_section(page), _map_section(page), _settings_section(page)]
    return sections
