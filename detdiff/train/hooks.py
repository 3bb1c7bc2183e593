"""Hooks: the side effects of training (the loss log, the time limit, the checkpoint, the progress bar), kept out of
the step.

:func:`detdiff.train.loop.train_one_epoch` computes; each :class:`Hook` is called before an epoch, after every
optimizer step, after an epoch and on an error, with the :class:`TrainState` it may look at (the split of
torchvision's ``references/detection`` loop with detectron2-style hooks).
"""

from __future__ import annotations

import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from tqdm import tqdm

from detdiff.boxes import parts_of_boxes
from detdiff.data.coco import CocoDataset
from detdiff.model.losses import LossStreams
from detdiff.train import distributed as ddp
from detdiff.train.batches import Batch
from detdiff.train.checkpoint import save_checkpoint
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLogWriter, epoch_dir, merge_rank_epochs
from detdiff.train.optimizer import warmup_cosine


@dataclass
class TrainState:
    """Everything a hook may look at; ``epoch`` is 0-based, ``step`` counts optimizer steps of the run, ``epochs`` is
    the run's number of epochs (lowered by :class:`TimeLimitHook` when the time limit cuts it), ``seconds`` the
    training seconds so far as that hook counts them (0 without a time limit; earlier sessions of a resumed run
    included, where the checkpoint kept them)."""

    config: dict[str, Any]
    rundir: Path
    dataset: CocoDataset
    info: ddp.DistInfo
    model: nn.Module
    optimizer: torch.optim.Optimizer
    scheduler: torch.optim.lr_scheduler.LRScheduler
    epoch: int = 0
    step: int = 0
    batches_in_epoch: int = 0
    images_in_epoch: int = 0
    epochs: int = 0
    seconds: float = 0.0
    cut_from: int | None = None                  # the planned epochs, once the time limit lowered them


class Hook:
    """Side effects of training; the step computes, hooks record. All methods are optional."""

    def before_epoch(self, state: TrainState) -> None: ...

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None: ...

    def after_epoch(self, state: TrainState) -> None: ...

    def on_error(self, state: TrainState) -> None: ...


def _xyxy_view_to_xywh_orig(boxes: torch.Tensor, scale: np.ndarray, origin: np.ndarray | None = None) -> np.ndarray:
    """``[n, 4]`` xyxy view px -> ``[n, 4]`` xywh original px (divide by each row's ``scale [n]``, add its view's
    ``origin [n, 2]``)."""
    b = boxes.detach().float().cpu().numpy() / np.asarray(scale, np.float64)[:, None]
    if origin is not None:
        b = b + np.tile(origin, 2)
    return np.concatenate([b[:, :2], b[:, 2:] - b[:, :2]], axis=1).astype(np.float32)


class LossLogHook(Hook):
    """Writes every step's per-image / per-object records through :class:`LossLogWriter`; one folder per epoch.

    With several processes each rank writes ``epoch_XXXX.rank<k>/`` and rank 0 merges them after a barrier.
    """

    def __init__(self, log_dir: Path, dataset: CocoDataset, info: ddp.DistInfo, unmatched_per_image: int) -> None:
        self.log_dir, self.info, self.num_images = log_dir, info, dataset.num_images
        self.ann_xyxy, self.image_offsets = dataset.boxes_xyxy(), dataset.image_offsets
        # only training targets hold parts: the missing-box probes (crowd in the training copy) must be seen in tiles
        # as an unannotated object is, or they under-read the missing-box evidence (seen in half the late epochs:
        # 7% of the probes against 20% of the planted missing boxes on digits seed 1, 1,346 tiles)
        self.ann_xyxy[dataset.iscrowd] = 0.0
        self.writer = LossLogWriter(log_dir, dataset.num_images, dataset.num_annotations,
                                    rank=info.rank if info.distributed else None,
                                    unmatched_capacity=max(1, int(unmatched_per_image)) * dataset.num_images)

    def before_epoch(self, state: TrainState) -> None:
        self.writer.reset(state.epoch)

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None:
        image = {k: streams.image[k].detach().cpu().numpy() for k in IMAGE_FIELDS}
        objects = {k: streams.objects[k].detach().cpu().numpy() for k in OBJECT_FIELDS if k != "pred_box"}
        objects["pred_box"] = _xyxy_view_to_xywh_orig(batch.unflip(streams.objects["pred_box"], batch.object_flips),
                                                      batch.object_scale, batch.object_origin)
        object_index = batch.object_index
        if batch.object_logged is not None and not batch.object_logged.all():
            logged = batch.object_logged                  # only the owner view logs an annotation
            objects = {k: v[logged] for k, v in objects.items()}
            object_index = object_index[logged]
        um = streams.unmatched
        where = um["batch_index"].cpu().numpy()
        unmatched = {"image_index": batch.image_index[where],
                     "box": _xyxy_view_to_xywh_orig(
                         batch.unflip(um["box"], None if batch.flips is None else batch.flips[where]),
                         batch.image_scale[where], None if batch.image_origin is None else batch.image_origin[where]),
                     "score": um["score"].cpu().numpy(), "label": um["label"].cpu().numpy()}
        if batch.view_index is not None:
            tile = batch.view_index[where] >= self.num_images
            if tile.any():
                part = np.zeros(len(where), dtype=bool)
                part[tile] = parts_of_boxes(self.ann_xyxy, self.image_offsets, unmatched["image_index"][tile],
                                             unmatched["box"][tile].astype(np.float64))
                unmatched = {k: v[~part] for k, v in unmatched.items()}
        self.writer.process(batch.image_index, image, object_index, objects, unmatched)

    def after_epoch(self, state: TrainState) -> None:
        self.writer.finalize()
        if self.info.distributed:
            ddp.barrier()
            if self.info.is_main:
                merge_rank_epochs(self.log_dir, state.epoch, self.info.world_size)
            ddp.barrier()

    def on_error(self, state: TrainState) -> None:
        rank = self.info.rank if self.info.distributed else None
        shutil.rmtree(f"{epoch_dir(self.log_dir, state.epoch, rank)}.tmp-{os.getpid()}", ignore_errors=True)


