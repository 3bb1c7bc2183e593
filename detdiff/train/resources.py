"""What a training run needs of the machine: its thread count and the disk room for its log and checkpoint.

The thread count is part of reproducibility: the same seed and thread count give identical logged losses.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
from torch import nn

from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import InsufficientSpaceError, check_folder_room
from detdiff.train import distributed as ddp
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, UNMATCHED_FIELDS


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


def check_room_on_main(rundir: Path, needed_bytes: int, info: ddp.DistInfo) -> None:
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
