"""The optimizer and the learning-rate schedule of training: AdamW or SGD, linear warm-up then cosine decay."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import torch
from torch import nn

#: The cosine schedule decays to this share of train.lr.
FINAL_LR_FACTOR = 0.05


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
