"""Train the small detector on the dataset itself and log its three loss streams every epoch.

The loop is deliberately plain: :func:`train_and_log` sets things up and calls :func:`train_one_epoch` per
epoch; recording is done by hooks (``detdiff.train.hooks``: :class:`LossLogHook`, :class:`CheckpointHook`,
:class:`ProgressHook`), not inside the step (the split of torchvision's ``references/detection`` loop with
detectron2-style hooks).

What is trained on is exactly what is logged: batches are read straight from the image cache's views (each
image's letterboxed whole view, and tiles where small boxes need them: ``detdiff.data.views``), flipped per image and epoch as ``train.flips`` says (``detdiff.train.batches``, which gives the
rationale), and logged boxes are mapped back before they are written.

Reproducibility: ``torch.manual_seed(train.seed)`` before the model is built, the order of each epoch from
``numpy.random.Generator(PCG64([seed, epoch]))``, deterministic torch algorithms on CPU, and a fixed thread
count: the same seed and thread count give identical logged losses. A resumed run loads model, optimizer,
scheduler and RNG states of the last finished epoch and redoes later epochs, so its log equals that of an
uninterrupted run. A time limit (``train.time_limit``, :class:`detdiff.train.hooks.TimeLimitHook`) makes the number
of epochs depend on the machine's pace: a run it cut ends earlier, with its learning-rate schedule re-fitted, and a
resumed run keeps the cut.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from detdiff.config import ConfigError, time_limit_floor, time_limit_seconds
from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import ImageCache
from detdiff.model.detector import Detector
from detdiff.model.losses import LossStreams, compute_loss_streams
from detdiff.train import distributed as ddp
from detdiff.train.batches import Batch, BatchMaker
from detdiff.train.checkpoint import CHECKPOINT_FILE, load_checkpoint, restore_rng_state, unwrap_model
from detdiff.train.hooks import (CheckpointHook, Hook, LossLogHook, ProgressHook, TimeLimitHook, TrainState,
                                 refit_schedule)
from detdiff.train.loss_log import discard_epochs_after
from detdiff.train.optimizer import build_optimizer, warmup_cosine
from detdiff.train.resources import check_room_on_main, checkpoint_bytes, log_bytes, thread_count

LOG_DIR = "log"
#: Config keys that may differ between a run and its resumption: they change speed, not the training log, or act
#: after training (the cross-fit keys its saved folds by its own settings and redoes those they change).
RESUME_FREE_KEYS = {("train", "threads"), ("train", "device"), ("report",), ("analysis",), ("eval",), ("crossfit",)}


class TrainingDiverged(RuntimeError):
    """The training loss became NaN or infinite; finished epochs (log and checkpoint) are kept."""

    def __init__(self, message: str, *, epoch: int, batch: int, image_ids: list[int]) -> None:
        super().__init__(message)
        self.epoch, self.batch, self.image_ids = epoch, batch, image_ids


@dataclass
class TrainResult:
    """What :func:`train_and_log` did. ``data_share`` = share of epoch time spent building batches."""

    epochs_done: int
    seconds: float
    images_per_second: float
    data_share: float
    model: Detector
    resumed_from: int | None = None          # last finished epoch found in the checkpoint, None for a fresh run
    epoch_seconds: list[float] = field(default_factory=list)
    epochs_planned: int = 0                  # train.epochs; more than epochs_done when the time limit cut them
    threads: int = 1
    world_size: int = 1
    device: str = "cpu"


@dataclass
class EpochStats:
    """What :func:`train_one_epoch` did: images trained, seconds in all and seconds spent building batches."""

    images: int
    seconds: float
    data_seconds: float


def _diverged(state: TrainState, batch_number: int, batch: Batch, streams: LossStreams | None,
              what: str) -> TrainingDiverged:
    """The error for a non-finite loss or gradient, naming the batch's images whose streams are not finite."""
    ids = state.dataset.image_ids[batch.image_index]
    if streams is not None:
        bad = ~np.isfinite(np.stack([streams.image[k].detach().cpu().numpy() for k in ("loc_sum", "pos_sum",
                                                                                     "neg_sum")])).all(0)
        if bad.any():
            ids = ids[bad]
    ids = [int(i) for i in ids]
    train = state.config["train"]
    clip = f"keep train.grad_clip on (now {train['grad_clip']})" if train["grad_clip"] else \
        "turn train.grad_clip on (e.g. 10)"
    message = (f"training diverged at epoch {state.epoch}, batch {batch_number}: {what} for image id(s) "
               f"{ids[:20]}{' ...' if len(ids) > 20 else ''}. Lower train.lr (now {train['lr']}), {clip}, and "
               f"check those images' boxes (degenerate or far outside the image?). Finished epochs are kept "
               f"in {state.rundir / LOG_DIR}.")
    return TrainingDiverged(message, epoch=state.epoch, batch=batch_number, image_ids=ids)


