"""The audit's recipe fitted to the dataset: view size, anchor shapes and training lengths, sized to a time budget.

Every setting left at ``auto`` in the config is chosen here from the dataset alone (its box and image sizes, its
image and box counts) and from speeds measured on this machine; a value given in a config file or by a flag is
kept as given. Each choice comes with one line of reason. The recipe is printed before training and saved as
``RUNDIR/recipe.json``, and the resolved values go into ``RUNDIR/config.yaml`` (so ``--resume`` repeats them).

* ``data.image_size``: the side ``S`` of the square training view. An object of ``sqrt(w h)`` px in an image of
  long side ``L`` is ``sqrt(w h) S / L`` px in the view; ``S`` is the smallest multiple of 32 that brings the
  ``recipe.object_quantile`` share of the boxes to ``recipe.min_object_px`` or more, within
  ``[recipe.min_view, recipe.max_view]`` and no larger than the largest image (common practice: objects under
  about 16 px are hard for any detector; the COCO "small" bin ends at 32 px).
* ``model.anchor_shapes``: three ``[w, h]`` anchor shapes per detection level from k-means on the boxes' view
  sizes with the distance ``1 - IoU`` of boxes sharing a centre ("dimension clusters": Redmon & Farhadi,
  YOLO9000, CVPR 2017), the nine centres sorted by area, smallest three to the finest level (as in YOLOv3).
* ``train.epochs``: ``recipe.epochs_at_1000 * sqrt(1000 / images)``, within ``[recipe.min_epochs,
  recipe.max_epochs]``: small datasets need more passes, large ones fewer (more steps in all).
* ``crossfit.epochs``: ``recipe.crop_epochs_at_4000 * (4000 / boxes) ^ recipe.crop_epochs_power``, within
  ``[recipe.min_crop_epochs, recipe.max_crop_epochs]``: a fold model's steps grow as ``boxes ^ (1 - power)``.
  The power was 0.5 (steps as ``sqrt(boxes)``) until cross-fits of the same crops at twice the epochs showed the
  models undertrained on large sets (aerial seed 1, 42k boxes, 7 -> 14 epochs: loose-box AUROC 0.816 -> 0.876,
  wrong-class top-k precision 0.730 -> 0.797; streetcam seed 1, 12.7k boxes, 13 -> 26: 0.903 -> 0.927); at 0.25
  the tuned warehouse set (3.6k boxes) keeps its 25 epochs, and 12.7k / 42k boxes get 18 / 13.
* ``crossfit.folds``: ``auto`` is :data:`CROP_FOLDS` (3), or :data:`CROP_FOLDS_WHEN_CUT` (2) where the budget
  would cut the crop models' epochs (below). An epoch of K folds trains K models on ``(K - 1) / K`` of the boxes
  each, K - 1 passes over the data: two folds cost half of three, so the same time buys twice the epochs, each model
  trained on half the images instead of two thirds. Same detectors, cross-fitted again at the same cost: aerial seed
  4 (42k boxes; used to decide) 3 epochs of three folds -> 6 of two, wrong class 0.957 -> 0.969 (top-k precision of
  the list 0.59 -> 0.63), loose box 0.792 -> 0.823, missing box (image) 0.874 -> 0.885; held out, aerial seed 5
  4.7 -> 9.4 epochs, 0.966 -> 0.979 (0.60 -> 0.72), 0.831 -> 0.852, 0.849 -> 0.856. Pinned ``crossfit.epochs`` keep
  three folds (the recipe then trades nothing of the crop models').
* ``crossfit.precision``: ``auto`` becomes bfloat16 where a timed crop-model step runs at least
  :data:`BF16_MIN_SPEEDUP` times faster than in float32 (:func:`choose_crop_precision`). Same crops, 26 epochs,
  streetcam seed 1: float32 467 s, bfloat16 376 s; loose-box AUROC 0.927 / 0.924, wrong class 0.991 / 0.992.
* ``train.precision``: the same choice for the detector's training step (:func:`choose_detector_precision`, timed
  at the fitted view with the dataset's boxes per image; the faster step then buys epochs, tiles or view within the
  budget).
* **Budget**: ``recipe.budget_minutes`` (``auto``: ``recipe.seconds_per_image`` per image plus
  ``recipe.seconds_per_box`` per box, at least ``recipe.min_budget_minutes``: :func:`budget_seconds`; ``--budget``
  on the command line) bounds the whole audit. The stages outside training (decoding, the final pass, analysis,
  report) are projected first, as the plan projects them (:func:`other_stage_seconds`: a sample of the images
  decoded); the training gets the rest (at least :data:`MIN_TRAINING_SHARE` of the budget). Until it did, the
  budget bounded the training alone and the other stages, 1-2 minutes at 800 real-size images, came on top. The
  training is estimated from timed steps on this machine: the detector's on
  ``train.device`` (:func:`measure_step_seconds`; a GPU's step, where training runs on one) and a crop model's step
  and prediction as a fold does them (:func:`measure_crop_seconds`), each the median of :data:`TIMED_STEPS` calls.
  Until the crop step was timed with its resampling, on rows drawn from a large store, with the predictions counted
  and the median taken, the crop estimate read 1.3-2.0x low on seven of eight validity audits and the audits ran up
  to 1.32x their budget. The crop models judge every box at full resolution whatever the view, so they are served
  first: they get the time their epochs want, up to ``1 - recipe.detector_share`` of the training's time (over
  it, two folds instead of three where ``crossfit.folds`` is ``auto``, then their epochs shrink, down to
  ``recipe.min_crop_epochs``, fractions allowed). The detector gets the rest:
  over it, the view shrinks first (down to ``recipe.min_view``; a detector needs its steps more than its pixels),
  then the epochs (down to ``recipe.min_epochs``). When the detector's share leaves time over, the view grows (by
  32 px, up to ``recipe.max_view`` and the largest image) while the estimate stays within it: more pixels for the
  smallest objects. Where the crop models' epochs were cut and the detector's trades (in steps: 32 px, 0.8x
  epochs) leave part of its share unused, that time goes back to the crop models' epochs (up to the number
  wanted). The detector is timed at the wanted view and at the chosen one; sizes between are estimated in
  proportion to the pixels. Every trade is said.
* ``data.tile_scale``: boxes still under ``recipe.min_object_px`` in the view get tiles of their image enlarged
  until they reach it (:mod:`detdiff.data.views`), at most ``data.tile_scale`` tile px per original px. After the
  view is fitted, the largest scale of ``recipe.max_tile_scale * 0.75^k`` whose tiles fit the detector's share of
  the budget is chosen; epochs shrink for tiles down to half their wanted number (at least ``recipe.min_epochs``).
  Measured on the held-out streetcam set (800 photos, 59% of boxes under 16 px): tiles at 0.475x with epochs cut
  from 34 to 9 raised the missing-box evidence 0.58 -> 0.63 but lowered AP50 0.26 -> 0.16 (large objects seen
  9 times instead of 34), hence the floor. Time still left grows the view as above (tiles recounted at each size).
  The ``auto`` budget grows with the share of images that need tiles even in the largest view the recipe may
  choose (:func:`budget_seconds`). What stays too small is said, with the flag that buys
  resolution.
"""

