"""Train the small detector on the dataset itself and log its three loss streams every epoch.

The loop is deliberately plain: :func:`train_and_log` sets things up and calls :func:`train_one_epoch` per
epoch; recording is done by hooks (:class:`LossLogHook`, :class:`CheckpointHook`, :class:`ProgressHook`),
not inside the step (the split of torchvision's ``references/detection`` loop with detectron2-style hooks).

What is trained on is exactly what is logged: batches are read straight from the image cache's letterbox
view (``detdiff.data.image_cache``). The only augmentation is flipping (``train.flips``: none, horizontal,
both axes, or ``dihedral``: both axes and the transpose), drawn per image and epoch from the seed; each maps
the square view and its anchor grid onto themselves, so an object's losses stay comparable across epochs,
and logged boxes are mapped back before they are written. Flips halve (down to an eighth of) how often the
detector sees the identical view, which slows its memorising of wrong labels: on the demo's planted wrong
classes they raised the accumulated positive-class AUROC (issue notes).

Reproducibility: ``torch.manual_seed(train.seed)`` before the model is built, the order of each epoch from
``numpy.random.Generator(PCG64([seed, epoch]))``, deterministic torch algorithms on CPU, and a fixed thread
count: the same seed and thread count give identical logged losses. A resumed run loads model, optimizer,
scheduler and RNG states of the last finished epoch and redoes later epochs, so its log equals that of an
uninterrupted run.
"""

from __future__ import annotations

import hashlib
import math
import os
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from tqdm import tqdm

from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import ImageCache, InsufficientSpaceError, check_folder_room
from detdiff.model.detector import Detector
from detdiff.model.losses import LossStreams, compute_loss_streams
from detdiff.train import distributed as ddp
from detdiff.train.checkpoint import (CHECKPOINT_FILE, load_checkpoint, restore_rng_state, save_checkpoint,
                                      unwrap_model)
from detdiff.train.loss_log import (IMAGE_FIELDS, OBJECT_FIELDS, UNMATCHED_FIELDS, LossLogWriter,
                                    discard_epochs_after, epoch_dir, merge_rank_epochs)

LOG_DIR = "log"
#: Config keys that may differ between a run and its resumption (they change speed, not results).
RESUME_FREE_KEYS = {("train", "threads"), ("train", "device"), ("report",), ("analysis",), ("eval",)}
#: The cosine schedule decays to this share of train.lr.
FINAL_LR_FACTOR = 0.05


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
    threads: int = 1
    world_size: int = 1
    device: str = "cpu"


@dataclass
class Batch:
    """One training batch from the cache; ``object_index`` are dataset annotation rows of the targets, in order."""

    image_index: np.ndarray                  # int64 [B] dataset image rows
    images: torch.Tensor                     # float32 [B, 3, S, S] in 0..1
    targets: list[dict[str, torch.Tensor]]   # per image {"boxes": [n_b, 4] xyxy view px, "labels": int64 [n_b]}
    object_index: np.ndarray                 # int64 [T] = concatenation of the images' non-crowd annotation rows
    image_scale: np.ndarray                  # float64 [B] view px per original px
    object_scale: np.ndarray                 # float64 [T] scale of each target's image
    flips: np.ndarray | None = None          # bool [B, 3] (horizontal, vertical, transpose) applied to each view
    object_flips: np.ndarray | None = None   # bool [T, 3] flips of each target's image

    def unflip(self, boxes: torch.Tensor, flips: np.ndarray | None) -> torch.Tensor:
        """``[n, 4]`` xyxy boxes on the flipped views -> boxes on the cache's views (``flips [n, 3]``)."""
        if flips is None or not flips.any():
            return boxes
        return flip_view_boxes(boxes, torch.from_numpy(flips).to(boxes.device), self.images.shape[-1], inverse=True)


#: ``train.flips`` -> which of (horizontal flip, vertical flip, transpose) may be drawn. ``dihedral`` adds the
#: transpose (x <-> y) to both flips: the eight rotations and reflections of a square view.
FLIP_MODES = {"none": (False, False, False), "horizontal": (True, False, False), "both": (True, True, False),
              "dihedral": (True, True, True)}