def train_one_epoch(state: TrainState, batches: list[np.ndarray], make_batch: BatchMaker,
                    hooks: list[Hook]) -> EpochStats:
    """One pass over this process's ``batches`` (arrays of dataset image rows): forward, loss streams, step.

    Raises :class:`TrainingDiverged` (on every rank at the same step) when the loss or the gradient is not finite.
    """
    cfg = state.config
    grad_clip = float(cfg["train"]["grad_clip"] or 0.0)
    model, detector = state.model, unwrap_model(state.model)
    model.train()
    for hook in hooks:
        hook.before_epoch(state)
    start, data_seconds, images = time.perf_counter(), 0.0, 0
    for number, index in enumerate(batches):
        t0 = time.perf_counter()
        batch = make_batch(index)
        data_seconds += time.perf_counter() - t0
        outputs = model(batch.images)
        streams = compute_loss_streams(outputs, detector.anchors, batch.targets, cfg["loss"], cfg["log"],
                                       grid=detector.anchor_grid)
        if not ddp.all_true(bool(torch.isfinite(streams.total)), state.info):
            raise _diverged(state, number, batch, streams, "the loss is not finite")
        state.optimizer.zero_grad(set_to_none=True)
        streams.total.backward()
        if grad_clip > 0:
            grad_norm = nn.utils.clip_grad_norm_(model.parameters(), grad_clip)
            if not torch.isfinite(grad_norm):
                raise _diverged(state, number, batch, None, "the gradient is not finite")
        state.optimizer.step()
        state.scheduler.step()
        state.step += 1
        images += len(index)
        for hook in hooks:
            hook.after_step(state, batch, streams)
    for hook in hooks:
        hook.after_epoch(state)
    return EpochStats(images, time.perf_counter() - start, data_seconds)


def _dataset_key(dataset: CocoDataset, usable: np.ndarray) -> dict[str, Any]:
    """What a checkpoint must have been trained on to be resumed: the same records and usable images."""
    digest = hashlib.sha256()
    for arr in (dataset.image_ids, dataset.ann_ids, dataset.labels, dataset.boxes, usable):
        digest.update(np.ascontiguousarray(arr).tobytes())
    return {"num_images": int(dataset.num_images), "num_annotations": int(dataset.num_annotations),
            "num_usable": int(len(usable)), "sha256": digest.hexdigest()}


def _config_differences(saved: dict[str, Any], current: dict[str, Any], path: tuple[str, ...] = ()) -> list[str]:
    """Dotted keys whose values differ, except those in :data:`RESUME_FREE_KEYS`."""
    if any(path[:len(free)] == free for free in RESUME_FREE_KEYS):
        return []
    if isinstance(saved, dict) and isinstance(current, dict):
        return [d for k in sorted(set(saved) | set(current))
                for d in _config_differences(saved.get(k), current.get(k), path + (k,))]
    return [] if saved == current else [".".join(path)]


def train_and_log(dataset: CocoDataset, cache: ImageCache, config: dict[str, Any], rundir: str | Path, *,
                  resume: bool = False, progress: bool = True) -> TrainResult:
    """Train the detector on the usable images of ``cache`` and write ``RUNDIR/log`` and ``RUNDIR/checkpoint.pt``.

    ``resume=True`` continues from the checkpoint (its later log epochs are discarded and redone); without a
    checkpoint it starts afresh. A fresh run removes an earlier log and checkpoint in ``rundir``.
    Launched by torchrun, every process trains its share of each epoch (DDP) and rank 0 merges the log.
    Raises :class:`TrainingDiverged` on a non-finite loss, ``InsufficientSpaceError`` before training when
    ``rundir`` is not writable or lacks room.
    """
    rundir = Path(rundir)
    train_cfg = config["train"]
    info = ddp.init_distributed(str(train_cfg["device"]))
    if cache.num_images != dataset.num_images:
        raise ValueError(f"{cache.cache_dir}: the image cache holds {cache.num_images} images but the dataset "
                         f"{dataset.ann_path or ''} has {dataset.num_images}; rebuild the cache")
    usable = cache.usable_indices
    if len(usable) == 0:
        raise ValueError(f"no usable image to train on ({len(cache.problems)} problem(s) listed in "
                         f"{cache.cache_dir / 'problems.json'})")
    threads = thread_count(train_cfg)
    saved_threads = torch.get_num_threads()
    saved_deterministic = (torch.are_deterministic_algorithms_enabled(),
                           torch.is_deterministic_algorithms_warn_only_enabled())
    torch.set_num_threads(threads)
    if info.device.type == "cpu":
        torch.use_deterministic_algorithms(True, warn_only=True)
    try:
        return _train(dataset, cache, config, rundir, info, usable, threads, resume, progress)
    finally:
        torch.set_num_threads(saved_threads)
        torch.use_deterministic_algorithms(saved_deterministic[0], warn_only=saved_deterministic[1])