from __future__ import annotations

import copy
import math
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable

import numpy as np
import torch

from detdiff.config import AUTO, ConfigError, is_auto, time_limit_floor
from detdiff.data.coco import CocoDataset
from detdiff.data.views import ViewTable, logged_view_sides, plan_tiles, small_boxes, whole_view_scale

if TYPE_CHECKING:            # for annotations; the timing functions import folds at call time, as before
    from detdiff.crossfit.folds import CropRows

VIEW_MULTIPLE = 32
ANCHORS_PER_LEVEL = 3
KMEANS_ITERATIONS = 60
TIMED_STEPS = 5
#: ``crossfit.precision`` auto: bfloat16 from this speed-up of a timed crop-model step over float32.
BF16_MIN_SPEEDUP = 1.15
#: A final-pass forward per image (eval mode, with NMS) as a share of a training step per image: 0.35-0.69, median
#: 0.55, in the plan warm-ups of seven validity audits (plan.json ``forward_s_per_image`` / ``detector_step_s`` x 16).
FORWARD_SHARE_OF_STEP = 0.55
#: The training keeps at least this share of the budget whatever the other stages are estimated to take.
MIN_TRAINING_SHARE = 0.5
#: Least anchor side (square root of its area) in strides of its detection level.
MIN_ANCHOR_STRIDES = 1.25
#: ``crossfit.folds`` auto: K folds by image (each box judged by a model trained on (K - 1) / K of the images)...
CROP_FOLDS = 3
#: ...or this many where the budget would cut the crop models' epochs: an epoch of K folds trains on K - 1 times the
#: boxes, so two folds buy twice the epochs of three in the same time (module docstring: measured).
CROP_FOLDS_WHEN_CUT = 2


@dataclass
class Recipe:
    """What :func:`fit_recipe` chose: ``settings`` (dotted key -> value) with one ``reasons`` line each, the
    estimated seconds of the training parts, and what the budget traded away."""

    settings: dict[str, Any] = field(default_factory=dict)
    reasons: dict[str, str] = field(default_factory=dict)
    estimate: dict[str, float] = field(default_factory=dict)
    traded: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        return {"settings": self.settings, "reasons": self.reasons, "estimate_seconds": self.estimate,
                "traded": self.traded, "notes": self.notes}


def box_view_sides(dataset: CocoDataset, image_size: int) -> np.ndarray:
    """``sqrt(w h)`` of every non-crowd box in a view of side ``image_size`` (px)."""
    rows = ~dataset.iscrowd
    long_side = np.maximum(dataset.widths, dataset.heights)[dataset.ann_image_index[rows]].astype(np.float64)
    side = np.sqrt(np.maximum(dataset.boxes[rows, 2] * dataset.boxes[rows, 3], 0.0))
    return side * image_size / long_side


def _largest_view(dataset: CocoDataset, cfg: dict[str, Any]) -> int:
    """The largest view side the recipe may choose: ``recipe.max_view``, and no larger than the largest image."""
    long_side = np.maximum(dataset.widths, dataset.heights).astype(np.float64)
    largest = int(math.ceil(long_side.max(initial=VIEW_MULTIPLE) / VIEW_MULTIPLE) * VIEW_MULTIPLE)
    return min(int(cfg["max_view"]), max(largest, int(cfg["min_view"])))


def choose_view_size(dataset: CocoDataset, cfg: dict[str, Any]) -> tuple[int, str]:
    """``data.image_size`` from the box sizes (module docstring) and its reason."""
    rows = ~dataset.iscrowd
    long_side = np.maximum(dataset.widths, dataset.heights).astype(np.float64)
    low, high = int(cfg["min_view"]), _largest_view(dataset, cfg)
    target = float(cfg["min_object_px"])
    if not rows.any():
        return low, f"{low} px: no boxes to size the view by"
    side = np.sqrt(np.maximum(dataset.boxes[rows, 2] * dataset.boxes[rows, 3], 1e-6))
    needed = target * long_side[dataset.ann_image_index[rows]] / side            # view side for >= target px
    want = float(np.quantile(needed, float(cfg["object_quantile"])))
    size = int(min(high, max(low, math.ceil(want / VIEW_MULTIPLE) * VIEW_MULTIPLE)))
    share = float((box_view_sides(dataset, size) >= target).mean())
    reason = (f"{size} px: {share:.0%} of the boxes are at least {target:g} px across in the view "
              f"(wanted {float(cfg['object_quantile']):.0%}, which needs {want:.0f} px; allowed {low}-{high})")
    return size, reason


def dimension_clusters(wh: np.ndarray, k: int, seed: int = 0) -> np.ndarray:
    """``[k, 2]`` cluster centres of box sizes ``wh [n, 2]`` under the distance 1 - IoU of centred boxes
    (YOLO9000's dimension clusters), sorted by area. Initialised at size quantiles, so it is deterministic."""
    wh = np.asarray(wh, dtype=np.float64).reshape(-1, 2)
    wh = wh[(wh > 0).all(axis=1)]
    if len(wh) == 0:
        raise ValueError("dimension_clusters: no box with a positive width and height")
    area = wh.prod(axis=1)
    order = np.argsort(area, kind="stable")
    centres = wh[order[np.linspace(0, len(wh) - 1, k).round().astype(int)]].copy()
    if len(wh) > 20000:                                          # the centres of a large set need no more
        wh = wh[np.random.default_rng(seed).choice(len(wh), 20000, replace=False)]
    for _ in range(KMEANS_ITERATIONS):
        inter = np.minimum(wh[:, None, 0], centres[None, :, 0]) * np.minimum(wh[:, None, 1], centres[None, :, 1])
        iou = inter / (wh.prod(axis=1)[:, None] + centres.prod(axis=1)[None, :] - inter)
        nearest = iou.argmax(axis=1)
        moved = centres.copy()
        for j in range(k):                                      # k centres, not boxes: a short loop
            members = wh[nearest == j]
            if len(members):
                moved[j] = np.median(members, axis=0)
        if np.allclose(moved, centres):
            break
        centres = moved
    return centres[np.argsort(centres.prod(axis=1), kind="stable")]