def flip_view_boxes(boxes: torch.Tensor, flips: torch.Tensor, size: int, *, inverse: bool = False) -> torch.Tensor:
    """Map ``[n, 4]`` xyxy boxes of an ``S x S`` view onto its flipped view, ``flips [n, 3]`` = (horizontal,
    vertical, transpose).

    The view is transposed first (x <-> y), then mirrored; ``inverse=True`` undoes that (mirror, then
    transpose). Without a transpose the map is its own inverse.
    """
    def mirror(b: torch.Tensor) -> torch.Tensor:
        x1, y1, x2, y2 = b.unbind(-1)
        h, v = flips[:, 0], flips[:, 1]
        return torch.stack([torch.where(h, size - x2, x1), torch.where(v, size - y2, y1),
                            torch.where(h, size - x1, x2), torch.where(v, size - y1, y2)], dim=-1)

    def transpose(b: torch.Tensor) -> torch.Tensor:
        return torch.where(flips[:, 2:3], b[:, [1, 0, 3, 2]], b)

    return transpose(mirror(boxes)) if inverse else mirror(transpose(boxes))


class BatchMaker:
    """Builds :class:`Batch` es from the memmap: index, ``torch.from_numpy``, permute, ``/ 255``; no decode.

    Targets are the non-crowd annotations of each image, boxes ``xywh original -> xyxy view = xyxy * scale``.
    ``flips`` (a :data:`FLIP_MODES` key): each allowed axis is flipped (and the view transposed) with
    probability 1/2 per image, drawn by :meth:`set_epoch` from ``PCG64([seed, epoch, 1])`` (flips) and
    ``PCG64([seed, epoch, 2])`` (transpose) for all images at once, so the draw does not depend on batch
    order, rank or resumption, and ``both`` draws the same flips as before the transpose existed.
    """

    def __init__(self, dataset: CocoDataset, cache: ImageCache, device: torch.device, *,
                 flips: str = "none", seed: int = 0) -> None:
        if flips not in FLIP_MODES:
            raise ValueError(f"train.flips must be one of {', '.join(FLIP_MODES)}, got {flips!r}")
        self.allowed = np.array(FLIP_MODES[flips])
        self.seed, self.epoch_flips = seed, None
        self.cache, self.device = cache, device
        self.train_rows = np.flatnonzero(~dataset.iscrowd).astype(np.int64)           # [T_all] sorted by image
        owner = dataset.ann_image_index[self.train_rows]
        self.offsets = np.concatenate([[0], np.cumsum(np.bincount(owner, minlength=dataset.num_images))])
        scale = cache.scale[dataset.ann_image_index]                                 # [A]
        self.view_boxes = (dataset.boxes_xyxy() * scale[:, None]).astype(np.float32)  # [A, 4]
        self.labels = dataset.labels.astype(np.int64)

    def set_epoch(self, epoch: int) -> None:
        """Draw this epoch's flips of every image (no-op without flips)."""
        if self.allowed.any():
            draw = np.random.default_rng([self.seed, epoch, 1]).random((self.cache.num_images, 2)) < 0.5
            turn = np.random.default_rng([self.seed, epoch, 2]).random((self.cache.num_images, 1)) < 0.5
            self.epoch_flips = np.hstack([draw, turn]) & self.allowed

    def _view_pixels(self, image_index: np.ndarray, flips: np.ndarray | None) -> np.ndarray:
        """``uint8 [B, S, S, 3]`` views of the batch, each transposed then mirrored as ``flips [B, 3]`` says.

        numpy's transpose and reversed slices are views of the memmap, so each image is copied once, flipped
        or not (a loop over the batch's images, not over boxes).
        """
        if flips is None or not flips.any():
            return np.ascontiguousarray(self.cache.images[image_index])
        out = np.empty((len(image_index), *self.cache.images.shape[1:]), dtype=np.uint8)
        for b, (i, (h, v, t)) in enumerate(zip(image_index, flips)):
            view = self.cache.images[i]                                # [S, S, 3]: y, x, channel
            if t:
                view = view.transpose(1, 0, 2)
            if h:
                view = view[:, ::-1]
            if v:
                view = view[::-1]
            out[b] = view
        return out

    def __call__(self, image_index: np.ndarray) -> Batch:
        rows = [self.train_rows[self.offsets[i]:self.offsets[i + 1]] for i in image_index]
        counts = np.array([len(r) for r in rows], dtype=np.int64)
        flips = object_flips = None
        if self.epoch_flips is not None:
            flips = self.epoch_flips[image_index]
            object_flips = np.repeat(flips, counts, axis=0)
        pixels = torch.from_numpy(self._view_pixels(image_index, flips))                     # [B, S, S, 3] uint8
        images = pixels.to(self.device, non_blocking=True).permute(0, 3, 1, 2).float().div_(255.0)
        object_index = np.concatenate(rows) if rows else np.zeros(0, np.int64)
        boxes = torch.from_numpy(self.view_boxes[object_index]).to(self.device)
        if object_flips is not None and object_flips.any():
            boxes = flip_view_boxes(boxes, torch.from_numpy(object_flips).to(self.device), images.shape[-1])
        labels = torch.from_numpy(self.labels[object_index]).to(self.device)
        targets = [{"boxes": b, "labels": lab}
                   for b, lab in zip(boxes.split(counts.tolist()), labels.split(counts.tolist()))]
        image_scale = self.cache.scale[image_index]
        return Batch(np.asarray(image_index, np.int64), images, targets, object_index, image_scale,
                     np.repeat(image_scale, counts), flips, object_flips)


