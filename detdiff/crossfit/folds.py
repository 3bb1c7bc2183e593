"""Cross-fitting: every annotation is judged by a crop model trained on the other images (K folds by image).

Evidence about an item must come from a model that did not train on it: a model that trained on a wrong
label learns to agree with it (measured: longer detector training raised AP50 and lowered the wrong-class
AUROC). As in confident learning's out-of-sample predicted probabilities (Northcutt, Jiang & Chuang, JAIR
2021), the images are split into ``crossfit.folds`` folds; fold ``k``'s model trains on the others and
predicts the class probabilities and the box of every annotation of fold ``k``, and the box around every
virtual box probe there (a loosened copy of a box, :mod:`detdiff.data.probes`), and the objectness, class and box
of every place in fold ``k`` where the detector saw an unannotated object (:class:`Places`). Each fold's predictions are saved as
soon as they exist (``RUNDIR/crossfit/fold_K.npz``, renamed into place), so an interrupted audit redoes only
unfinished folds.

Reproducibility: fold ``k`` draws its batches, windows and flips from ``PCG64([seed, 104729, k])`` and seeds
torch with ``seed + k`` before building its model; same seed and thread count, same predictions.
"""

from __future__ import annotations

import hashlib
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import torch
from tqdm import tqdm

from detdiff.boxes import overlaps_objects
from detdiff.config import is_auto
from detdiff.crossfit import crop_model as cm
from detdiff.crossfit.crops import MIN_SIDE, STORE, crop_extent
from detdiff.data.coco import CocoDataset
from detdiff.train.batches import FLIP_MODES
from detdiff.train.optimizer import warmup_cosine

CROSSFIT_DIR = "crossfit"
PREDICTIONS_FILE = "predictions.npz"
PREDICT_BATCH = 512
#: Rows of the random crop store the recipe times a fold's work on (:meth:`CropRows.random`, 50 MB): more than a
#: CPU cache holds, as a dataset's crops are, so the gathers of a batch's rows cost what they cost in a fold.
TIMING_STORE_ROWS = 4096
#: Rows of a timed prediction (:func:`crop_work`).
TIMED_PREDICT_ROWS = 256
#: Window sizes (times the centred window) whose predictions are averaged, each with its mirror where allowed
#: (test-time augmentation, common practice). Measured against one window, same fold models (1 thread): loose-box
#: AUROC warehouse 0.940 -> 0.949, streetcam 0.894 -> 0.902, held-out digits 0.865 -> 0.877; wrong class
#: 0.995 / 0.989 / 0.970 unchanged to +0.001, clean-box accuracy +0.001 to +0.007; prediction 3x, a small part of the
#: cross-fit's time (4-6%).
TEST_SCALES: tuple[float, ...] = (0.85, 1.0, 1.15)


@dataclass
class CrossFitResult:
    """Out-of-sample predictions, one row per annotation row (NaN where none: crowd or unusable image).

    ``probs [A, C]`` class probabilities; ``box [A, 4]`` the predicted box, xywh original px; ``fold [A]``
    the fold of the annotation's image; ``probe_rows [P]`` the boxes carrying a box probe, ``probe_given
    [P, 4]`` their loosened boxes and ``probe_box [P, 4]`` the box predicted around each (xywh px);
    ``seconds`` the training time of the fold models; ``place_image [N]`` / ``place_box [N, 4]`` (xywh px) the
    places judged for an unannotated object (:mod:`detdiff.crossfit.places`), ``place_object_p [N]`` the
    objectness each got from the fold model that did not train on its image (NaN where none), ``place_probs
    [N, C]`` the class probabilities it gave the place and ``place_refined [N, 4]`` the box it drew around the place
    (xywh px; both NaN where none, empty in run folders of older versions).
    """

    probs: np.ndarray
    box: np.ndarray
    fold: np.ndarray
    probe_rows: np.ndarray
    probe_given: np.ndarray
    probe_box: np.ndarray
    seconds: float
    place_image: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    place_box: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    place_object_p: np.ndarray = field(default_factory=lambda: np.zeros(0))
    place_probs: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), np.float32))
    place_refined: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))


def assign_folds(num_images: int, folds: int, seed: int) -> np.ndarray:
    """``int64 [I]``: the fold of every image, balanced (a random permutation taken modulo ``folds``)."""
    order = np.random.default_rng([int(seed), 15485863]).permutation(num_images)
    fold = np.empty(num_images, dtype=np.int64)
    fold[order] = np.arange(num_images) % folds
    return fold


