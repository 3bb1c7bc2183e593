"""The arithmetic of a training forward pass: float32, or bfloat16 under ``torch.autocast`` where it is faster.

Both models of the audit (the detector: ``train.precision``; the crop models: ``crossfit.precision``) may run
their training forward pass in bfloat16: convolutions and linear layers take bfloat16 inputs and weights
(8 significant bits), while the weights themselves, the optimizer and the loss stay float32. ``auto`` is
resolved by the recipe from steps timed both ways on this machine (:mod:`detdiff.recipe`): CPUs with
AVX512-BF16 ran the detector's 512 px step 1.4-1.6x faster in the recipe's timings and 1.9x in
``tests/benchmarks/bench_detector.py``; others may run it slower. Predictions are float32.
"""

from __future__ import annotations

import torch

#: Precision values; ``auto`` is resolved by the recipe, and reads as float32 where it was not.
PRECISIONS = ("auto", "float32", "bfloat16")


def training_autocast(precision: str, key: str, device_type: str = "cpu") -> torch.autocast:
    """The autocast context of a training forward pass at ``precision`` (the config ``key`` names it in errors)."""
    if precision not in PRECISIONS:
        raise ValueError(f"{key} must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    return torch.autocast(device_type, dtype=torch.bfloat16, enabled=precision == "bfloat16")
