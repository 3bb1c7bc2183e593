"""Scale-out with torchrun: process-group set-up, per-rank shards of an epoch, and DDP wrapping.

Launched as ``python -m torch.distributed.run --nproc_per_node=K -m detdiff ...`` every process reads the
torchrun environment (``RANK``, ``WORLD_SIZE``, ``LOCAL_RANK``, ``MASTER_ADDR``/``MASTER_PORT``). Without it
(a plain ``python`` run) everything is a single process and no collective is ever called, so the loop
reads the same either way (the shape of torchvision's ``references/detection/utils.init_distributed_mode``).

Each epoch every rank shuffles the same way (``numpy.random.Generator`` seeded by ``(seed, epoch)``),
takes its own share of that order and cuts it into the *same number* of batches as every other rank
(DDP all-reduces gradients once per step, so an extra step on one rank would wait forever).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from datetime import timedelta
from typing import Callable

import numpy as np
import torch
import torch.distributed as dist
from torch import nn


@dataclass(frozen=True)
class DistInfo:
    """Where this process stands: ``rank`` of ``world_size``, GPU ``local_rank``, and its torch device."""

    rank: int
    world_size: int
    local_rank: int
    is_main: bool
    device: torch.device

    @property
    def distributed(self) -> bool:
        return self.world_size > 1


def resolve_device(device: str, local_rank: int = 0) -> torch.device:
    """``cpu`` | ``cuda`` | ``auto`` (CUDA when available) -> a torch device; CUDA ranks take GPU ``local_rank``."""
    if device not in ("cpu", "cuda", "auto"):
        raise ValueError(f"train.device must be cpu, cuda or auto, got {device!r}")
    if device == "auto":
        device = "cuda" if torch.cuda.is_available() else "cpu"
    if device == "cuda":
        if not torch.cuda.is_available():
            raise RuntimeError("train.device is 'cuda' but torch sees no CUDA device; use train.device: cpu")
        return torch.device("cuda", local_rank % torch.cuda.device_count())
    return torch.device("cpu")


def synchronizer(device: torch.device) -> Callable[[], None]:
    """A call that waits for ``device``'s queued kernels (CUDA runs them asynchronously), a no-op on the CPU: timed
    steps end when their work does."""
    return (lambda: torch.cuda.synchronize(device)) if device.type == "cuda" else (lambda: None)


def init_distributed(device: str = "auto") -> DistInfo:
    """Join the torchrun process group when launched by torchrun (gloo on CPU, nccl on CUDA), else one process."""
    world_size = int(os.environ.get("WORLD_SIZE", "1"))
    rank = int(os.environ.get("RANK", "0"))
    local_rank = int(os.environ.get("LOCAL_RANK", "0"))
    torch_device = resolve_device(device, local_rank)
    if world_size > 1 and not dist.is_initialized():
        if torch_device.type == "cuda":
            torch.cuda.set_device(torch_device)
        dist.init_process_group("nccl" if torch_device.type == "cuda" else "gloo", rank=rank,
                                world_size=world_size, timeout=timedelta(minutes=30))
    return DistInfo(rank, world_size, local_rank, rank == 0, torch_device)


def barrier() -> None:
    """Wait for every process (no-op with one process)."""
    if dist.is_available() and dist.is_initialized():
        dist.barrier()


def all_true(flag: bool, info: DistInfo) -> bool:
    """True only if ``flag`` is true on every rank (one tiny all-reduce; no-op with one process)."""
    if not info.distributed:
        return flag
    value = torch.tensor([1 if flag else 0], dtype=torch.int32, device=info.device)
    dist.all_reduce(value, op=dist.ReduceOp.MIN)
    return bool(value.item())


def broadcast_object(obj: object, info: DistInfo) -> object:
    """Rank 0's ``obj`` on every rank (pickled; for small things such as an error message)."""
    if not info.distributed:
        return obj
    box = [obj]
    dist.broadcast_object_list(box, src=0)
    return box[0]


def all_gather_object(obj: object, info: DistInfo) -> list:
    """Every rank's ``obj``, in rank order, on every rank (pickled; for small things such as an error message)."""
    if not info.distributed:
        return [obj]
    gathered: list = [None] * info.world_size
    dist.all_gather_object(gathered, obj)
    return gathered


def epoch_order(indices: np.ndarray, seed: int, epoch: int) -> np.ndarray:
    """``indices`` shuffled for ``epoch``; the same on every rank and in every run with the same seed."""
    return np.random.Generator(np.random.PCG64([int(seed), int(epoch)])).permutation(np.asarray(indices))


def rank_batches(order: np.ndarray, batch_size: int, rank: int, world_size: int) -> list[np.ndarray]:
    """This rank's batches of an epoch: a contiguous share of ``order``, in equally many batches on every rank.

    Shares differ by at most one image and batch sizes within an epoch by at most one, so no rank runs an
    extra optimizer step. Every entry of ``order`` lands in exactly one batch of exactly one rank.
    """
    order = np.asarray(order)
    if len(order) < world_size:
        raise ValueError(f"{len(order)} usable image(s) cannot be shared by {world_size} processes; "
                         f"use fewer processes (--nproc_per_node)")
    share = np.array_split(order, world_size)[rank]
    return list(np.array_split(share, steps_per_epoch(len(order), batch_size, world_size)))


def steps_per_epoch(num_images: int, batch_size: int, world_size: int) -> int:
    """Optimizer steps per epoch on each rank (what :func:`rank_batches` gives); sets the LR schedule length."""
    if num_images == 0:
        return 0
    largest = -(-num_images // world_size)
    smallest = num_images // world_size
    return max(1, min(-(-largest // batch_size), smallest))


def wrap_model(model: nn.Module, info: DistInfo) -> nn.Module:
    """``model`` on ``info.device``; wrapped in DistributedDataParallel when there are several processes."""
    model = model.to(info.device)
    if not info.distributed:
        return model
    ids = [info.device.index] if info.device.type == "cuda" else None
    return nn.parallel.DistributedDataParallel(model, device_ids=ids)


def shutdown() -> None:
    """Leave the process group (no-op with one process)."""
    if dist.is_available() and dist.is_initialized():
        dist.destroy_process_group()