@dataclass
class TrainState:
    """Everything a hook may look at; ``epoch`` is 0-based, ``step`` counts optimizer steps of the run."""

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


class Hook:
    """Side effects of training; the step computes, hooks record. All methods are optional."""

    def before_epoch(self, state: TrainState) -> None: ...

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None: ...

    def after_epoch(self, state: TrainState) -> None: ...

    def on_error(self, state: TrainState) -> None: ...


def _xyxy_view_to_xywh_orig(boxes: torch.Tensor, scale: np.ndarray) -> np.ndarray:
    """``[n, 4]`` xyxy view px -> ``[n, 4]`` xywh original px (divide by each row's ``scale [n]``)."""
    b = boxes.detach().float().cpu().numpy() / np.asarray(scale, np.float64)[:, None]
    return np.concatenate([b[:, :2], b[:, 2:] - b[:, :2]], axis=1).astype(np.float32)


class LossLogHook(Hook):
    """Writes every step's per-image / per-object records through :class:`LossLogWriter`; one folder per epoch.

    With several processes each rank writes ``epoch_XXXX.rank<k>/`` and rank 0 merges them after a barrier.
    """

    def __init__(self, log_dir: Path, dataset: CocoDataset, info: ddp.DistInfo, unmatched_per_image: int) -> None:
        self.log_dir, self.info = log_dir, info
        self.writer = LossLogWriter(log_dir, dataset.num_images, dataset.num_annotations,
                                    rank=info.rank if info.distributed else None,
                                    unmatched_capacity=max(1, int(unmatched_per_image)) * dataset.num_images)

    def before_epoch(self, state: TrainState) -> None:
        self.writer.reset(state.epoch)

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None:
        image = {k: streams.image[k].detach().cpu().numpy() for k in IMAGE_FIELDS}
        objects = {k: streams.objects[k].detach().cpu().numpy() for k in OBJECT_FIELDS if k != "pred_box"}
        objects["pred_box"] = _xyxy_view_to_xywh_orig(batch.unflip(streams.objects["pred_box"], batch.object_flips),
                                                      batch.object_scale)
        um = streams.unmatched
        where = um["batch_index"].cpu().numpy()
        unmatched = {"image_index": batch.image_index[where],
                     "box": _xyxy_view_to_xywh_orig(
                         batch.unflip(um["box"], None if batch.flips is None else batch.flips[where]),
                         batch.image_scale[where]),
                     "score": um["score"].cpu().numpy(), "label": um["label"].cpu().numpy()}
        self.writer.process(batch.image_index, image, batch.object_index, objects, unmatched)

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


class CheckpointHook(Hook):
    """Saves ``RUNDIR/checkpoint.pt`` on rank 0 after every epoch, once that epoch's log is in place."""

    def __init__(self, path: Path, extra: dict[str, Any]) -> None:
        self.path, self.extra = path, extra

    def after_epoch(self, state: TrainState) -> None:
        if state.info.is_main:
            save_checkpoint(self.path, model=state.model, optimizer=state.optimizer, scheduler=state.scheduler,
                            epoch=state.epoch, config=state.config, extra=self.extra)