def choose_anchor_shapes(dataset: CocoDataset, image_size: int, strides: list[int],
                         tile_scale: float = 0.0, min_object_px: float = 16.0) -> tuple[list, str]:
    """``model.anchor_shapes``: dimension clusters of the boxes as the detector is trained on them (in the whole
    views, and in the tiles at ``tile_scale``: :mod:`detdiff.data.views`), three per level, and the reason.

    A shape smaller than :data:`MIN_ANCHOR_STRIDES` times its level's stride is enlarged to it (aspect kept):
    anchors narrower than the spacing of their grid leave a box between two grid points with no anchor at
    IoU >= 0.5. Measured on a 300-image warehouse set at a 160 px view: without the floor AP50 0.60 and the
    in-sample wrong-class AUROC 0.73, with the fixed grid anchors 0.71 and 0.85."""
    num_levels = len(strides)
    grid, owner = plan_tiles(dataset, image_size, tile_scale, min_object_px)
    views = ViewTable.build(dataset, whole_view_scale(dataset, image_size), grid, owner)
    wh = (views.target_box[:, 2:] - views.target_box[:, :2]).astype(np.float64)
    k = ANCHORS_PER_LEVEL * num_levels
    centres = dimension_clusters(np.maximum(wh, 1.0), k)
    level_stride = np.repeat(np.asarray(strides, dtype=np.float64), ANCHORS_PER_LEVEL)
    grow = np.maximum(1.0, MIN_ANCHOR_STRIDES * level_stride / np.sqrt(centres.prod(axis=1)))
    shapes = [[[round(float(w), 1), round(float(h), 1)]
               for w, h in (centres * grow[:, None])[i * ANCHORS_PER_LEVEL:(i + 1) * ANCHORS_PER_LEVEL]]
              for i in range(num_levels)]
    inter = np.minimum(wh[:, None, 0], centres[None, :, 0]) * np.minimum(wh[:, None, 1], centres[None, :, 1])
    iou = inter / (wh.prod(axis=1)[:, None] + centres.prod(axis=1)[None, :] - inter)
    mean_iou = float(iou.max(axis=1).mean()) if len(wh) else float("nan")
    where = "the view and its tiles" if grid.num_tiles else "the view"
    reason = (f"{k} dimension clusters of the box sizes in {where} (mean best IoU {mean_iou:.2f}), "
              f"smallest three on the finest level, none under {MIN_ANCHOR_STRIDES} strides of its level")
    return shapes, reason


def scaled_epochs(count: int, reference: float, at: float, low: int, high: int, power: float = 0.5) -> int:
    """``round(at * (reference / count) ** power)`` within ``[low, high]``."""
    return int(min(high, max(low, round(at * (reference / max(count, 1)) ** power))))


@contextmanager
def _timing_threads(config: dict[str, Any]):
    """Time with the thread count training will use and a fixed seed; restore both after."""
    from detdiff.train.resources import thread_count

    state, threads = torch.random.get_rng_state(), torch.get_num_threads()
    torch.set_num_threads(thread_count(config["train"]))
    try:
        torch.manual_seed(0)
        yield
    finally:
        torch.random.set_rng_state(state)
        torch.set_num_threads(threads)


def detector_step(config: dict[str, Any], num_classes: int, image_size: int, boxes_per_image: int = 1,
                  precision: str | None = None) -> Callable[[], None]:
    """One training step of the detector (batch ``train.batch_size`` at ``image_size``, each image with
    ``boxes_per_image`` random boxes: matching and the per-object streams grow with them) on random data, at
    ``precision`` (default ``train.precision``), on the device training will use (``train.device``: a GPU run
    gets a recipe sized to the GPU's step, not to the CPU's), as a callable for :func:`time_calls`."""
    from detdiff.model.detector import Detector
    from detdiff.model.losses import compute_loss_streams
    from detdiff.train.distributed import resolve_device, synchronizer

    device = resolve_device(str(config["train"].get("device", "cpu")))
    sync = synchronizer(device)
    batch = int(config["train"]["batch_size"])
    precision = str(config["train"].get("precision", "float32")) if precision is None else precision
    detector = Detector.from_config({**config["model"], "weights": None}, num_classes, image_size,
                                    precision="float32" if is_auto(precision) else precision).to(device)
    optimizer = torch.optim.AdamW(detector.parameters(), lr=1e-4)
    pixels = torch.randint(0, 256, (batch, image_size, image_size, 3), dtype=torch.uint8, device=device)
    clip = float(config["train"].get("grad_clip") or 0.0)
    count = max(1, int(boxes_per_image))
    corner = torch.rand(batch, count, 2) * image_size * 0.8
    extent = 8 + torch.rand(batch, count, 2) * image_size / 6
    xyxy = torch.cat([corner, (corner + extent).clamp(max=image_size)], dim=2).to(device)
    targets = [{"boxes": xyxy[b], "labels": torch.randint(0, max(1, num_classes), (count,), device=device)}
               for b in range(batch)]

    def step() -> None:                            # as the training loop takes it, from uint8 pixels
        images = pixels.permute(0, 3, 1, 2).float().div_(255.0)
        streams = compute_loss_streams(detector(images), detector.anchors, targets, config["loss"], config["log"],
                                       grid=detector.anchor_grid)
        optimizer.zero_grad(set_to_none=True)
        streams.total.backward()
        if clip > 0:
            torch.nn.utils.clip_grad_norm_(detector.parameters(), clip)
        optimizer.step()
        sync()

    return step


def measure_step_seconds(config: dict[str, Any], num_classes: int, image_size: int, boxes_per_image: int = 1) -> float:
    """Seconds per training step of the detector (:func:`detector_step` at ``train.precision``), the typical of
    :data:`TIMED_STEPS` steps after one warm-up (:func:`time_calls`), with the thread count training will use."""
    with _timing_threads(config):
        return time_calls(detector_step(config, num_classes, image_size, boxes_per_image))[0]


