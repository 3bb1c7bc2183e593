"""Fault planter and dataset writer shared by every demo scenario: COCO file with faults, clean truth file.

A scenario draws (or loads) its images, writes them under ``images/`` (:func:`draw_images` runs that
loop) and hands its clean objects, image records, categories and confusion table to
:func:`write_dataset`. That plants label faults (wrong class, missing box, loose box, duplicate box)
in the *written* COCO file while ``truth.json`` keeps the clean version and the list of faults, so an
audit's findings can be scored. ``demo/README.md`` documents both files. A scenario may pass its own
default rates (``check_fault_rates(..., defaults)``), a wrong-class table weighted by class frequency
within look-alike groups (:func:`look_alike_confusions`) and its own loose-box rule (:class:`LooseBoxes`);
the defaults keep the warehouse's output unchanged.

Seeding contract, the same for every scenario: :func:`spawn_streams` splits one ``SeedSequence``
into one stream for ids, one for faults and one per image. Image ids are drawn from the ids stream
before any image, annotation ids from the same stream after all images, faults from the faults
stream; JPEG quality is fixed and JSON keys are sorted, so the same seed writes the same bytes.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import cv2
import numpy as np
from tqdm import tqdm

from detdiff.atomic import write_json_atomic

#: Share of clean objects that receive each planted fault (disjoint sets of objects).
DEFAULT_FAULT_RATES: dict[str, float] = {
    "wrong_class": 0.04, "missing_box": 0.03, "loose_box": 0.04, "duplicate_box": 0.02}
#: The held-out scenarios' defaults (aerial, digits): 5% of boxes per kind and 1% duplicates.
HELD_OUT_FAULT_RATES: dict[str, float] = {
    "wrong_class": 0.05, "missing_box": 0.05, "loose_box": 0.05, "duplicate_box": 0.01}
#: IoU between a planted loose box and its clean box lies in this range (a scenario may pass its own).
LOOSE_BOX_IOU: tuple[float, float] = (0.5, 0.7)
#: IoU between a planted duplicate and its original is above this (above lint's near-duplicate threshold 0.95,
#: so `detdiff check` reports every planted duplicate).
DUPLICATE_MIN_IOU = 0.95


#: Wrong-class table: true class name -> the names a wrong-class fault may write instead, drawn
#: uniformly from a sequence or in proportion to the weights of a mapping (see :func:`look_alike_confusions`).
Confusions = Mapping[str, Sequence[str] | Mapping[str, float]]


@dataclass(frozen=True)
class DemoPaths:
    """Where a scenario generator wrote its dataset."""

    annotations: Path   # COCO file with the planted faults
    images_dir: Path    # JPEG images, file names as in the COCO file
    truth: Path         # clean objects, image conditions and the list of planted faults


@dataclass(frozen=True)
class LooseBoxes:
    """How a loose box is planted: grown by ``grow`` and shifted by ``shift`` (shares of the clean box's
    width and height, each drawn uniformly per axis) until its IoU with the clean box lies in ``iou``.

    The defaults are the warehouse's; a scene asking for subtler loose boxes narrows the growth too,
    or nearly every accepted box sits at the low end of the range.
    """

    iou: tuple[float, float] = LOOSE_BOX_IOU
    grow: tuple[float, float] = (0.12, 0.5)
    shift: tuple[float, float] = (0.04, 0.2)


class Streams(NamedTuple):
    """The random streams of one generated dataset (see the seeding contract above)."""

    ids: np.random.Generator
    faults: np.random.Generator
    images: list[np.random.SeedSequence]     # one per image: ``np.random.default_rng(images[k])``


def spawn_streams(seed: int, num_images: int) -> Streams:
    """Split ``seed`` into the ids stream, the faults stream and one seed sequence per image."""
    ids_seq, fault_seq, *image_seqs = np.random.SeedSequence(seed).spawn(num_images + 2)
    return Streams(np.random.default_rng(ids_seq), np.random.default_rng(fault_seq), image_seqs)


def _ids(rng: np.random.Generator, count: int, start_low: int, start_high: int, gap_rate: float) -> list[int]:
    """Increasing ids that start well above 1 and skip some values (as real exports do)."""
    if count == 0:
        return []
    steps = 1 + (rng.random(count) < gap_rate) * rng.integers(1, 6, count)
    return (int(rng.integers(start_low, start_high)) + np.cumsum(steps) - steps[0]).tolist()


def image_ids(ids_rng: np.random.Generator, count: int) -> list[int]:
    """``count`` increasing, gapped image ids from the ids stream (draw them before any image)."""
    return _ids(ids_rng, count, 400, 900, 0.2)


def check_fault_rates(fault_rates: Mapping[str, float] | None,
                      defaults: Mapping[str, float] = DEFAULT_FAULT_RATES) -> dict[str, float]:
    """``defaults`` (one rate per kind) updated with ``fault_rates``; ValueError on unknown kinds or bad rates."""
    rates = dict(defaults)
    if fault_rates is not None:
        unknown = sorted(set(fault_rates) - set(DEFAULT_FAULT_RATES))
        if unknown:
            raise ValueError(f"generate_demo: unknown fault kind(s) {unknown} in fault_rates; "
                             f"expected some of {sorted(DEFAULT_FAULT_RATES)}")
        rates.update({k: float(v) for k, v in fault_rates.items()})
    bad = {k: v for k, v in rates.items() if not (0.0 <= v <= 1.0)}
    if bad:
        raise ValueError(f"generate_demo: fault_rates must lie in [0, 1], got {bad}")
    if sum(rates.values()) > 1.0:
        raise ValueError(f"generate_demo: fault_rates add up to {sum(rates.values()):.3f}; each object gets "
                         f"at most one fault, so they must add up to at most 1")
    return rates


def write_image(images_dir: Path, file_name: str, pixels: np.ndarray, quality: int) -> None:
    """Encode ``uint8 [H, W, 3]`` BGR pixels as JPEG at fixed ``quality`` into ``images_dir / file_name``."""
    ok, encoded = cv2.imencode(".jpg", pixels, [cv2.IMWRITE_JPEG_QUALITY, quality])
    if not ok:
        raise RuntimeError(f"generate_demo: OpenCV could not encode image {file_name}")
    (images_dir / file_name).write_bytes(encoded.tobytes())


def remove_stale_images(images_dir: Path, pattern: str, kept: set[str]) -> None:
    """Delete files matching ``pattern`` not in ``kept``: images of an earlier, larger run in the same folder."""
    for stale in images_dir.glob(pattern):
        if stale.name not in kept:
            stale.unlink()


#: Draws one image from its own stream: ``(rng, image id) -> (BGR pixels, image record, object records)``.
#: The image record holds ``width``, ``height`` and the conditions; objects are as :func:`write_dataset` takes them.
ImageDrawer = Callable[[np.random.Generator, int], tuple[np.ndarray, dict[str, Any], list[dict[str, Any]]]]


def draw_images(out_dir: Path, *, num_images: int, seed: int, stem: str, quality: int, progress: bool,
                draw: ImageDrawer) -> tuple[Streams, list[dict[str, Any]], list[dict[str, Any]]]:
    """Draw and write every image of a scenario; the streams (for :func:`write_dataset`), image records, objects.

    Image ``k`` is drawn by ``draw`` from its own stream and written as ``images/{stem}_{image id:05d}.jpg``
    at JPEG ``quality``; images of an earlier, larger run in the same folder are removed.
    """
    if num_images < 1:
        raise ValueError(f"generate_demo: num_images must be at least 1, got {num_images}")
    images_dir = out_dir / "images"
    images_dir.mkdir(parents=True, exist_ok=True)
    streams = spawn_streams(seed, num_images)
    ids = image_ids(streams.ids, num_images)
    records: list[dict[str, Any]] = []
    objects: list[dict[str, Any]] = []
    for k in tqdm(range(num_images), desc=f"{stem} images", unit="img", disable=not progress):
        pixels, record, found = draw(np.random.default_rng(streams.images[k]), ids[k])
        file_name = f"{stem}_{ids[k]:05d}.jpg"
        write_image(images_dir, file_name, pixels, quality)
        records.append({"image_id": ids[k], "file_name": file_name, **record})
        objects += found
    remove_stale_images(images_dir, f"{stem}_*.jpg", {r["file_name"] for r in records})
    return streams, records, objects


# --------------------------------------------------------------------------------------------------
# Faults planted in the written annotations.


def iou_xywh(a: np.ndarray, b: np.ndarray) -> float:
    """IoU of two xywh boxes."""
    ix = max(0.0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return float(inter / (a[2] * a[3] + b[2] * b[3] - inter))


def _clip_box(box: np.ndarray, width: int, height: int) -> np.ndarray:
    """xywh box clipped to the image and rounded to 1/100 px."""
    x1, y1 = max(0.0, box[0]), max(0.0, box[1])
    x2, y2 = min(float(width), box[0] + box[2]), min(float(height), box[1] + box[3])
    x1, y1, x2, y2 = (round(v, 2) for v in (x1, y1, x2, y2))
    return np.array([x1, y1, round(x2 - x1, 2), round(y2 - y1, 2)])


def _loose_box(rng: np.random.Generator, clean: np.ndarray, width: int, height: int,
               rule: LooseBoxes) -> np.ndarray | None:
    """A grown and shifted version of ``clean`` (xywh) with IoU inside ``rule.iou``, or None."""
    lo, hi = rule.iou
    margin = 0.1 * (hi - lo)           # stay clear of the edges so rounding cannot leave the range
    for _ in range(40):
        grow = rng.uniform(*rule.grow, 2)
        shift = rng.uniform(*rule.shift, 2) * rng.choice([-1.0, 1.0], 2)
        w, h = clean[2:] * (1 + grow)
        cx, cy = clean[:2] + clean[2:] / 2 + shift * clean[2:]
        box = _clip_box(np.array([cx - w / 2, cy - h / 2, w, h]), width, height)
        if box[2] > 0 and box[3] > 0 and lo + margin <= iou_xywh(box, clean) <= hi - margin:
            return box
    return None


def _duplicate_box(rng: np.random.Generator, clean: np.ndarray, width: int, height: int) -> np.ndarray:
    """A second box for the same object: an exact copy or a jitter of a few percent, IoU at least 0.97."""
    if rng.random() < 0.3:
        return clean.copy()
    for _ in range(20):
        jitter = rng.uniform(-0.012, 0.012, 4) * np.concatenate([clean[2:], clean[2:]])
        box = _clip_box(clean + jitter, width, height)
        if box[2] > 0 and box[3] > 0 and iou_xywh(box, clean) >= DUPLICATE_MIN_IOU + 0.02:
            return box
    return clean.copy()


def look_alike_confusions(names: Sequence[str], frequencies: Sequence[float],
                          groups: Sequence[Sequence[str]]) -> dict[str, dict[str, float]]:
    """Wrong-class table that draws the written class in proportion to class frequency among look-alikes.

    A class in one of ``groups`` may be written as any other member of its group, a class in no group
    as any other class; either way each candidate weighs its share of ``frequencies`` (same order as
    ``names``), normalised per true class. Rare classes then receive few wrong labels, so a wrong
    class cannot be found by the rarity of the written class alone.
    """
    weight = dict(zip(names, (float(f) for f in frequencies)))
    group_of = {name: tuple(group) for group in groups for name in group}
    unknown = sorted(set(group_of) - set(weight))
    if unknown:
        raise ValueError(f"look_alike_confusions: group member(s) {unknown} are not class names")
    table: dict[str, dict[str, float]] = {}
    for name in names:
        options = [other for other in group_of.get(name, names) if other != name]
        total = sum(weight[o] for o in options)
        table[name] = {o: weight[o] / total for o in options}
    return table


def _wrong_class(rng: np.random.Generator, options: Sequence[str] | Mapping[str, float]) -> str:
    """One name from ``options``: uniform over a sequence, in proportion to the weights of a mapping."""
    if isinstance(options, Mapping):
        names = list(options)
        p = np.array([options[n] for n in names], dtype=np.float64)
        return names[int(rng.choice(len(names), p=p / p.sum()))]
    return options[int(rng.integers(len(options)))]


def plant_faults(rng: np.random.Generator, objects: Sequence[Mapping[str, Any]], sizes: Sequence[tuple[int, int]],
                 rates: Mapping[str, float], categories: Sequence[tuple[int, str, str]],
                 confusions: Confusions, loose: LooseBoxes = LooseBoxes()) -> dict[int, tuple[str, Any]]:
    """Choose which objects get which fault: ``{object index: (kind, written value)}``.

    Each kind gets ``round(rate * number of objects)`` objects (fewer only if no loose box fits),
    drawn without overlap from one random permutation. ``sizes[i]`` is (width, height) of object i's
    image. A wrong class is drawn from ``confusions[true class name]`` and written as a category index;
    a loose box follows ``loose``.
    """
    n = len(objects)
    order = iter(rng.permutation(n).tolist())
    faults: dict[int, tuple[str, Any]] = {}
    name_to_index = {name: i for i, (_, name, _) in enumerate(categories)}
    for kind in ("wrong_class", "missing_box", "loose_box", "duplicate_box"):
        wanted = int(round(rates[kind] * n))
        while wanted > 0:
            i = next(order, None)
            if i is None:
                break
            obj = objects[i]
            clean = np.asarray(obj["bbox"], dtype=np.float64)
            if kind == "wrong_class":
                value: Any = name_to_index[_wrong_class(rng, confusions[categories[obj["category"]][1]])]
            elif kind == "missing_box":
                value = None
            elif kind == "loose_box":
                value = _loose_box(rng, clean, *sizes[i], loose)
                if value is None:
                    continue
            else:
                value = _duplicate_box(rng, clean, *sizes[i])
            faults[i] = (kind, value)
            wanted -= 1
    return faults


# --------------------------------------------------------------------------------------------------
# The written COCO file and the truth file.


def write_dataset(out_dir: str | Path, *, scenario: str, seed: int, streams: Streams,
                  categories: Sequence[tuple[int, str, str]], confusions: Confusions,
                  images: Sequence[Mapping[str, Any]], objects: Sequence[Mapping[str, Any]],
                  rates: Mapping[str, float], loose: LooseBoxes = LooseBoxes()) -> DemoPaths:
    """Plant faults in ``objects`` and write ``annotations.json`` (faults in) and ``truth.json`` (clean).

    Parameters
    ----------
    out_dir : dataset folder; the images are already in ``out_dir / "images"``.
    scenario : one-line description of the scene, written into both files.
    seed : the seed the dataset came from, recorded in both files.
    streams : from :func:`spawn_streams`; the ids stream has already given the image ids.
    categories : ``(COCO id, name, supercategory)`` per class; ``object["category"]`` indexes it.
    confusions : class name -> names a wrong-class fault may write instead, a sequence (drawn uniformly)
        or a mapping name -> weight (drawn in proportion, e.g. from :func:`look_alike_confusions`; the
        table then goes into the truth file as ``wrong_class_weights``). Every class must be a key
        when ``rates["wrong_class"] > 0``.
    images : one record per image with ``image_id``, ``file_name``, ``width``, ``height``; any other
        keys (image conditions) go to the truth file only.
    objects : clean objects with ``image_id``, ``category`` (index) and ``bbox`` (xywh list); any other
        keys (difficulty fields) are copied into the object's truth record.
    rates : checked fault rates from :func:`check_fault_rates`.
    loose : how loose boxes are planted, their IoU range included (default: the warehouse's, IoU 0.5-0.7).
    """
    out_dir = Path(out_dir)
    size_of = {r["image_id"]: (r["width"], r["height"]) for r in images}
    sizes = [size_of[obj["image_id"]] for obj in objects]
    faults = plant_faults(streams.faults, objects, sizes, rates, categories, confusions, loose)
    extra = sum(1 for kind, _ in faults.values() if kind == "duplicate_box")
    missing = sum(1 for kind, _ in faults.values() if kind == "missing_box")
    ann_ids = iter(_ids(streams.ids, len(objects) - missing + extra, 7000, 7500, 0.1))
    cat_ids = [c for c, _, _ in categories]

    annotations: list[dict[str, Any]] = []
    truth_objects: list[dict[str, Any]] = []
    fault_records: list[dict[str, Any]] = []

    def annotate(image_id: int, category: int, box: np.ndarray | list[float]) -> int:
        ann_id = next(ann_ids)
        x, y, w, h = (float(v) for v in box)
        annotations.append({"id": ann_id, "image_id": image_id, "category_id": cat_ids[category],
                            "bbox": [x, y, w, h], "area": w * h, "iscrowd": 0})
        return ann_id

    for i, obj in enumerate(objects):
        kind, value = faults.get(i, (None, None))
        clean = obj["bbox"]
        extras = {k: v for k, v in obj.items() if k not in ("image_id", "category", "bbox")}
        record = {**extras, "image_id": obj["image_id"], "category_id": cat_ids[obj["category"]],
                  "clean_bbox": clean, "fault": kind}
        if kind == "missing_box":
            record["annotation_id"] = None
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "category_id": record["category_id"],
                                  "bbox": clean})
        elif kind == "wrong_class":
            record["annotation_id"] = annotate(obj["image_id"], value, clean)
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": record["annotation_id"],
                                  "written_category_id": cat_ids[value], "true_category_id": record["category_id"]})
        elif kind == "loose_box":
            record["annotation_id"] = annotate(obj["image_id"], obj["category"], value)
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": record["annotation_id"],
                                  "written_bbox": [float(v) for v in value], "clean_bbox": clean,
                                  "iou": round(iou_xywh(value, np.asarray(clean)), 4)})
        else:
            record["annotation_id"] = annotate(obj["image_id"], obj["category"], clean)
            if kind == "duplicate_box":
                dup_id = annotate(obj["image_id"], obj["category"], value)
                fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": dup_id,
                                      "duplicate_of": record["annotation_id"], "bbox": [float(v) for v in value],
                                      "iou": round(iou_xywh(value, np.asarray(clean)), 4)})
        truth_objects.append(record)

    category_records = [{"id": c, "name": n, "supercategory": s} for c, n, s in categories]
    coco = {"info": {"description": f"detdiff demo: {scenario}", "version": "1", "seed": seed},
            "images": [{"id": r["image_id"], "file_name": r["file_name"], "width": r["width"],
                        "height": r["height"]} for r in images],
            "annotations": annotations, "categories": category_records}
    truth = {"scenario": scenario, "seed": seed, "fault_rates": dict(rates),
             "loose_box_iou_range": list(loose.iou), "duplicate_min_iou": DUPLICATE_MIN_IOU,
             "categories": category_records,
             "counts": {"images": len(images), "annotations": len(annotations),
                        "categories": len(category_records), "objects": len(truth_objects),
                        **{k: sum(1 for f in fault_records if f["kind"] == k) for k in DEFAULT_FAULT_RATES}},
             "faults": fault_records, "objects": truth_objects, "images": list(images)}
    if any(isinstance(options, Mapping) for options in confusions.values()):
        truth["wrong_class_weights"] = {name: dict(options) for name, options in confusions.items()}
    paths = DemoPaths(annotations=out_dir / "annotations.json", images_dir=out_dir / "images",
                      truth=out_dir / "truth.json")
    write_json_atomic(paths.annotations, coco, sort_keys=True)
    write_json_atomic(paths.truth, truth, sort_keys=True)
    return paths