class ProgressHook(Hook):
    """A tqdm bar per epoch with images/s and the running mean of the three streams (per image, / num_pos)."""

    def __init__(self, num_epochs: int) -> None:
        self.num_epochs = num_epochs
        self.bar: tqdm | None = None
        self.sums = np.zeros(3)
        self.seen = 0
        self.start = 0.0

    def before_epoch(self, state: TrainState) -> None:
        self.bar = tqdm(total=state.images_in_epoch, unit="img", leave=False,
                        desc=f"epoch {state.epoch + 1}/{self.num_epochs}")
        self.sums[:] = 0.0
        self.seen = 0
        self.start = time.perf_counter()

    def after_step(self, state: TrainState, batch: Batch, streams: LossStreams) -> None:
        norm = streams.image["num_pos"].clamp(min=1).float()
        per_image = torch.stack([streams.image[k] / norm for k in ("loc_sum", "pos_sum", "neg_sum")])
        self.sums += per_image.sum(1).cpu().numpy()
        self.seen += len(batch.image_index)
        loc, pos, neg = self.sums / max(1, self.seen)
        rate = self.seen / max(1e-9, time.perf_counter() - self.start)
        self.bar.set_postfix_str(f"{rate:.1f} img/s  loc {loc:.3f}  pos {pos:.3f}  neg {neg:.3f}", refresh=False)
        self.bar.update(len(batch.image_index))

    def after_epoch(self, state: TrainState) -> None:
        self.close()

    def on_error(self, state: TrainState) -> None:
        self.close()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


@dataclass
class EpochStats:
    images: int
    seconds: float
    data_seconds: float


def _diverged(state: TrainState, batch_number: int, batch: Batch, streams: LossStreams | None,
              what: str) -> TrainingDiverged:
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
    model, anchors = state.model, unwrap_model(state.model).anchors
    model.train()
    for hook in hooks:
        hook.before_epoch(state)
    start, data_seconds, images = time.perf_counter(), 0.0, 0
    for number, index in enumerate(batches):
        t0 = time.perf_counter()
        batch = make_batch(index)
        data_seconds += time.perf_counter() - t0
        outputs = model(batch.images)
        streams = compute_loss_streams(outputs, anchors, batch.targets, cfg["loss"], cfg["log"])
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


def warmup_cosine(warmup_steps: int, total_steps: int,
                  final_factor: float = FINAL_LR_FACTOR) -> Callable[[int], float]:
    """LR factor per step: linear warm-up to 1 over ``warmup_steps``, then cosine decay to ``final_factor``."""
    warmup_steps = max(0, min(int(warmup_steps), int(total_steps)))

    def factor(step: int) -> float:
        if step < warmup_steps:
            return (step + 1) / warmup_steps
        progress = min(1.0, (step - warmup_steps) / max(1, total_steps - warmup_steps))
        return final_factor + (1.0 - final_factor) * 0.5 * (1.0 + math.cos(math.pi * progress))
    return factor


def build_optimizer(model: nn.Module, train_cfg: dict[str, Any]) -> torch.optim.Optimizer:
    """AdamW (or SGD with momentum 0.9); no weight decay on biases and norm layers (common practice)."""
    decay = [p for p in model.parameters() if p.requires_grad and p.ndim > 1]
    no_decay = [p for p in model.parameters() if p.requires_grad and p.ndim <= 1]
    groups = [{"params": decay, "weight_decay": float(train_cfg["weight_decay"])},
              {"params": no_decay, "weight_decay": 0.0}]
    name = str(train_cfg["optimizer"]).lower()
    if name == "adamw":
        return torch.optim.AdamW(groups, lr=float(train_cfg["lr"]))
    if name == "sgd":
        return torch.optim.SGD(groups, lr=float(train_cfg["lr"]), momentum=0.9)
    raise ValueError(f"train.optimizer must be adamw or sgd, got {train_cfg['optimizer']!r}")


