"""Speed of detdiff's detector on CPU, each figure measured side by side in one run.

1. logging overhead: the same training steps with ``per_item=False`` vs ``per_item=True`` plus writing the
   records into a :class:`detdiff.train.loss_log.LossLogWriter` (goal: ratio <= 1.03);
2. the naive route for comparison: torchvision's ssdlite320_mobilenet_v3_large trained at batch 8, plus one
   extra batch-of-1 pass per image with frozen BatchNorm to get per-image losses (its overhead ratio);
3. training images/s of the default detector at 128 / 192 / 256 / 320 px (batch 16);
4. FLOPs per image (forward + backward, ``torch.utils.flop_counter.FlopCounterMode``) and the achieved
   GFLOP/s as a share of the float32 matmul rate measured in the same run;
5. ours vs stock ssdlite320 (weights=None, from scratch) images/s at the same input size and batch
   (goal: ratio >= 6; ours alone: >= 100 img/s at 256 px, batch 16, 2 threads);
6. dense images (``DENSE_OBJECTS`` boxes of 3-40 px per image at 512 px, as aerial views and their tiles): the
   loss streams with anchors matched near each box (``grid=``, the training path) against every anchor compared
   with every box (the full IoU matrix; the same matching), and whole training steps both ways;
7. ``train.precision``: a training step at 512 px in float32 and in bfloat16 (``torch.autocast``), side by side.

A/B timings are interleaved (A, B, A, B, ...) so that load from other processes hits both; each figure is a
median over rounds after warm-up (overhead ratios: the median of the per-round ratios). Run: ``.venv/bin/python tests/benchmarks/bench_detector.py [--quick]``.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch
from torch.utils.flop_counter import FlopCounterMode
from torchvision.models.detection import ssdlite320_mobilenet_v3_large

from detdiff.config import load_config
from detdiff.model.detector import Detector
from detdiff.model.losses import compute_loss_streams
from detdiff.train.loss_log import LossLogWriter

NUM_CLASSES = 6            # as the demo scenario
OBJECTS_PER_IMAGE = 5      # about the demo's mean (4.7)
VIEW_SCALE = 0.8           # 320 px originals letterboxed to 256
GOAL_OVERHEAD = 1.03
GOAL_IMG_PER_S = 100.0
GOAL_VS_STOCK = 6.0
#: Boxes per image and view side of the dense case (about an aerial scenario's tiles: 55 boxes per image).
DENSE_OBJECTS, DENSE_SIZE = 60, 512
#: The view of the speed goals (the recipe picks each dataset's own).
GOAL_SIZE = 256


def synthetic_batch(batch: int, size: int, seed: int, objects: int = OBJECTS_PER_IMAGE,
                    sides: tuple[float, float] = (0.06, 0.25)) -> tuple[torch.Tensor, list[dict[str, torch.Tensor]]]:
    """Random images ``[B, 3, S, S]`` in 0..1 and ``objects`` boxes per image, ``sides`` of the view side."""
    g = torch.Generator().manual_seed(seed)
    images = torch.rand(batch, 3, size, size, generator=g)
    targets = []
    for _ in range(batch):
        wh = size * (sides[0] + (sides[1] - sides[0]) * torch.rand(objects, 2, generator=g))
        xy = (size - wh) * torch.rand(objects, 2, generator=g)
        targets.append({"boxes": torch.cat((xy, xy + wh), 1),
                        "labels": torch.randint(0, NUM_CLASSES, (objects,), generator=g)})
    return images, targets


def interleaved_times(steps: dict[str, Callable[[], object]], warmup: int, rounds: int) -> dict[str, list[float]]:
    """Seconds per call of each step in every round, timed in alternation after ``warmup`` calls each."""
    for step in steps.values():
        for _ in range(warmup):
            step()
    times: dict[str, list[float]] = {name: [] for name in steps}
    for _ in range(rounds):
        for name, step in steps.items():
            start = time.perf_counter()
            step()
            times[name].append(time.perf_counter() - start)
    return times


def interleaved(steps: dict[str, Callable[[], object]], warmup: int, rounds: int) -> dict[str, float]:
    """Median seconds per call of each step (see :func:`interleaved_times`)."""
    return {name: statistics.median(t) for name, t in interleaved_times(steps, warmup, rounds).items()}


def paired_ratio(steps: dict[str, Callable[[], object]], warmup: int, rounds: int) -> float:
    """Median over rounds of (second step's time / first step's time), each pair timed back to back."""
    first, second = interleaved_times(steps, warmup, rounds).values()
    return statistics.median(b / a for a, b in zip(first, second))


class OursTrainer:
    """One training step of the default detector: forward, loss streams, backward, AdamW step."""

    def __init__(self, config: dict, size: int, batch: int, seed: int = 0, precision: str = "float32",
                 **boxes) -> None:
        torch.manual_seed(seed)
        self.config = config
        self.model = Detector.from_config(config["model"], NUM_CLASSES, size, precision=precision)
        self.optimizer = torch.optim.AdamW(self.model.parameters(), lr=1e-3)
        self.images, self.targets = synthetic_batch(batch, size, seed, **boxes)

    def step(self, per_item: bool = False, near: bool = True):
        streams = compute_loss_streams(self.model(self.images), self.model.anchors, self.targets,
                                       self.config["loss"], self.config["log"], per_item=per_item,
                                       grid=self.model.anchor_grid if near else None)
        self.optimizer.zero_grad(set_to_none=True)
        streams.total.backward()
        self.optimizer.step()
        return streams


class LoggedSteps:
    """Steps with ``per_item=True`` whose records go into a LossLogWriter, as the training loop does."""

    def __init__(self, trainer: OursTrainer, log_dir: Path, rounds: int) -> None:
        self.trainer = trainer
        batch = trainer.images.shape[0]
        self.num_images = batch * rounds
        self.writer = LossLogWriter(log_dir, self.num_images, self.num_images * OBJECTS_PER_IMAGE)
        self.writer.reset(0)
        self.calls = 0

    def step(self) -> None:
        streams = self.trainer.step(per_item=True)
        batch = self.trainer.images.shape[0]
        first = (self.calls * batch) % self.num_images
        image_index = np.arange(first, first + batch)
        object_index = np.arange(first * OBJECTS_PER_IMAGE, (first + batch) * OBJECTS_PER_IMAGE)
        objects = {k: v.cpu().numpy() for k, v in streams.objects.items()}
        xyxy = objects["pred_box"] / VIEW_SCALE
        objects["pred_box"] = np.concatenate((xyxy[:, :2], xyxy[:, 2:] - xyxy[:, :2]), axis=1)
        um = {k: v.cpu().numpy() for k, v in streams.unmatched.items()}
        box = um.pop("box") / VIEW_SCALE
        unmatched = {"image_index": image_index[um.pop("batch_index")], "score": um["score"], "label": um["label"],
                     "box": np.concatenate((box[:, :2], box[:, 2:] - box[:, :2]), axis=1)}
        self.writer.process(image_index, {k: v.cpu().numpy() for k, v in streams.image.items()}, object_index,
                            objects, unmatched)
        self.calls += 1


class StockTrainer:
    """torchvision ssdlite320_mobilenet_v3_large from scratch, resized to ``size``: its own training step."""

    def __init__(self, size: int, batch: int, seed: int = 0) -> None:
        torch.manual_seed(seed)
        self.model = ssdlite320_mobilenet_v3_large(weights=None, weights_backbone=None, num_classes=NUM_CLASSES + 1)
        self.model.transform.min_size = (size,)
        self.model.transform.max_size = size
        self.model.transform.fixed_size = (size, size)
        self.model.train()
        self.optimizer = torch.optim.AdamW(self.model.parameters(), lr=1e-3)
        images, targets = synthetic_batch(batch, size, seed)
        self.images = list(images)
        self.targets = [{"boxes": t["boxes"], "labels": t["labels"] + 1} for t in targets]   # 0 = background

    def step(self) -> None:
        losses = self.model(self.images, self.targets)
        self.optimizer.zero_grad(set_to_none=True)
        sum(losses.values()).backward()
        self.optimizer.step()

    def step_with_per_image_losses(self) -> list[float]:
        """The naive route: the training step, then each image again alone with BatchNorm frozen."""
        self.step()
        batchnorms = [m for m in self.model.modules() if isinstance(m, torch.nn.modules.batchnorm._BatchNorm)]
        for m in batchnorms:
            m.eval()
        try:
            with torch.no_grad():
                per_image = [sum(self.model([image], [target]).values()).item()
                             for image, target in zip(self.images, self.targets)]
        finally:
            for m in batchnorms:
                m.train()
        return per_image


def matmul_gflops(n: int, rounds: int) -> float:
    """float32 square matmul rate, GFLOP/s (2 n^3 per product)."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    seconds = interleaved({"mm": lambda: a @ b}, warmup=2, rounds=rounds)["mm"]
    return 2 * n ** 3 / seconds / 1e9


