"""The plan's warm-up: a few seconds of the audit's own work on a sample of the dataset, timed on this machine.

A spread sample of the dataset's real files (:data:`SAMPLE_IMAGES`, chosen across the range of
:func:`detdiff.data.cache_shards.decode_work`) is built into a throw-away image cache by the same
:func:`detdiff.data.image_cache.build_image_cache` the audit runs (decode, letterbox, pixel descriptors, object
crops, reduced JPEG decoding as configured; one OpenCV thread, as in a decode worker), after one untimed image that
loads the codecs. That sample cache then feeds real steps of the audit's models, each timed as the median of
:data:`detdiff.recipe.TIMED_STEPS` calls after one warm-up call: a detector training step as the training loop
takes it (batch from the cache with its flips, loss streams, AdamW step with gradient clipping, the loss-log
writes), the detector's eval-mode forward with detection decoding (the final pass), a crop-model step as a fold
takes it (:func:`detdiff.crossfit.folds.crop_work`: rows drawn at random, windows resampled from the stored crops,
flips, step) and a crop-model prediction (every test window, with the mirror where flips allow). The median, as the
recipe times its steps: the fastest of three, used before, under-projected the crop models by 1.10-1.34x on the
validity audits (aerial: 0.045 s timed, about 0.064 s per step in the audit); the median still ignores a short busy
spell that slows one or two of the calls (on a machine another job keeps busy for a while, a step took anything
from 1x to 10x its quiet time). The projection is therefore for this machine as it typically runs, not through a
long spell of other work. Nothing is written in the run folder; the sample lives in a temporary folder removed at
the end.
"""

from __future__ import annotations

import contextlib
import io
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np
import torch
from torch import nn

from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import ImageCache, build_image_cache
from detdiff.recipe import crop_seconds, time_calls

#: Images decoded in the warm-up (fewer when the dataset has fewer).
SAMPLE_IMAGES = 12


@dataclass
class Warmup:
    """What the warm-up measured. ``decode_s_per_work``: seconds per unit of :func:`decode_work` in one process;
    ``*_step_s`` / ``*_s_per_*``: seconds; ``activation_bytes``: tensors a training step keeps for its backward
    pass; ``param_bytes``: the detector's weights; ``feature_channels``: width of its pooled object features."""

    sample_images: int
    decode_seconds: float
    decode_s_per_work: float
    decode_s_per_image: float
    detector_step_s: float | None = None
    forward_s_per_image: float | None = None
    checkpoint_s: float = 0.0
    crop_step_s: float | None = None
    predict_s_per_row: float | None = None
    activation_bytes: int = 0
    param_bytes: int = 0
    checkpoint_bytes: int = 0
    feature_channels: int = 0
    encoded_view_bytes: float = 0.0     # codec jpeg: mean bytes of a stored whole view or tile row (0: raw rows)
    encoded_crop_bytes: float = 0.0     # codec jpeg: mean bytes of a stored crop row

    def to_json(self) -> dict[str, Any]:
        return {k: (float(f"{v:.4g}") if isinstance(v, float) else v) for k, v in vars(self).items()}


def sample_rows(work: np.ndarray, count: int = SAMPLE_IMAGES) -> np.ndarray:
    """Up to ``count`` image rows spread evenly over the sorted decode work (smallest and largest included)."""
    order = np.argsort(work, kind="stable")
    if len(order) == 0:
        return order.astype(np.int64)
    return np.unique(order[np.linspace(0, len(order) - 1, min(count, len(order))).round().astype(np.int64)])


def _typical_seconds(step: Callable[[], None], sync: Callable[[], None]) -> float:
    """Seconds of ``step`` (then ``sync``), timed as the recipe times its steps (:func:`detdiff.recipe.time_calls`:
    the median of :data:`detdiff.recipe.TIMED_STEPS` calls after one untimed call)."""
    def synced() -> None:
        step()
        sync()

    return time_calls(synced)[0]


def _time_decode(dataset: CocoDataset, config: dict[str, Any], rows: np.ndarray, options: dict[str, Any],
                 tmp: Path) -> tuple[CocoDataset, ImageCache, float]:
    """Build the sample cache (after one untimed image) and return it with the seconds it took."""
    size = int(config["data"]["image_size"])
    threads = cv2.getNumThreads()
    cv2.setNumThreads(1)                        # as in a decode worker
    try:
        build_image_cache(dataset.subset_images(rows[:1]), tmp / "first", size, progress=False, workers=1,
                          **options)
        sub = dataset.subset_images(rows)
        start = time.perf_counter()
        cache = build_image_cache(sub, tmp / "sample", size, progress=False, workers=1, **options)
        seconds = time.perf_counter() - start
    finally:
        cv2.setNumThreads(threads)
    return sub, cache, seconds


