"""Checkpoints that resume a run exactly: model, optimizer, scheduler, last finished epoch and RNG states.

Written once per epoch to ``RUNDIR/checkpoint.pt`` *after* that epoch's log folder is in place, through a
temporary file and ``os.replace``, so the file on disk is always a complete checkpoint of an epoch whose
log is complete. On resume, log epochs later than the checkpoint are discarded and redone.

Contents (all loadable with ``torch.load(weights_only=True)``: tensors, numbers, strings, lists, dicts)::

    {"format": 1, "epoch": int (last finished, 0-based), "model": state_dict, "optimizer": state_dict,
     "scheduler": state_dict, "rng": {"torch": ByteTensor, "numpy": {...}, "cuda": [ByteTensor, ...]},
     "config": dict, "num_classes": int, "image_size": int, "extra": dict}
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from detdiff.model.detector import Detector

CHECKPOINT_FILE = "checkpoint.pt"
CHECKPOINT_FORMAT = 1


def unwrap_model(model: nn.Module) -> nn.Module:
    """The plain module inside a DistributedDataParallel wrapper (or the model itself)."""
    return model.module if isinstance(model, nn.parallel.DistributedDataParallel) else model


def capture_rng_state() -> dict[str, Any]:
    """torch (CPU and CUDA) and numpy global generator states, as tensors and plain values."""
    kind, keys, pos, has_gauss, cached = np.random.get_state()
    state: dict[str, Any] = {"torch": torch.get_rng_state(),
                             "numpy": {"kind": kind, "keys": torch.from_numpy(keys.astype(np.int64)),
                                       "pos": int(pos), "has_gauss": int(has_gauss), "cached": float(cached)}}
    if torch.cuda.is_available() and torch.cuda.is_initialized():
        state["cuda"] = torch.cuda.get_rng_state_all()
    return state


def restore_rng_state(state: dict[str, Any]) -> None:
    """Inverse of :func:`capture_rng_state`."""
    torch.set_rng_state(state["torch"])
    npy = state["numpy"]
    np.random.set_state((npy["kind"], npy["keys"].numpy().astype(np.uint32), npy["pos"], npy["has_gauss"],
                         npy["cached"]))
    if "cuda" in state and torch.cuda.is_available():
        torch.cuda.set_rng_state_all(state["cuda"])


def save_checkpoint(path: str | Path, *, model: nn.Module, optimizer: torch.optim.Optimizer,
                    scheduler: torch.optim.lr_scheduler.LRScheduler, epoch: int, config: dict[str, Any],
                    extra: dict[str, Any] | None = None) -> Path:
    """Write the checkpoint of finished ``epoch`` atomically (temporary file, then ``os.replace``).

    ``extra`` (plain values) is stored as is, e.g. what identifies the dataset the run was trained on.
    """
    path = Path(path)
    plain = unwrap_model(model)
    payload = {"format": CHECKPOINT_FORMAT, "epoch": int(epoch), "model": plain.state_dict(),
               "optimizer": optimizer.state_dict(), "scheduler": scheduler.state_dict(),
               "rng": capture_rng_state(), "config": config,
               "num_classes": int(getattr(plain, "num_classes", 0)),
               "image_size": int(getattr(plain, "image_size", 0)), "extra": extra or {}}
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "wb") as fh:          # a file object: a failed write surfaces as OSError (ENOSPC), chained
            torch.save(payload, fh)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return path


def load_checkpoint(path: str | Path, map_location: str | torch.device = "cpu") -> dict[str, Any]:
    """Read a checkpoint written by :func:`save_checkpoint`; clear error if missing or damaged."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"{path}: no checkpoint (training has not finished an epoch in this run folder)")
    try:
        payload = torch.load(path, map_location=map_location, weights_only=True)
    except (OSError, RuntimeError, ValueError, EOFError) as exc:
        raise ValueError(f"{path}: cannot read checkpoint ({exc}); delete it and train again") from exc
    if not isinstance(payload, dict) or payload.get("format") != CHECKPOINT_FORMAT:
        raise ValueError(f"{path}: not a detdiff checkpoint of format {CHECKPOINT_FORMAT}")
    return payload


def load_trained_model(rundir: str | Path, map_location: str | torch.device = "cpu") -> Detector:
    """The detector of the last finished epoch of ``RUNDIR/checkpoint.pt``, in eval mode."""
    payload = load_checkpoint(Path(rundir) / CHECKPOINT_FILE, map_location)
    model_cfg = dict(payload["config"]["model"], weights=None)
    model = Detector.from_config(model_cfg, payload["num_classes"], payload["image_size"])
    model.load_state_dict(payload["model"])
    return model.to(map_location).eval()