def reference_boxes(boxes_xywh: np.ndarray) -> np.ndarray:
    """The boxes the crops were cut around: each side widened to at least ``MIN_SIDE`` about its centre."""
    side = np.maximum(boxes_xywh[:, 2:], MIN_SIDE)
    centre = boxes_xywh[:, :2] + boxes_xywh[:, 2:] / 2
    return np.concatenate([centre - side / 2, side], axis=1)


def to_reference_units(boxes_xywh: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """``[n, 4]`` xywh px -> xyxy in units of the reference boxes (the reference box is ``[0, 0, 1, 1]``)."""
    x1y1 = (boxes_xywh[:, :2] - reference[:, :2]) / reference[:, 2:]
    x2y2 = (boxes_xywh[:, :2] + boxes_xywh[:, 2:] - reference[:, :2]) / reference[:, 2:]
    return np.concatenate([x1y1, x2y2], axis=1)


def from_reference_units(boxes: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Inverse of :func:`to_reference_units`: xyxy reference units -> xywh px."""
    x1y1 = reference[:, :2] + boxes[:, :2] * reference[:, 2:]
    x2y2 = reference[:, :2] + boxes[:, 2:] * reference[:, 2:]
    return np.concatenate([x1y1, x2y2 - x1y1], axis=1)


def windows_around(units: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """Centred prediction windows (``crop_model.WINDOW`` times the box, times ``scale``) around boxes given in
    reference units."""
    centre = (units[:, :2] + units[:, 2:]) / 2
    side = (units[:, 2:] - units[:, :2]) * cm.WINDOW * scale
    return np.concatenate([centre - side / 2, centre + side / 2], axis=1).astype(np.float32)


def target_in_window(units: np.ndarray, windows: np.ndarray) -> np.ndarray:
    """Where boxes (reference units) lie in windows (reference units), in window units."""
    side = np.concatenate([windows[:, 2:] - windows[:, :2]] * 2, axis=1)
    return ((units - np.concatenate([windows[:, :2]] * 2, axis=1)) / side).astype(np.float32)


def fold_key(trained: CocoDataset, probe_rows: np.ndarray, probe_boxes: np.ndarray, config: dict[str, Any],
             places: Places | None = None) -> str:
    """What a saved fold depends on: annotations trained on, box probes, places judged, the crossfit, flips and seed
    settings and the test scales."""
    places = Places.none() if places is None else places
    digest = hashlib.sha256()
    for arr in (trained.ann_ids, trained.labels, trained.boxes, trained.iscrowd, probe_rows, probe_boxes,
                places.image, places.box):
        digest.update(np.ascontiguousarray(arr).tobytes())
    settings = (sorted(config["crossfit"].items()), config["train"]["flips"], config["train"]["seed"], TEST_SCALES)
    digest.update(repr(settings).encode())
    return digest.hexdigest()


class CropRows:
    """What a crop-model step reads, one row per box: the stored crops ``uint8 [A, STORE, STORE, 3]``, the box
    trained on in reference units ``[A, 4]``, the standardised geometry ``float32 [A, 4]`` and the class index."""

    def __init__(self, crops: np.ndarray, units: np.ndarray, geometry: np.ndarray, labels: np.ndarray,
                 input_size: int) -> None:
        self.crops, self.units, self.geometry, self.input_size = crops, units, geometry, int(input_size)
        self.labels = np.asarray(labels, dtype=np.int64)
        self.extent = crop_extent()

    def background(self, rows: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Background boxes beside ``rows``' boxes (:func:`crop_model.background_boxes`, reference units) with
        their standardised geometry; returns ``(rows, boxes, geometry)`` of those that fitted. Here the geometry
        is the row's own (a random store knows no images); :class:`_Inputs` also refuses boxes on other objects."""
        boxes, ok = cm.background_boxes(rng, len(rows), self.extent)
        return rows[ok], boxes[ok], self.geometry[rows[ok]]

    @classmethod
    def random(cls, num_classes: int, input_size: int, rows: int = TIMING_STORE_ROWS, seed: int = 0) -> CropRows:
        """``rows`` crops of random pixels around boxes of the crop's own reference size, random classes: the
        arrays of a dataset not yet decoded, for timing (:func:`crop_work`)."""
        rng = np.random.default_rng(seed)
        crops = rng.integers(0, 256, (rows, STORE, STORE, 3), dtype=np.uint8)
        units = np.tile(np.array([0.0, 0.0, 1.0, 1.0]), (rows, 1))
        geometry = rng.standard_normal((rows, cm.GEOMETRY_FEATURES)).astype(np.float32)
        return cls(crops, units, geometry, rng.integers(0, max(1, num_classes), rows), input_size)

    def batch(self, rows: np.ndarray, windows: np.ndarray) -> torch.Tensor:
        return cm.resample(self.crops[rows], windows, self.input_size, extent=self.extent)


class _Inputs(CropRows):
    """Everything the fold models read: crops, labels and boxes trained on, geometry, windows, box probes."""

    def __init__(self, original: CocoDataset, trained: CocoDataset, crops: np.ndarray, probe_rows: np.ndarray,
                 probe_boxes: np.ndarray, usable_images: np.ndarray, input_size: int) -> None:
        self.reference = reference_boxes(original.boxes)                 # crops were cut around these
        image = original.ann_image_index
        self.trainable = ~trained.iscrowd & usable_images[image]
        self.scorable = ~original.iscrowd & usable_images[image]
        widths, heights = original.widths[image].astype(np.float64), original.heights[image].astype(np.float64)
        raw = cm.geometry_raw(trained.boxes, widths, heights)
        self.mean, self.std = cm.geometry_stats(raw[self.trainable] if self.trainable.any() else raw)
        # the box trained on, in reference units
        super().__init__(crops, to_reference_units(trained.boxes, self.reference),
                         cm.standardise(raw, self.mean, self.std), trained.labels, input_size)
        # box probes: judged around their loosened boxes, in the units of the crop of the box they loosen
        self.probe_rows = np.asarray(probe_rows, dtype=np.int64)
        self.probe_units = to_reference_units(probe_boxes, self.reference[self.probe_rows])
        self.probe_geometry = cm.standardise(cm.geometry_raw(probe_boxes, widths[self.probe_rows],
                                                             heights[self.probe_rows]), self.mean, self.std)
        self.widths, self.heights, self.image = widths, heights, image
        # a background box must not lie on another object: every box of the dataset but the planted missing-box
        # probes (objects nobody labelled, as a real missing box is) holds one
        holders = ~(trained.iscrowd & ~original.iscrowd)
        self.object_xyxy = np.where(holders[:, None], original.boxes_xyxy(), 0.0)
        self.image_offsets = original.image_offsets

    def background(self, rows: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        boxes, ok = cm.background_boxes(rng, len(rows), self.extent)
        px = from_reference_units(boxes.astype(np.float64), self.reference[rows])
        ok &= ~overlaps_objects(self.object_xyxy, self.image_offsets, self.image[rows], px, cm.BACKGROUND_MAX_IOU)
        rows, px = rows[ok], px[ok]
        geometry = cm.standardise(cm.geometry_raw(px, self.widths[rows], self.heights[rows]), self.mean, self.std)
        return rows, boxes[ok], geometry


def _train_fold(inputs: _Inputs, rows: np.ndarray, num_classes: int, cfg: dict[str, Any], flips: str,
                seed: int, fold: int, bar: tqdm) -> cm.CropModel:
    torch.manual_seed(seed + fold)
    rng = np.random.default_rng([seed, 104729, fold])
    model = cm.CropModel(num_classes, width=int(cfg["width"]), input_size=inputs.input_size)
    optimizer = torch.optim.AdamW(model.parameters(), lr=float(cfg["lr"]), weight_decay=1e-4)
    batch_size = int(cfg["batch_size"])
    steps = fold_steps(len(rows), float(cfg["epochs"]), batch_size)
    scheduler = torch.optim.lr_scheduler.LambdaLR(optimizer, warmup_cosine(max(1, steps // 10), steps))
    allowed = np.array(FLIP_MODES[flips])
    precision = str(cfg.get("precision", "auto"))
    model.train()
    passes = math.ceil(steps * batch_size / max(len(rows), 1))          # whole shuffles, cut at the last step
    order = np.concatenate([rng.permutation(rows) for _ in range(passes)])
    for step in range(steps):
        _train_step(model, optimizer, inputs, np.sort(order[step * batch_size:(step + 1) * batch_size]), rng, allowed,
                    precision)
        scheduler.step()
        bar.update(1)
    return model.eval()


def _train_step(model: cm.CropModel, optimizer: torch.optim.Optimizer, inputs: CropRows, idx: np.ndarray,
                rng: np.random.Generator, allowed: np.ndarray, precision: str) -> None:
    """One optimizer step on rows ``idx``: windows jittered around their boxes and resampled from the stored crops,
    then background windows beside a random :data:`crop_model.BACKGROUND_SHARE` of them (centred, as a judged
    place is), flips drawn where ``allowed``, the forward pass at ``precision``."""
    windows = _jitter_around(inputs.units[idx], rng)
    side = rng.random(len(idx)) < cm.BACKGROUND_SHARE
    bg_rows, bg_boxes, bg_geometry = inputs.background(idx[side], rng)
    bg_windows = windows_around(bg_boxes)
    pixels = inputs.batch(np.concatenate([idx, bg_rows]), np.concatenate([windows, bg_windows]))
    target = torch.from_numpy(np.concatenate([target_in_window(inputs.units[idx], windows),
                                              target_in_window(bg_boxes, bg_windows)]))
    draw = (rng.random((len(idx) + len(bg_rows), 3)) < 0.5) & allowed
    pixels, target = cm.flip_batch(pixels, target, draw)
    geometry = torch.from_numpy(np.concatenate([inputs.geometry[idx], bg_geometry]))
    with cm.training_autocast(precision):
        logits, boxes, objectness = model(pixels, geometry)
    is_object = torch.from_numpy(np.r_[np.ones(len(idx)), np.zeros(len(bg_rows))].astype(np.float32))
    loss = cm.crop_loss(logits.float(), boxes.float(), torch.from_numpy(inputs.labels[idx]), target[:len(idx)],
                        objectness.float(), is_object)
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    optimizer.step()


@dataclass
class CropWork:
    """A fold model and its work as callables to time (:func:`crop_work`); ``predicted``: rows per ``predict``."""

    model: cm.CropModel
    step: Callable[[], None]
    predict: Callable[[], None]
    predicted: int


def crop_work(rows: CropRows, num_classes: int, cfg: dict[str, Any], flips: str,
              precision: str | None = None) -> CropWork:
    """A fold model's work as callables to time, each done as :func:`cross_fit` does it: a training step on a
    batch of ``crossfit.batch_size`` rows drawn at random from ``rows`` (:func:`_train_step`, at ``precision``,
    default ``crossfit.precision``), and the prediction of :data:`TIMED_PREDICT_ROWS` rows with every test window
    and mirror (:func:`_predict`). Timing a step on one batch of random pixels instead read 1.3-2.0x low against
    the folds' measured time on seven of eight validity audits: it left out the resampling from the stored crops
    (about a quarter of a step), the predictions and the slower gathers of rows drawn from a large store."""
    rng = np.random.default_rng(0)
    model = cm.CropModel(num_classes, width=int(cfg["width"]), input_size=rows.input_size)
    optimizer = torch.optim.AdamW(model.parameters(), lr=float(cfg["lr"]), weight_decay=1e-4)
    allowed = np.array(FLIP_MODES[flips])
    precision = str(cfg.get("precision", "auto") if precision is None else precision)
    count, batch = len(rows.labels), int(cfg["batch_size"])
    picked = rng.choice(count, TIMED_PREDICT_ROWS, replace=count < TIMED_PREDICT_ROWS)

    def step() -> None:        # a full batch even from a small sample of rows
        model.train()
        _train_step(model, optimizer, rows, np.sort(rng.choice(count, batch, replace=count < batch)), rng, allowed,
                    precision)

    def predict() -> None:
        model.eval()
        _predict(model, rows, picked, rows.units[picked], rows.geometry[picked], flips)

    return CropWork(model, step, predict, len(picked))


def fold_steps(num_rows: int, epochs: float, batch_size: int) -> int:
    """Optimizer steps of one fold model: ``epochs`` passes (a fraction allowed) over ``num_rows`` boxes."""
    return max(1, math.ceil(epochs * num_rows / batch_size)) if num_rows else 0


def _jitter_around(units: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Training windows around boxes in reference units: centred windows shifted and scaled at random."""
    unit_windows = cm.sample_windows(rng, len(units))                  # around [0, 0, 1, 1]
    side = np.concatenate([units[:, 2:] - units[:, :2]] * 2, axis=1)
    return (np.concatenate([units[:, :2]] * 2, axis=1) + unit_windows * side).astype(np.float32)


@torch.no_grad()
def _predict(model: cm.CropModel, inputs: CropRows, rows: np.ndarray, units: np.ndarray, geometry: np.ndarray,
             flips: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Class probabilities ``[n, C]``, boxes ``[n, 4]`` (reference units) and objectness probabilities ``[n]`` for
    ``rows`` judged as ``units``; averaged over the windows of :data:`TEST_SCALES` and their horizontal mirrors
    where ``train.flips`` allows mirrors."""
    probs, boxes, objects = [], [], []
    mirror = FLIP_MODES[flips][0]
    for start in range(0, len(rows), PREDICT_BATCH):
        idx = slice(start, start + PREDICT_BATCH)
        geo = torch.from_numpy(geometry[idx])
        p_sum, box_sum, obj_sum = 0.0, 0.0, 0.0
        for scale in TEST_SCALES:
            windows = windows_around(units[idx], scale)
            pixels = inputs.batch(rows[idx], windows)
            logits, box, obj = model(pixels, geo)
            p, o = logits.softmax(1), obj.sigmoid()
            if mirror:
                logits_m, box_m, obj_m = model(pixels.flip(-1).contiguous(memory_format=torch.channels_last), geo)
                p, o = (p + logits_m.softmax(1)) / 2, (o + obj_m.sigmoid()) / 2
                box = (box + torch.stack([1 - box_m[:, 2], box_m[:, 1], 1 - box_m[:, 0], box_m[:, 3]], 1)) / 2
            p_sum, obj_sum = p_sum + p.numpy(), obj_sum + o.numpy()
            box_sum = box_sum + cm.window_to_box_units(box.numpy().astype(np.float64), windows.astype(np.float64))
        probs.append(p_sum / len(TEST_SCALES))
        boxes.append(box_sum / len(TEST_SCALES))
        objects.append(obj_sum / len(TEST_SCALES))
    if not len(rows):
        return np.zeros((0, model.num_classes), np.float32), np.zeros((0, 4)), np.zeros(0, np.float32)
    return np.concatenate(probs), np.concatenate(boxes), np.concatenate(objects)


def _save_fold(path: Path, **arrays: Any) -> None:
    tmp = path.with_name(f"{path.stem}.tmp-{os.getpid()}.npz")
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
    os.replace(tmp, path)


@dataclass
class Places:
    """Places to judge for an unannotated object: image rows ``[N]``, boxes ``[N, 4]`` xywh original px and their
    crops ``uint8 [N, STORE, STORE, 3]``, cut as an annotation's are (:func:`detdiff.crossfit.crops.object_crops`)."""

    image: np.ndarray
    box: np.ndarray
    crops: np.ndarray

    @classmethod
    def none(cls) -> Places:
        return cls(np.zeros(0, np.int64), np.zeros((0, 4)), np.zeros((0, STORE, STORE, 3), np.uint8))


def _place_rows(places: Places, original: CocoDataset, inputs: _Inputs) -> CropRows:
    """The places as crop rows: each judged around its own box (reference units ``[0, 0, 1, 1]``)."""
    reference = reference_boxes(places.box)
    image = places.image
    raw = cm.geometry_raw(places.box, original.widths[image].astype(np.float64),
                          original.heights[image].astype(np.float64))
    return CropRows(places.crops, to_reference_units(places.box, reference), cm.standardise(raw, inputs.mean, inputs.std),
                    np.zeros(len(image), np.int64), inputs.input_size)


def cross_fit(original: CocoDataset, trained: CocoDataset, crops: np.ndarray, usable_images: np.ndarray,
              probe_rows: np.ndarray, probe_boxes: np.ndarray, config: dict[str, Any], rundir: str | Path, *,
              places: Places | None = None, progress: bool = True) -> CrossFitResult:
    """Train the fold models and collect their out-of-sample predictions (see module docstring).

    ``original``: the dataset as given (what the outputs judge); ``trained``: its training copy (planted
    probes left out, :func:`detdiff.data.probes.training_copy`); ``crops``: the stored crops of the boxes
    (``[A, STORE, STORE, 3]``); ``usable_images bool [I]``; ``probe_rows [P]`` / ``probe_boxes [P, 4]`` the
    virtual box probes (:func:`detdiff.data.probes.box_probes`); ``places``: places to judge for an unannotated
    object (:class:`Places`), each by the fold model of its image.
    """
    cfg, flips, seed = config["crossfit"], str(config["train"]["flips"]), int(config["train"]["seed"])
    if is_auto(cfg["folds"]):
        raise ValueError("crossfit.folds is 'auto': the recipe (detdiff.recipe.fit_recipe) resolves it before the "
                         "cross-fit; pass a number to call cross_fit directly")
    folds = int(cfg["folds"])
    if folds < 2:
        raise ValueError(f"crossfit.folds must be at least 2, got {folds}")
    out_dir = Path(rundir) / CROSSFIT_DIR
    out_dir.mkdir(parents=True, exist_ok=True)
    places = Places.none() if places is None else places
    key = fold_key(trained, probe_rows, probe_boxes, config, places)
    inputs = _Inputs(original, trained, crops, probe_rows, probe_boxes, usable_images, int(cfg["input_size"]))
    place_rows = _place_rows(places, original, inputs)
    place_object_p = np.full(len(places.image), np.nan)
    place_probs = np.full((len(places.image), original.num_classes), np.nan, np.float32)
    place_units = np.full((len(places.image), 4), np.nan)
    fold_of_image = assign_folds(original.num_images, folds, seed)
    fold = fold_of_image[original.ann_image_index]
    num_classes = original.num_classes
    probs = np.full((original.num_annotations, num_classes), np.nan, np.float32)
    box_units = np.full((original.num_annotations, 4), np.nan)
    probe_units = np.full((len(inputs.probe_rows), 4), np.nan)
    todo, seconds = [], 0.0
    for k in range(folds):
        path = out_dir / f"fold_{k}.npz"
        if path.is_file():
            with np.load(path) as saved:
                if str(saved["key"]) == key:
                    probs[saved["rows"]], box_units[saved["rows"]] = saved["probs"], saved["box"]
                    probe_units[saved["probe_positions"]] = saved["probe_box"]
                    place_object_p[saved["place_positions"]] = saved["place_object_p"]
                    if "place_probs" in saved.files:        # folds saved by older versions lack them
                        place_probs[saved["place_positions"]] = saved["place_probs"]
                    if "place_units" in saved.files:
                        place_units[saved["place_positions"]] = saved["place_units"]
                    seconds += float(saved["seconds"])
                    continue
        todo.append(k)
    batch_size, epochs = int(cfg["batch_size"]), float(cfg["epochs"])
    train_rows = {k: np.flatnonzero(inputs.trainable & (fold != k)) for k in todo}
    total = sum(fold_steps(len(r), epochs, batch_size) for r in train_rows.values())
    with tqdm(total=total, desc=f"cross-fit crop models ({folds} folds)", unit="step", disable=not progress,
              leave=False) as bar:
        for k in todo:
            start = time.perf_counter()
            model = _train_fold(inputs, train_rows[k], num_classes, cfg, flips, seed, k, bar)
            rows = np.flatnonzero(inputs.scorable & (fold == k))
            p, b, _ = _predict(model, inputs, rows, inputs.units[rows], inputs.geometry[rows], flips)
            here = np.flatnonzero(fold[inputs.probe_rows] == k)
            _, pb, _ = _predict(model, inputs, inputs.probe_rows[here], inputs.probe_units[here],
                                inputs.probe_geometry[here], flips)
            mine = np.flatnonzero(fold_of_image[places.image] == k)
            pp, pu, po = _predict(model, place_rows, mine, place_rows.units[mine], place_rows.geometry[mine], flips)
            elapsed = time.perf_counter() - start
            probs[rows], box_units[rows] = p, b
            probe_units[here] = pb
            place_object_p[mine], place_probs[mine], place_units[mine] = po, pp, pu
            _save_fold(out_dir / f"fold_{k}.npz", key=np.array(key), rows=rows, probs=p, box=b,
                       probe_positions=here, probe_box=pb, place_positions=mine, place_object_p=po, place_probs=pp,
                       place_units=pu, seconds=np.float64(elapsed))
            seconds += elapsed
    box = from_reference_units(box_units, inputs.reference)
    probe_box = from_reference_units(probe_units, inputs.reference[inputs.probe_rows])
    result = CrossFitResult(probs, box, fold, inputs.probe_rows, np.asarray(probe_boxes, np.float64), probe_box,
                            seconds, places.image.astype(np.int64), places.box.astype(np.float64), place_object_p,
                            place_probs, from_reference_units(place_units, reference_boxes(places.box)))
    _save_fold(out_dir / PREDICTIONS_FILE, **{k: np.asarray(v) for k, v in vars(result).items()})
    return result


def load_predictions(rundir: str | Path) -> CrossFitResult | None:
    """The saved :class:`CrossFitResult` of a run folder, or None when the audit made none."""
    path = Path(rundir) / CROSSFIT_DIR / PREDICTIONS_FILE
    if not path.is_file():
        return None
    with np.load(path) as saved:
        return CrossFitResult(**{k: (float(saved[k]) if k == "seconds" else saved[k]) for k in saved.files})