def step_flops(trainer: OursTrainer) -> float:
    """FLOPs of one training step's forward + backward (the optimizer step is not counted)."""
    counter = FlopCounterMode(display=False)
    with counter:
        streams = compute_loss_streams(trainer.model(trainer.images), trainer.model.anchors, trainer.targets,
                                       trainer.config["loss"], trainer.config["log"], per_item=False,
                                       grid=trainer.model.anchor_grid)
        streams.total.backward()
    trainer.optimizer.zero_grad(set_to_none=True)
    return float(counter.get_total_flops())


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="fewer rounds and sizes (a smoke run)")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    warmup, rounds = (1, 3) if args.quick else (3, 9)
    config = load_config()
    size, batch = GOAL_SIZE, int(config["train"]["batch_size"])
    rows: list[tuple[str, str, str]] = []

    # (1) logging overhead, ours
    with tempfile.TemporaryDirectory() as tmp:
        trainer = OursTrainer(config, size, batch)
        overhead_rounds = 2 * rounds           # the smallest difference measured here: more rounds
        logged = LoggedSteps(trainer, Path(tmp) / "log", overhead_rounds + warmup)
        ours_overhead = paired_ratio({"plain": lambda: trainer.step(per_item=False), "logged": logged.step},
                                     warmup, overhead_rounds)
        logged.writer.finalize()
    rows.append(("logging overhead, ours (per_item + LossLogWriter / plain step)", f"{ours_overhead:.3f}",
                 f"<= {GOAL_OVERHEAD}"))

    # (2) the naive route on the stock model, batch 8 at its native 320 px
    stock8 = StockTrainer(320, 8)
    naive_overhead = paired_ratio({"plain": stock8.step, "naive": stock8.step_with_per_image_losses}, 1,
                                  max(3, rounds // 2))
    rows.append(("logging overhead, naive (ssdlite320 b8 + 8 frozen-BN passes / step)",
                 f"{naive_overhead:.3f}", "for comparison"))

    # (3) our training speed by input size
    speeds = {}
    for side in ((128, 256) if args.quick else (128, 192, 256, 320)):
        trainer = OursTrainer(config, side, batch)
        speeds[side] = batch / interleaved({"step": trainer.step}, warmup, rounds)["step"]
        rows.append((f"train img/s, ours, {side} px, batch {batch}", f"{speeds[side]:.1f}",
                     f">= {GOAL_IMG_PER_S:.0f}" if side == size else ""))

    # (4) FLOPs and the share of the matmul rate we reach
    trainer = OursTrainer(config, size, batch)
    flops = step_flops(trainer)
    peak = matmul_gflops(1024 if args.quick else 2048, rounds)
    achieved = flops / (batch / speeds[size]) / 1e9
    rows.append((f"FLOPs per image, fwd+bwd, {size} px", f"{flops / batch / 1e9:.3f} G", ""))
    rows.append(("float32 matmul rate (same run)", f"{peak:.0f} GFLOP/s", ""))
    rows.append(("achieved rate in training / matmul rate", f"{achieved:.0f} GFLOP/s = {achieved / peak:.0%}", ""))

    # (5) ours vs stock at the same input size and batch, interleaved
    ours, stock = OursTrainer(config, size, batch), StockTrainer(size, batch)
    t = interleaved({"ours": ours.step, "stock": stock.step}, warmup, max(3, rounds // 2))
    rows.append((f"train img/s, stock ssdlite320 at {size} px, batch {batch}", f"{batch / t['stock']:.1f}", ""))
    rows.append(("train img/s, ours (same rounds)", f"{batch / t['ours']:.1f}", ""))
    rows.append(("speed ratio ours / stock", f"{t['stock'] / t['ours']:.1f}x", f">= {GOAL_VS_STOCK:.0f}"))

    # (6) dense images: matching near each box vs against every anchor, the loss alone and whole steps
    dense = OursTrainer(config, DENSE_SIZE, batch, objects=DENSE_OBJECTS, sides=(3 / DENSE_SIZE, 40 / DENSE_SIZE))
    with torch.no_grad():
        outputs = dense.model(dense.images)

    def losses(near: bool) -> Callable[[], object]:
        grid = dense.model.anchor_grid if near else None
        return lambda: compute_loss_streams(outputs, dense.model.anchors, dense.targets, config["loss"],
                                            config["log"], grid=grid)

    t = interleaved({"every": losses(False), "near": losses(True)}, 1, max(3, rounds // 2))
    rows.append((f"loss streams, {DENSE_OBJECTS} boxes/img at {DENSE_SIZE} px: every anchor / near each box",
                 f"{t['every']:.3f} / {t['near']:.3f} s = {t['every'] / t['near']:.1f}x", ""))
    t = interleaved({"every": lambda: dense.step(True, near=False), "near": lambda: dense.step(True)}, 1,
                    max(3, rounds // 2))
    rows.append(("training step, same batch: every anchor / near each box",
                 f"{t['every']:.3f} / {t['near']:.3f} s = {t['every'] / t['near']:.1f}x", ""))

    # (7) train.precision: the same dense training step in float32 and in bfloat16 (torch.autocast), interleaved
    steps = {p: OursTrainer(config, DENSE_SIZE, batch, precision=p, objects=DENSE_OBJECTS // 4,
                            sides=(3 / DENSE_SIZE, 40 / DENSE_SIZE)) for p in ("float32", "bfloat16")}
    t = interleaved({p: lambda p=p: steps[p].step(True) for p in steps}, 1, max(3, rounds // 2))
    rows.append((f"training step at {DENSE_SIZE} px, {DENSE_OBJECTS // 4} boxes/img: float32 / bfloat16",
                 f"{t['float32']:.3f} / {t['bfloat16']:.3f} s = {t['float32'] / t['bfloat16']:.2f}x",
                 "train.precision auto: bfloat16 from 1.15x"))

    width = max(len(r[0]) for r in rows)
    print(f"detector benchmark: {args.threads} threads, torch {torch.__version__}, batch {batch}")
    for name, value, goal in rows:
        print(f"  {name:<{width}}  {value:>22}  {goal}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