def _train(dataset: CocoDataset, cache: ImageCache, config: dict[str, Any], rundir: Path, info: ddp.DistInfo,
           usable: np.ndarray, threads: int, resume: bool, progress: bool) -> TrainResult:
    train_cfg = config["train"]
    seed, epochs, batch_size = int(train_cfg["seed"]), int(train_cfg["epochs"]), int(train_cfg["batch_size"])
    torch.manual_seed(seed)
    np.random.seed(seed)
    model = Detector.from_config(config["model"], dataset.num_classes, cache.image_size,
                                 precision=str(train_cfg.get("precision", "float32")))
    check_room_on_main(rundir, log_bytes(dataset, config) + checkpoint_bytes(model), info)
    ckpt_path, log_dir = rundir / CHECKPOINT_FILE, rundir / LOG_DIR
    model = model.to(info.device)
    optimizer = build_optimizer(model, train_cfg)
    make_batch = BatchMaker(dataset, cache, info.device, flips=str(train_cfg["flips"]), seed=seed)
    views = make_batch.usable_views                  # whole views of the usable images, then their tiles
    steps = ddp.steps_per_epoch(len(views), batch_size, info.world_size)
    scheduler = torch.optim.lr_scheduler.LambdaLR(
        optimizer, warmup_cosine(int(train_cfg["warmup_iters"]), steps * epochs))
    dataset_key = _dataset_key(dataset, usable)

    start_epoch, resumed_from, seconds, cut_from = 0, None, 0.0, None
    if resume and ckpt_path.is_file():
        payload = load_checkpoint(ckpt_path, map_location=info.device)
        if payload["extra"].get("dataset") != dataset_key:
            raise ConfigError(f"{ckpt_path}: the checkpoint was trained on other data (saved "
                             f"{payload['extra'].get('dataset')}, now {dataset_key}: images, annotations or "
                             f"usable images differ); train afresh without resume")
        differences = _config_differences(payload["config"], config)
        if differences:
            raise ConfigError(f"{ckpt_path}: cannot resume with a different config ({', '.join(differences)} "
                             f"changed); the log would not equal one run. Use the saved config or train afresh")
        model.load_state_dict(payload["model"])
        optimizer.load_state_dict(payload["optimizer"])
        scheduler.load_state_dict(payload["scheduler"])
        restore_rng_state(payload["rng"])
        resumed_from = int(payload["epoch"])
        start_epoch = resumed_from + 1
        seconds = float(payload["extra"].get("train_seconds", 0.0))
        cut = payload["extra"].get("time_limit_cut")
        if cut and int(cut["from"]) == epochs:              # the time limit's cut stands (not a longer --epochs)
            cut_from, epochs = epochs, int(cut["to"])
            refit_schedule(scheduler, int(train_cfg["warmup_iters"]), steps * epochs)
    if info.is_main:
        discard_epochs_after(log_dir, start_epoch - 1)
        if resumed_from is None:
            ckpt_path.unlink(missing_ok=True)
    ddp.barrier()

    wrapped = ddp.wrap_model(model, info)
    state = TrainState(config, rundir, dataset, info, wrapped, optimizer, scheduler, step=start_epoch * steps,
                       epochs=epochs, seconds=seconds, cut_from=cut_from)
    hooks: list[Hook] = [LossLogHook(log_dir, dataset, info, config["log"]["unmatched_per_image"])]
    limit = time_limit_seconds(config)
    if limit is not None:
        hooks.append(TimeLimitHook(limit, time_limit_floor(config), int(train_cfg["warmup_iters"])))
    hooks.append(CheckpointHook(ckpt_path, {"dataset": dataset_key}))
    if progress and info.is_main:
        hooks.append(ProgressHook())

    epoch_seconds, data_seconds, images = [], 0.0, 0
    epoch = start_epoch
    while epoch < state.epochs:
        order = ddp.epoch_order(views, seed, epoch)
        batches = ddp.rank_batches(order, batch_size, info.rank, info.world_size)
        make_batch.set_epoch(epoch)
        state.epoch, state.batches_in_epoch = epoch, len(batches)
        state.images_in_epoch = int(sum(len(b) for b in batches))
        try:
            stats = train_one_epoch(state, batches, make_batch, hooks)
        except BaseException:
            for hook in hooks:
                hook.on_error(state)
            raise
        epoch_seconds.append(stats.seconds)
        data_seconds += stats.data_seconds
        images += len(order)
        epoch += 1
    ddp.barrier()
    total = float(sum(epoch_seconds))
    return TrainResult(epochs_done=state.epochs, seconds=total, images_per_second=images / total if total else 0.0,
                       data_share=data_seconds / total if total else 0.0, model=model.eval(),
                       resumed_from=resumed_from, epoch_seconds=epoch_seconds,
                       epochs_planned=state.cut_from or state.epochs, threads=threads,
                       world_size=info.world_size, device=str(info.device))