def epochs_within(limit_s: float, seconds: float, done: int, planned: int, floor: int) -> int:
    """The epochs a run may have in all to end within ``limit_s`` seconds of training: the ``done`` epochs took
    ``seconds``; at their mean pace as many more as fit, never fewer than ``floor`` (nor ``done``), never more than
    ``planned``."""
    if done <= 0:
        return planned
    pace = seconds / done
    more = int(max(0.0, limit_s - seconds) // pace) if pace > 0 else planned
    return int(min(planned, max(done, floor, done + more)))


class TimeLimitHook(Hook):
    """Keeps the detector's training within ``limit_s`` seconds (``train.time_limit``: the detector's share of the
    audit's budget) when its epochs run slower than the recipe timed them: after each epoch, the epochs that still
    fit at the pace so far (:func:`epochs_within`, not under ``floor``); when fewer than planned, ``state.epochs``
    is lowered and the warm-up + cosine schedule is re-fitted to end at the new last step, so the learning rate
    still decays to its final share (it steps down to where the shorter schedule is). Runs after the loss log's
    ``after_epoch`` and before the checkpoint's, which saves the cut. Every rank takes rank 0's decision."""

    def __init__(self, limit_s: float, floor: int, warmup_steps: int) -> None:
        self.limit_s, self.floor, self.warmup_steps = float(limit_s), int(floor), int(warmup_steps)
        self.start = 0.0

    def before_epoch(self, state: TrainState) -> None:
        self.start = time.perf_counter()

    def after_epoch(self, state: TrainState) -> None:
        state.seconds += time.perf_counter() - self.start
        epochs = int(ddp.broadcast_object(
            epochs_within(self.limit_s, state.seconds, state.epoch + 1, state.epochs, self.floor), state.info))
        if epochs < state.epochs:
            state.cut_from = state.cut_from or state.epochs
            state.epochs = epochs
            refit_schedule(state.scheduler, self.warmup_steps, state.batches_in_epoch * epochs)


def refit_schedule(scheduler: torch.optim.lr_scheduler.LambdaLR, warmup_steps: int, total_steps: int) -> None:
    """Point ``scheduler`` (every parameter group) at the warm-up + cosine schedule of ``total_steps`` steps, and
    set the groups' learning rates to its value at the current step."""
    scheduler.lr_lambdas = [warmup_cosine(warmup_steps, total_steps) for _ in scheduler.optimizer.param_groups]
    for group, base, factor in zip(scheduler.optimizer.param_groups, scheduler.base_lrs, scheduler.lr_lambdas):
        group["lr"] = base * factor(scheduler.last_epoch)


class CheckpointHook(Hook):
    """Saves ``RUNDIR/checkpoint.pt`` on rank 0 after every epoch, once that epoch's log is in place, with the
    training seconds so far and any cut of the epochs by the time limit (a resumed run keeps both)."""

    def __init__(self, path: Path, extra: dict[str, Any]) -> None:
        self.path, self.extra = path, extra

    def after_epoch(self, state: TrainState) -> None:
        if state.info.is_main:
            cut = {} if state.cut_from is None else {"time_limit_cut": {"from": state.cut_from, "to": state.epochs}}
            save_checkpoint(self.path, model=state.model, optimizer=state.optimizer, scheduler=state.scheduler,
                            epoch=state.epoch, config=state.config,
                            extra={**self.extra, "train_seconds": state.seconds, **cut})


class ProgressHook(Hook):
    """A tqdm bar per epoch with images/s and the running mean of the three streams (per image, / num_pos).

    The rate is tqdm's own, averaged over the epoch so far (``smoothing=0``); the postfix holds the losses only.
    """

    def __init__(self) -> None:
        self.bar: tqdm | None = None
        self.sums = np.zeros(3)
        self.seen = 0

    def before_epoch(self, state: TrainState) -> None:
        self.bar = tqdm(total=state.images_in_epoch, unit="view", leave=False, smoothing=0,
                        desc=f"epoch {state.epoch + 1}/{state.epochs}")
        self.sums[:] = 0.0
        self.seen = 0

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None:
        norm = streams.image["num_pos"].clamp(min=1).float()
        per_image = torch.stack([streams.image[k] / norm for k in ("loc_sum", "pos_sum", "neg_sum")])
        self.sums += per_image.sum(1).cpu().numpy()
        self.seen += len(batch.image_index)
        loc, pos, neg = self.sums / max(1, self.seen)
        self.bar.set_postfix_str(f"loc {loc:.3f}  pos {pos:.3f}  neg {neg:.3f}", refresh=False)
        self.bar.update(len(batch.image_index))

    def after_epoch(self, state: TrainState) -> None:
        self.close()

    def on_error(self, state: TrainState) -> None:
        self.close()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