def _time_detector(sub: CocoDataset, cache: ImageCache, config: dict[str, Any], warm: Warmup, tmp: Path) -> None:
    """Time a detector training step and an eval-mode forward on the sample cache; measure what a step keeps."""
    from detdiff.model.detector import Detector
    from detdiff.model.losses import compute_loss_streams
    from detdiff.model.postprocess import postprocess_detections
    from detdiff.train import distributed as ddp
    from detdiff.train.batches import BatchMaker
    from detdiff.train.checkpoint import capture_rng_state
    from detdiff.train.hooks import LossLogHook
    from detdiff.train.optimizer import build_optimizer
    from detdiff.train.resources import checkpoint_bytes

    train = config["train"]
    device = ddp.resolve_device(str(train["device"]))
    sync = ddp.synchronizer(device)
    batch_size, clip = int(train["batch_size"]), float(train["grad_clip"] or 0.0)
    index = np.resize(cache.usable_indices, batch_size)
    model = Detector.from_config({**config["model"], "weights": None}, sub.num_classes, cache.image_size,
                                 precision=str(train.get("precision", "float32"))).to(device)
    optimizer = build_optimizer(model, train)
    maker = BatchMaker(sub, cache, device, flips=str(train["flips"]), seed=int(train["seed"]))
    maker.set_epoch(0)
    hook = LossLogHook(tmp / "log", sub, ddp.DistInfo(0, 1, 0, True, device), int(config["log"]["unmatched_per_image"]))
    hook.writer.reset(0)
    saved: dict[int, int] = {}                  # storages kept for the backward pass of the first step

    def keep(tensor: torch.Tensor) -> torch.Tensor:
        storage = tensor.untyped_storage()
        saved[storage.data_ptr()] = storage.nbytes()
        return tensor

    def train_step(measure_memory: bool = False) -> None:
        batch = maker(index)
        with (torch.autograd.graph.saved_tensors_hooks(keep, lambda t: t) if measure_memory
              else contextlib.nullcontext()):
            streams = compute_loss_streams(model(batch.images), model.anchors, batch.targets, config["loss"],
                                           config["log"], grid=model.anchor_grid)
        optimizer.zero_grad(set_to_none=True)
        streams.total.backward()
        if clip > 0:
            nn.utils.clip_grad_norm_(model.parameters(), clip)
        optimizer.step()
        hook.after_step(None, batch, streams)

    model.train()
    train_step(measure_memory=True)             # untimed: any saved-tensor hook, even one that returns its
    warm.detector_step_s = _typical_seconds(train_step, sync)    # tensor, doubled a bfloat16 step (0.16 -> 0.31 s)
    warm.activation_bytes = int(sum(saved.values()))
    warm.param_bytes = int(sum(p.numel() * p.element_size() for p in model.parameters()))
    warm.checkpoint_bytes = checkpoint_bytes(model)
    start = time.perf_counter()
    torch.save({"model": model.state_dict(), "optimizer": optimizer.state_dict(), "rng": capture_rng_state()},
               io.BytesIO())
    warm.checkpoint_s = time.perf_counter() - start
    eval_cfg = config["eval"]
    pixels = maker(np.resize(cache.usable_indices, 2 * batch_size)).images
    model.eval()
    outputs: dict[str, Any] = {}

    @torch.no_grad()
    def forward() -> None:
        outputs.update(model(pixels))
        postprocess_detections(outputs, model.anchors, score_threshold=eval_cfg["score_threshold"],
                               max_detections=int(eval_cfg["max_detections"]),
                               box_variances=config["loss"]["box_variances"], image_size=cache.image_size)

    warm.forward_s_per_image = _typical_seconds(forward, sync) / len(pixels)
    warm.feature_channels = int(outputs["features"][0].shape[1])


def _time_crop_model(sub: CocoDataset, cache: ImageCache, config: dict[str, Any], warm: Warmup) -> None:
    """Time a crop-model training step and a prediction per row on the sample's stored crops, as a fold does them
    (:func:`detdiff.crossfit.folds.crop_work`)."""
    from detdiff.crossfit import crop_model as cm
    from detdiff.crossfit.folds import CropRows, reference_boxes, to_reference_units

    cfg = config["crossfit"]
    rows = np.flatnonzero(~sub.iscrowd & cache.usable[sub.ann_image_index])
    if not len(rows) or cache.crops is None:
        return
    image = sub.ann_image_index[rows]
    boxes = sub.boxes[rows]
    geometry = cm.geometry_raw(boxes, sub.widths[image].astype(np.float64), sub.heights[image].astype(np.float64))
    crop_rows = CropRows(cache.crops[rows], to_reference_units(boxes, reference_boxes(boxes)),
                         geometry.astype(np.float32), sub.labels[rows], int(cfg["input_size"]))
    warm.crop_step_s, warm.predict_s_per_row = crop_seconds(crop_rows, sub.num_classes, cfg,
                                                            str(config["train"]["flips"]))


def run_warmup(dataset: CocoDataset, config: dict[str, Any], work: np.ndarray, options: dict[str, Any], *,
               models: bool = True) -> Warmup:
    """Decode the sample and time the models' steps on it (module docstring), with the training thread count
    (``models=False``: the decoding only, as the recipe needs it to set the training's share of the budget)."""
    from detdiff.train.resources import thread_count

    rows = sample_rows(work)
    state, threads = torch.random.get_rng_state(), torch.get_num_threads()
    torch.set_num_threads(thread_count(config["train"]))
    try:
        torch.manual_seed(0)
        with tempfile.TemporaryDirectory(prefix="detdiff-plan-") as tmp:
            sub, cache, seconds = _time_decode(dataset, config, rows, options, Path(tmp))
            warm = Warmup(len(rows), seconds, seconds / max(float(work[rows].sum()), 1.0),
                          seconds / max(len(rows), 1))
            if cache.codec != "raw":
                warm.encoded_view_bytes = ((cache.images.nbytes + (cache.tiles.nbytes if cache.tiles is not None
                                                                   else 0)) / max(cache.num_images + cache.num_tiles, 1))
                if cache.crops is not None and len(cache.crops):
                    warm.encoded_crop_bytes = cache.crops.nbytes / len(cache.crops)
            if models and cache.usable.any():
                _time_detector(sub, cache, config, warm, Path(tmp))
                if options["with_crops"]:
                    _time_crop_model(sub, cache, config, warm)
            del cache
    finally:
        torch.random.set_rng_state(state)
        torch.set_num_threads(threads)
    return warm