def choose_detector_precision(config: dict[str, Any], num_classes: int, image_size: int,
                              boxes_per_image: int = 1) -> tuple[str, str, float]:
    """``train.precision`` for ``auto``: bfloat16 when a detector training step (:func:`detector_step`) at
    ``image_size`` is timed at least :data:`BF16_MIN_SPEEDUP` times faster than float32's on this machine; with the
    reason and the chosen step's seconds (the budget's first timing)."""
    with _timing_threads(config):
        f32, bf16 = time_calls(detector_step(config, num_classes, image_size, boxes_per_image, "float32"),
                               detector_step(config, num_classes, image_size, boxes_per_image, "bfloat16"))
    choice, reason = _precision_choice("a detector training step", f32, bf16)
    return choice, reason, bf16 if choice == "bfloat16" else f32


def _resolve_precision(config: dict[str, Any], recipe: Recipe, section: str,
                       choose: Callable[[], tuple[str, str]] | None) -> None:
    """Check ``section.precision`` and resolve ``auto`` by ``choose()`` (timed steps; float32 without one)."""
    from detdiff.model.precision import PRECISIONS

    precision = config[section].get("precision", AUTO)
    if precision not in PRECISIONS:
        raise ConfigError(f"{section}.precision must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    if is_auto(precision):
        precision, reason = choose() if choose is not None else (
            "float32", "float32: no timed steps (auto picks bfloat16 only where it is timed faster)")
        config[section]["precision"], recipe.reasons[f"{section}.precision"] = precision, reason


def _precision_choice(what: str, f32: float, bf16: float) -> tuple[str, str]:
    speedup = f32 / max(bf16, 1e-9)
    choice = "bfloat16" if speedup >= BF16_MIN_SPEEDUP else "float32"
    return choice, (f"{choice}: {what} takes {f32:.3f} s in float32 and {bf16:.3f} s in bfloat16 on this machine "
                    f"({speedup:.2f}x; bfloat16 from {BF16_MIN_SPEEDUP}x)")


def measure_crop_seconds(config: dict[str, Any], num_classes: int) -> tuple[float, float]:
    """Seconds of a crop-model training step and of predicting one box, the work as a fold does it
    (:func:`detdiff.crossfit.folds.crop_work`) on a store of random crops, at ``crossfit.precision``, the typical of
    :data:`TIMED_STEPS` calls after one warm-up, with the thread count training will use."""
    from detdiff.crossfit.folds import CropRows

    cfg = config["crossfit"]
    with _timing_threads(config):
        return crop_seconds(CropRows.random(num_classes, int(cfg["input_size"])), num_classes, cfg,
                            str(config["train"]["flips"]))


def crop_seconds(rows: CropRows, num_classes: int, cfg: dict[str, Any], flips: str) -> tuple[float, float]:
    """Seconds of a fold model's training step and of its prediction per row on ``rows``
    (:func:`detdiff.crossfit.folds.crop_work` at ``crossfit.precision``), timed interleaved by :func:`time_calls`;
    the recipe times random crops, the plan's warm-up the sample's own."""
    from detdiff.crossfit.folds import crop_work

    work = crop_work(rows, num_classes, cfg, flips)
    step_s, predict_s = time_calls(work.step, work.predict)
    return step_s, predict_s / work.predicted


def choose_crop_precision(config: dict[str, Any], num_classes: int) -> tuple[str, str]:
    """``crossfit.precision`` for ``auto``: bfloat16 when its timed crop-model step (as a fold takes it,
    :func:`detdiff.crossfit.folds.crop_work`) is at least :data:`BF16_MIN_SPEEDUP` times faster than float32's on
    this machine, float32 otherwise; with the reason."""
    from detdiff.crossfit.folds import CropRows, crop_work

    cfg, flips = config["crossfit"], str(config["train"]["flips"])
    with _timing_threads(config):
        rows = CropRows.random(num_classes, int(cfg["input_size"]))
        f32, bf16 = time_calls(crop_work(rows, num_classes, cfg, flips, "float32").step,
                           crop_work(rows, num_classes, cfg, flips, "bfloat16").step, repeats=2 * TIMED_STEPS)
    return _precision_choice("a crop-model training step", f32, bf16)


def time_calls(*steps, repeats: int = TIMED_STEPS) -> tuple[float, ...]:
    """Seconds per call of each of ``steps``: the median of ``repeats`` timed calls after one warm-up. Several
    steps are timed interleaved, so that a busy spell slows them alike. The median, not the fastest: the fastest
    of three read 1.1-1.4x low against the steps the audit then took (validity audits, 2 cores), and a budget
    fitted to it overran; the median still ignores a short spell that slows one or two calls."""
    for step in steps:
        step()
    times: list[list[float]] = [[] for _ in steps]
    for _ in range(repeats):
        for step, spent in zip(steps, times):
            start = time.perf_counter()
            step()
            spent.append(time.perf_counter() - start)
    return tuple(float(np.median(spent)) for spent in times)


def fit_recipe(dataset: CocoDataset, config: dict[str, Any], *, usable_images: int | None = None,
               measure: bool = True) -> tuple[dict[str, Any], Recipe]:
    """Resolve every ``auto`` setting of ``config`` for ``dataset``; returns the resolved config and the recipe.

    ``measure=False`` skips the timed steps (no budget check; for tests and ``detdiff analyze``).
    """
    config = copy.deepcopy(config)
    cfg = config["recipe"]
    recipe = Recipe()
    images = int(usable_images if usable_images is not None else dataset.num_images)
    boxes = int((~dataset.iscrowd).sum())
    auto_view = is_auto(config["data"]["image_size"])
    auto_epochs = is_auto(config["train"]["epochs"])
    auto_crop = is_auto(config["crossfit"]["epochs"])
    auto_tiles = is_auto(config["data"].get("tile_scale"))
    auto_folds = is_auto(config["crossfit"]["folds"])
    if auto_folds:
        config["crossfit"]["folds"] = CROP_FOLDS
        recipe.reasons["crossfit.folds"] = (f"{CROP_FOLDS}: each box is judged by a crop model trained on "
                                            f"{CROP_FOLDS - 1}/{CROP_FOLDS} of the images")
    if auto_view:
        size, reason = choose_view_size(dataset, cfg)
        config["data"]["image_size"] = size
        recipe.reasons["data.image_size"] = reason
    if auto_epochs:
        config["train"]["epochs"] = scaled_epochs(images, 1000, float(cfg["epochs_at_1000"]),
                                                  int(cfg["min_epochs"]), int(cfg["max_epochs"]))
        recipe.reasons["train.epochs"] = (f"{config['train']['epochs']}: {cfg['epochs_at_1000']} x sqrt(1000 / "
                                          f"{images} images), within {cfg['min_epochs']}-{cfg['max_epochs']}")
    if auto_crop:
        power = float(cfg["crop_epochs_power"])
        config["crossfit"]["epochs"] = float(scaled_epochs(boxes, 4000, float(cfg["crop_epochs_at_4000"]),
                                                           int(cfg["min_crop_epochs"]), int(cfg["max_crop_epochs"]),
                                                           power))
        recipe.reasons["crossfit.epochs"] = (f"{config['crossfit']['epochs']}: {cfg['crop_epochs_at_4000']} x "
                                             f"(4000 / {boxes} boxes)^{power:g}, within {cfg['min_crop_epochs']}-"
                                             f"{cfg['max_crop_epochs']}")
    speeds: dict[int, float] = {}                  # seconds per detector step, timed per view size

    def time_detector() -> tuple[str, str]:
        size = int(config["data"]["image_size"])
        choice, reason, speeds[size] = choose_detector_precision(
            _with_anchors(config, dataset), dataset.num_classes, size, math.ceil(boxes / max(images, 1)))
        return choice, reason

    timed = measure and bool(dataset.num_classes)
    _resolve_precision(config, recipe, "train", time_detector if timed and boxes else None)
    _resolve_precision(config, recipe, "crossfit", (lambda: choose_crop_precision(config, dataset.num_classes))
                       if timed and config["crossfit"]["enabled"] else None)
    if measure and dataset.num_classes and boxes:
        _fit_budget(dataset, config, recipe, images, boxes, auto_view, auto_epochs, auto_crop and auto_folds,
                    auto_crop, auto_tiles, speeds)
    elif auto_tiles:
        config["data"]["tile_scale"] = float(cfg["max_tile_scale"])
        recipe.reasons["data.tile_scale"] = f"{cfg['max_tile_scale']}: recipe.max_tile_scale (no time budget fitted)"
    config = _with_anchors(config, dataset, recipe)
    size = int(config["data"]["image_size"])
    _restate_traded(recipe, config, dataset)
    if boxes:
        _say_small_objects(dataset, config, recipe)
    if is_auto(config["data"].get("cache_codec", AUTO)):
        config["data"]["cache_codec"], recipe.reasons["data.cache_codec"] = choose_cache_codec(dataset, config)
    if is_auto(config["train"].get("time_limit", AUTO)):
        config["train"]["time_limit"], recipe.reasons["train.time_limit"] = choose_time_limit(config, recipe,
                                                                                            auto_epochs)
    for key in ("data.image_size", "data.tile_scale", "data.cache_codec", "train.epochs", "train.time_limit",
                "train.precision", "crossfit.epochs", "crossfit.folds", "crossfit.precision", "model.anchor_shapes"):
        section, name = key.split(".")
        recipe.settings[key] = config[section][name]
        recipe.reasons.setdefault(key, "given in the config or on the command line")
    return config, recipe


def choose_time_limit(config: dict[str, Any], recipe: Recipe, auto_epochs: bool) -> tuple[float | str, str]:
    """``train.time_limit`` for ``auto``: the detector's share of the budget (the training's share less the crop
    models' estimate), in minutes, where the recipe fitted the epochs to the budget; ``none`` otherwise. The
    projection rests on steps timed for seconds, and a shared machine runs a long training anywhere from 0.8x to
    1.4x that pace (detector measured / projected on the validity audits): the limit makes the budget hold."""
    estimate = recipe.estimate
    if not auto_epochs or "training_budget_s" not in estimate:
        why = "train.epochs is given" if not auto_epochs else "no budget was fitted"
        return "none", f"none: {why}, so the epochs are not cut for time"
    minutes = round(max(estimate["training_budget_s"] - estimate["crop_models_s"],
                        estimate["detector_training_s"]) / 60.0, 1)
    floor = time_limit_floor(config)
    estimated = estimate["detector_training_s"] / 60.0
    return minutes, (f"{minutes:g} min: the detector's share of the budget (estimated {estimated:.1f} min); if its "
                     f"epochs run slower than timed, training ends at the last epoch that fits (not under {floor}) "
                     f"and the learning-rate schedule is re-fitted to it")


def _with_anchors(config: dict[str, Any], dataset: CocoDataset, recipe: Recipe | None = None) -> dict[str, Any]:
    """``config`` with ``model.anchor_shapes`` resolved when it is ``auto`` (a copy; the reason goes to ``recipe``)."""
    if not is_auto(config["model"].get("anchor_shapes")):
        return config
    out = copy.deepcopy(config)
    if not (~dataset.iscrowd).any():
        out["model"]["anchor_shapes"] = None
        return out
    tile_scale = out["data"].get("tile_scale")
    shapes, reason = choose_anchor_shapes(dataset, int(out["data"]["image_size"]), [int(x) for x in out["model"]["strides"]],
                                          0.0 if is_auto(tile_scale) else float(tile_scale or 0.0),
                                          float(out["recipe"]["min_object_px"]))
    out["model"]["anchor_shapes"] = shapes
    if recipe is not None:
        recipe.reasons["model.anchor_shapes"] = reason
    return out


def choose_cache_codec(dataset: CocoDataset, config: dict[str, Any]) -> tuple[str, str]:
    """``data.cache_codec`` for ``auto``: raw rows (read without decoding) while the cache they make
    (:func:`detdiff.plan.cache_disk_bytes`) takes at most ``recipe.raw_cache_gb``, JPEG rows (a tenth to a
    twentieth of the bytes) beyond; with its reason."""
    from detdiff.plan import cache_disk_bytes

    as_raw = {**config, "data": {**config["data"], "cache_codec": "raw"}}
    raw, limit = cache_disk_bytes(dataset, as_raw), float(config["recipe"]["raw_cache_gb"]) * 1e9
    codec = "raw" if raw <= limit else "jpeg"
    return codec, (f"{codec}: the raw rows would take {raw / 1e9:.1f} GB, {'within' if codec == 'raw' else 'over'} "
                   f"recipe.raw_cache_gb {limit / 1e9:g} GB" + ("" if codec == "raw" else
                                                               "; JPEG rows take a tenth to a twentieth of that"))


def budget_seconds(cfg: dict[str, Any], images: int, tiled_share: float = 0.0, boxes: int = 0) -> float:
    """``recipe.budget_minutes`` in seconds; ``auto``: ``seconds_per_image`` per image, times ``1 + tiled_share``
    (the share of the images whose small boxes need tiles: their tiles are more work of the same kind), plus
    ``seconds_per_box`` per box (the crop models judge every box, and a budget counted in images alone starved
    them on box-dense sets), at least ``min_budget_minutes``."""
    if is_auto(cfg["budget_minutes"]):
        return max(60.0 * float(cfg["min_budget_minutes"]),
                   float(cfg["seconds_per_image"]) * images * (1.0 + float(tiled_share))
                   + float(cfg.get("seconds_per_box", 0.0)) * boxes)
    return 60.0 * float(cfg["budget_minutes"])


def tiled_image_share(dataset: CocoDataset, image_size: int, cfg: dict[str, Any]) -> float:
    """Share of the images that get tiles at ``recipe.max_tile_scale`` (:func:`detdiff.data.views.plan_tiles`) in a
    view of ``image_size`` (the recipe passes the largest it may choose: the images no view can serve)."""
    grid, _ = plan_tiles(dataset, image_size, float(cfg["max_tile_scale"]), float(cfg["min_object_px"]))
    return len(np.unique(grid.image)) / max(dataset.num_images, 1)


def tile_count(dataset: CocoDataset, image_size: int, cap: float, min_object_px: float) -> int:
    """How many tiles :func:`detdiff.data.views.plan_tiles` cuts at tile scales up to ``cap``."""
    return plan_tiles(dataset, image_size, cap, min_object_px)[0].num_tiles if cap > 0 else 0


def _say_small_objects(dataset: CocoDataset, config: dict[str, Any], recipe: Recipe) -> None:
    """A note when more than 5% of the boxes stay under ``recipe.min_object_px`` in the view that logs them, with the
    share and the flags that buy resolution."""
    cfg, size = config["recipe"], int(config["data"]["image_size"])
    target = float(cfg["min_object_px"])
    grid, owner = plan_tiles(dataset, size, float(config["data"].get("tile_scale") or 0.0), target)
    small = float((logged_view_sides(dataset, size, grid, owner) < target).mean())
    if small <= 0.05:
        return
    where = f"the {size} px view" + (f" or its {grid.num_tiles} tiles" if grid.num_tiles else "")
    recipe.notes.append(f"{small:.0%} of the boxes are under {target:g} px across in {where}, too small for the "
                        f"detector to judge (their class and box are still judged by the crop models at full "
                        f"resolution); --budget MINUTES buys tiles at a larger scale (up to recipe.max_tile_scale "
                        f"{cfg['max_tile_scale']}), --image-size a larger view at about (new / {size})^2 the "
                        f"detector time")


def _fit_budget(dataset: CocoDataset, config: dict[str, Any], recipe: Recipe, images: int, boxes: int,
                auto_view: bool, auto_epochs: bool, auto_folds: bool, auto_crop: bool, auto_tiles: bool,
                speeds: dict[int, float]) -> None:
    """Shrink the ``auto`` settings until the estimated training fits the budget, then spend what is left on tiles or
    a larger view (module docstring). ``speeds``: seconds per detector step already timed, by view size."""
    cfg, train, crossfit, data = config["recipe"], config["train"], config["crossfit"], config["data"]
    tiled = tiled_image_share(dataset, _largest_view(dataset, cfg), cfg) if auto_tiles else 0.0
    budget = budget_seconds(cfg, images, tiled, boxes)
    folds, batch, crop_batch = int(crossfit["folds"]), int(train["batch_size"]), int(crossfit["batch_size"])
    per_image = math.ceil(boxes / max(images, 1))
    target = float(cfg["min_object_px"])

    def measure(size: int) -> None:
        speeds[size] = measure_step_seconds(_with_anchors(config, dataset), dataset.num_classes, size,
                                            boxes_per_image=per_image)

    if int(data["image_size"]) not in speeds:
        measure(int(data["image_size"]))
    other = other_stage_seconds(dataset, config, images, boxes, speeds[int(data["image_size"])],
                                float(cfg["max_tile_scale"]) if auto_tiles else float(data.get("tile_scale") or 0))
    training = _training_budget(recipe, cfg, budget, other, tiled)
    if auto_tiles:
        data["tile_scale"] = 0.0                   # fitted below, once the view is
    views = {"count": images + tile_count(dataset, int(data["image_size"]), float(data["tile_scale"] or 0), target)}

    def detector_seconds() -> float:
        size = int(data["image_size"])
        timed = min(speeds, key=lambda s: abs(s - size))
        return int(train["epochs"]) * math.ceil(views["count"] / batch) * speeds[timed] * (size / timed) ** 2

    crop_s, wanted_crop = 0.0, float(crossfit["epochs"])
    if crossfit["enabled"]:
        step_s, predict_s = measure_crop_seconds(config, dataset.num_classes)
        recipe.estimate.update({"crop_step_s": round(step_s, 4), "crop_predict_s_per_box": round(predict_s, 6)})
        per_epoch = crop_epoch_seconds(folds, boxes, crop_batch, step_s)
        places = int(crossfit["places_per_image"]) * images       # unannotated places judged, at most
        predictions = (2 * boxes + places) * predict_s   # every box and its box probe, once each, and the places
        crop_budget = training * (1 - float(cfg["detector_share"]))
        if auto_folds and float(crossfit["epochs"]) * per_epoch + predictions > crop_budget:
            fewer = crop_epoch_seconds(CROP_FOLDS_WHEN_CUT, boxes, crop_batch, step_s)
            affordable = max(0.0, (crop_budget - predictions) / per_epoch)
            recipe.traded.append(f"crossfit.folds {folds} -> {CROP_FOLDS_WHEN_CUT} for the budget")
            recipe.reasons["crossfit.folds"] = (
                f"{CROP_FOLDS_WHEN_CUT}: the budget gives the crop models {affordable:.1f} epochs of {folds} folds, "
                f"{crossfit['epochs']} wanted; an epoch of {CROP_FOLDS_WHEN_CUT} folds costs {fewer / per_epoch:.2f}x "
                f"(each model trains on 1/{CROP_FOLDS_WHEN_CUT} of the images)")
            folds, per_epoch = CROP_FOLDS_WHEN_CUT, fewer
            crossfit["folds"] = folds
        if auto_crop and float(crossfit["epochs"]) * per_epoch + predictions > crop_budget:
            new = max(float(cfg["min_crop_epochs"]), round((crop_budget - predictions) / per_epoch, 1))
            if new < float(crossfit["epochs"]):
                recipe.traded.append(f"crossfit.epochs {crossfit['epochs']} -> {new} for the budget")
                crossfit["epochs"] = new
        crop_s = float(crossfit["epochs"]) * per_epoch + predictions
    detector_budget = training - crop_s
    while detector_seconds() > detector_budget:
        if auto_view and int(data["image_size"]) > int(cfg["min_view"]):
            new = max(int(cfg["min_view"]), int(data["image_size"]) - VIEW_MULTIPLE)
            recipe.traded.append(f"data.image_size {data['image_size']} -> {new} for the budget")
            data["image_size"] = new
        elif auto_epochs and int(train["epochs"]) > int(cfg["min_epochs"]):
            new = max(int(cfg["min_epochs"]), int(math.floor(int(train["epochs"]) * 0.8)))
            recipe.traded.append(f"train.epochs {train['epochs']} -> {new} for the budget")
            train["epochs"] = new
        else:
            break
    wanted = int(data["image_size"])
    if auto_tiles:
        _fit_tiles(dataset, config, recipe, images, detector_budget, detector_seconds, views, auto_epochs)
    cap = float(data["tile_scale"] or 0)

    def resize(size: int) -> None:                 # a view of ``size`` px, its tiles recounted
        data["image_size"] = size
        views["count"] = images + tile_count(dataset, size, cap, target)

    while auto_view and not recipe.traded and int(data["image_size"]) + VIEW_MULTIPLE <= _largest_view(dataset, cfg):
        resize(int(data["image_size"]) + VIEW_MULTIPLE)      # time left: more pixels for small objects
        if detector_seconds() > detector_budget:
            resize(int(data["image_size"]) - VIEW_MULTIPLE)
            break
    if auto_tiles and cap > 0 and int(data["image_size"]) > wanted:
        recipe.reasons["data.tile_scale"] = tile_reason(dataset, int(data["image_size"]), cap, target)
    if int(data["image_size"]) > wanted:
        first = recipe.reasons["data.image_size"].removeprefix(f"{wanted} px: ")
        recipe.reasons["data.image_size"] = (f"{data['image_size']} px: enlarged from {wanted} px with the budget's "
                                             f"time left, more pixels for the smallest objects; at {wanted} px {first}")
    if int(data["image_size"]) not in speeds:
        measure(int(data["image_size"]))
    det_s = detector_seconds()
    if crossfit["enabled"] and auto_crop and float(crossfit["epochs"]) < wanted_crop and det_s < detector_budget:
        spare_epochs = (detector_budget - det_s) / per_epoch
        more = min(wanted_crop, math.floor(10 * (float(crossfit["epochs"]) + spare_epochs)) / 10)
        if more > float(crossfit["epochs"]):        # the detector's share left over goes back to the crop models
            recipe.notes.append(f"crossfit.epochs {crossfit['epochs']} -> {more} with the time the detector's share "
                                f"left over")
            crossfit["epochs"] = more
            crop_s = more * per_epoch + predictions
    recipe.estimate.update({"views_per_epoch": int(views["count"]),
                            "detector_step_s": round(speeds[int(data["image_size"])], 4),
                            "detector_training_s": round(det_s, 1), "crop_models_s": round(crop_s, 1),
                            "budget_s": round(budget, 1), "other_stages_s": round(other, 1),
                            "training_budget_s": round(training, 1)})
    if det_s + crop_s > training * 1.05:
        recipe.notes.append(f"the training is estimated at {(det_s + crop_s) / 60:.1f} min, over its "
                            f"{training / 60:.1f} min of the budget, with nothing left to trade; raise --budget or "
                            f"set smaller values")


def crop_epoch_seconds(folds: int, boxes: int, batch_size: int, step_s: float) -> float:
    """Seconds of one epoch of every fold model: each of ``folds`` models trains on ``(folds - 1) / folds`` of the
    ``boxes`` in batches of ``batch_size``, ``step_s`` per step."""
    return folds * math.ceil(boxes * (folds - 1) / folds / batch_size) * step_s


def _training_budget(recipe: Recipe, cfg: dict[str, Any], budget: float, other: float, tiled: float) -> float:
    """Seconds of ``budget`` (the whole audit) left to training after the ``other`` stages, at least
    :data:`MIN_TRAINING_SHARE` of it; the note that says so."""
    training = max(budget - other, MIN_TRAINING_SHARE * budget)
    whole = f"budget {budget / 60:.1f} min for the whole audit"
    if is_auto(cfg["budget_minutes"]):
        tiles = (f", x{1 + tiled:.2f} for the {tiled:.0%} of the images whose small boxes need tiles" if tiled > 0
                 else "")
        whole += (f" ({cfg['seconds_per_image']} s per image{tiles}, + {cfg.get('seconds_per_box', 0)} s per box; "
                  f"--budget MINUTES)")
    recipe.notes.append(f"{whole}: {other / 60:.1f} min estimated for decoding, the final pass, analysis and report "
                        f"leave {training / 60:.1f} min for training"
                        + ("" if budget - other >= training else
                           f" (at least {MIN_TRAINING_SHARE:.0%} of the budget: the audit will take longer)"))
    return training


def other_stage_seconds(dataset: CocoDataset, config: dict[str, Any], images: int, boxes: int, step_s: float,
                        tile_scale: float) -> float:
    """Seconds of the audit outside training, projected as :mod:`detdiff.plan` projects them: decoding (a sample
    of the images decoded, :func:`detdiff.plan_warmup.run_warmup` without the models), and the final pass,
    analysis and report (:func:`detdiff.plan.after_training_seconds`), the final pass's forward passes at
    :data:`FORWARD_SHARE_OF_STEP` of a timed training step per image, over the whole views and the tiles at
    ``tile_scale``."""
    from detdiff.data.cache_shards import decode_work
    from detdiff.plan import DETECTIONS_PER_BOX, after_training_seconds, cache_options, decode_seconds
    from detdiff.plan_warmup import run_warmup

    size = int(config["data"]["image_size"])
    work = decode_work(dataset, size, bool(config["data"]["reduced_decode"]))
    warm = run_warmup(dataset, config, work, cache_options(config), models=False)
    warm.forward_s_per_image = step_s / int(config["train"]["batch_size"]) * FORWARD_SHARE_OF_STEP
    views = images + tile_count(dataset, size, tile_scale, float(config["recipe"]["min_object_px"]))
    detections = min(DETECTIONS_PER_BOX * boxes, float(config["eval"]["max_detections"]) * images)
    after, _ = after_training_seconds(dataset, config, warm, views, boxes, detections)
    return decode_seconds(warm, work) + sum(after.values())


def tile_reason(dataset: CocoDataset, size: int, cap: float, target: float) -> str:
    """The reason line of ``data.tile_scale = cap`` at view ``size``: tiles, images, and the share of boxes judged."""
    grid, owner = plan_tiles(dataset, size, cap, target)
    if grid.num_tiles == 0:
        return f"{cap:g}: no box is under {target:g} px across in the {size} px view"
    judged = float((logged_view_sides(dataset, size, grid, owner) >= target).mean())
    whole = float((box_view_sides(dataset, size) >= target).mean())
    return (f"{cap:g}: {grid.num_tiles} tiles of {size} px for {len(np.unique(grid.image))} images with boxes under "
            f"{target:g} px in the view, enlarged up to {cap:g}x; {judged:.0%} of the boxes are at least {target:g} px "
            f"across in the view that logs them ({whole:.0%} in whole views alone)")


def _fit_tiles(dataset: CocoDataset, config: dict[str, Any], recipe: Recipe, images: int, detector_budget: float,
               detector_seconds, views: dict[str, int], auto_epochs: bool) -> None:
    """``data.tile_scale``: the largest of ``recipe.max_tile_scale * 0.75^k`` whose tiles fit ``detector_budget``
    (epochs shrinking for them down to ``recipe.min_epochs``), or 0 (module docstring)."""
    cfg, train, data = config["recipe"], config["train"], config["data"]
    size, target = int(data["image_size"]), float(cfg["min_object_px"])
    small = small_boxes(dataset, size, target)
    if not small.any():
        recipe.reasons["data.tile_scale"] = f"0: no box is under {target:g} px across in the {size} px view"
        return
    epochs = int(train["epochs"])
    floor = min(epochs, max(int(cfg["min_epochs"]), math.ceil(epochs / 2))) if auto_epochs else None
    for k in range(12):
        cap = round(float(cfg["max_tile_scale"]) * 0.75 ** k, 3)
        tiles = tile_count(dataset, size, cap, target)
        if tiles == 0:
            break
        views["count"] = images + tiles
        fits = detector_seconds() <= detector_budget
        while not fits and floor is not None and int(train["epochs"]) > floor:
            train["epochs"] = max(floor, int(math.floor(int(train["epochs"]) * 0.9)))
            fits = detector_seconds() <= detector_budget
        if fits:
            data["tile_scale"] = cap
            recipe.reasons["data.tile_scale"] = tile_reason(dataset, size, cap, target)
            if cap < float(cfg["max_tile_scale"]):
                recipe.traded.append(f"data.tile_scale {cfg['max_tile_scale']} -> {cap:g} for the budget")
            if int(train["epochs"]) < epochs:
                recipe.traded.append(f"train.epochs {epochs} -> {train['epochs']} for the tiles")
            return
        train["epochs"] = epochs
    views["count"] = images
    recipe.reasons["data.tile_scale"] = (f"0: tiles for the boxes under {target:g} px in the view do not fit the "
                                         f"detector's share of the budget even at the smallest tile scale tried")
    recipe.traded.append(f"data.tile_scale {cfg['max_tile_scale']} -> 0 for the budget")


def _restate_traded(recipe: Recipe, config: dict[str, Any], dataset: CocoDataset) -> None:
    """Reasons of the settings the budget changed: what was wanted, what is kept, and what that costs."""
    cfg = config["recipe"]
    for key in ("data.image_size", "train.epochs", "crossfit.epochs"):
        trades = [t for t in recipe.traded if t.startswith(key + " ")]
        if not trades:
            continue
        section, name = key.split(".")
        value, wanted = config[section][name], trades[0].split()[1]
        text = f"{value}: reduced from {wanted} to fit the training budget"
        if key == "data.image_size":
            share = float((box_view_sides(dataset, int(value)) >= float(cfg["min_object_px"])).mean())
            text += f"; {share:.0%} of the boxes are at least {cfg['min_object_px']} px across in this view"
        recipe.reasons[key] = text
    keys = list(dict.fromkeys(t.split()[0] for t in recipe.traded))
    firsts = {k: next(t for t in recipe.traded if t.split()[0] == k).split()[1] for k in keys}
    recipe.traded = [f"{k} {firsts[k]} -> {config[k.split('.')[0]][k.split('.')[1]]} for the budget" for k in keys]


def format_recipe(recipe: Recipe) -> str:
    """The recipe as printed before training: one line per setting with its reason, then estimates and trades."""
    lines = ["Recipe (fitted to this dataset; explicit settings are kept):"]
    for key, value in recipe.settings.items():
        shown = f"{len(value)} levels x {len(value[0])} shapes" if key == "model.anchor_shapes" and value else value
        lines.append(f"  {key:<20} {shown}  - {recipe.reasons.get(key, '')}")
    if "detector_training_s" in recipe.estimate:
        total = recipe.estimate["detector_training_s"] + recipe.estimate["crop_models_s"]
        lines.append(f"  estimated training: detector {recipe.estimate['detector_training_s'] / 60:.1f} min, crop models "
                     f"{recipe.estimate['crop_models_s'] / 60:.1f} min, {total / 60:.1f} min in all on this machine "
                     f"(budget {recipe.estimate['budget_s'] / 60:.1f} min, "
                     f"{recipe.estimate.get('training_budget_s', recipe.estimate['budget_s']) / 60:.1f} of it for "
                     f"training)")
    lines += [f"  traded: {t}" for t in recipe.traded]
    lines += [f"  note: {n}" for n in recipe.notes]
    return "\n".join(lines)