def available_cores() -> int:
    """CPU cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def thread_count(train_cfg: dict[str, Any]) -> int:
    """``train.threads``, or the available cores shared among the processes of this machine."""
    if train_cfg.get("threads"):
        return int(train_cfg["threads"])
    local_procs = int(os.environ.get("LOCAL_WORLD_SIZE", "1"))
    return max(1, available_cores() // max(1, local_procs))


def log_bytes(dataset: CocoDataset, config: dict[str, Any]) -> int:
    """Bytes the training log will take on disk: one folder per epoch, plus one epoch of slack."""
    def row_bytes(fields: dict) -> int:
        return sum(np.dtype(dt).itemsize * int(np.prod(shape, dtype=np.int64)) for dt, shape, _ in fields.values())
    per_epoch = (dataset.num_images * (row_bytes(IMAGE_FIELDS) + 1) + dataset.num_annotations * row_bytes(OBJECT_FIELDS)
                 + max(1, config["log"]["unmatched_per_image"]) * dataset.num_images * row_bytes(UNMATCHED_FIELDS)
                 + 128 * (len(IMAGE_FIELDS) + len(OBJECT_FIELDS) + len(UNMATCHED_FIELDS) + 2))
    return per_epoch * (int(config["train"]["epochs"]) + 1)


def checkpoint_bytes(model: nn.Module) -> int:
    """Model + two AdamW moments, twice (the new checkpoint is written beside the old one), plus slack."""
    params = sum(p.numel() * p.element_size() for p in model.state_dict().values())
    return 2 * 3 * params + 1_000_000


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


def _check_room_on_main(rundir: Path, needed_bytes: int, info: ddp.DistInfo) -> None:
    """Rank 0 checks the run folder; every rank raises the same error (no rank is left waiting at a barrier)."""
    error = None
    if info.is_main:
        try:
            check_folder_room(rundir, needed_bytes, "the training log")
        except InsufficientSpaceError as exc:
            if not info.distributed:
                raise
            error = str(exc)
    error = ddp.broadcast_object(error, info)
    if error:
        raise InsufficientSpaceError(error)


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
    model = Detector.from_config(config["model"], dataset.num_classes, cache.image_size)
    _check_room_on_main(rundir, log_bytes(dataset, config) + checkpoint_bytes(model), info)
    ckpt_path, log_dir = rundir / CHECKPOINT_FILE, rundir / LOG_DIR
    model = model.to(info.device)
    optimizer = build_optimizer(model, train_cfg)
    steps = ddp.steps_per_epoch(len(usable), batch_size, info.world_size)
    scheduler = torch.optim.lr_scheduler.LambdaLR(
        optimizer, warmup_cosine(int(train_cfg["warmup_iters"]), steps * epochs))
    dataset_key = _dataset_key(dataset, usable)

    start_epoch, resumed_from = 0, None
    if resume and ckpt_path.is_file():
        payload = load_checkpoint(ckpt_path, map_location=info.device)
        if payload["extra"].get("dataset") != dataset_key:
            raise ValueError(f"{ckpt_path}: the checkpoint was trained on other data (saved "
                             f"{payload['extra'].get('dataset')}, now {dataset_key}: images, annotations or "
                             f"usable images differ); train afresh without resume")
        differences = _config_differences(payload["config"], config)
        if differences:
            raise ValueError(f"{ckpt_path}: cannot resume with a different config ({', '.join(differences)} "
                             f"changed); the log would not equal one run. Use the saved config or train afresh")
        model.load_state_dict(payload["model"])
        optimizer.load_state_dict(payload["optimizer"])
        scheduler.load_state_dict(payload["scheduler"])
        restore_rng_state(payload["rng"])
        resumed_from = int(payload["epoch"])
        start_epoch = resumed_from + 1
    if info.is_main:
        discard_epochs_after(log_dir, start_epoch - 1)
        if resumed_from is None:
            ckpt_path.unlink(missing_ok=True)
    ddp.barrier()

    wrapped = ddp.wrap_model(model, info)
    state = TrainState(config, rundir, dataset, info, wrapped, optimizer, scheduler, step=start_epoch * steps)
    hooks: list[Hook] = [LossLogHook(log_dir, dataset, info, config["log"]["unmatched_per_image"]),
                         CheckpointHook(ckpt_path, {"dataset": dataset_key})]
    if progress and info.is_main:
        hooks.append(ProgressHook(epochs))
    make_batch = BatchMaker(dataset, cache, info.device, flips=str(train_cfg["flips"]), seed=seed)

    epoch_seconds, data_seconds, images = [], 0.0, 0
    for epoch in range(start_epoch, epochs):
        order = ddp.epoch_order(usable, seed, epoch)
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
    ddp.barrier()
    total = float(sum(epoch_seconds))
    return TrainResult(epochs_done=epochs, seconds=total, images_per_second=images / total if total else 0.0,
                       data_share=data_seconds / total if total else 0.0, model=model.eval(),
                       resumed_from=resumed_from, epoch_seconds=epoch_seconds, threads=threads,
                       world_size=info.world_size, device=str(info.device))
