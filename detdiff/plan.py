"""What the audit will cost, projected before any long work: disk by part, wall time by stage, peak memory, and
the boxes too small for the chosen view.

:func:`plan_audit` runs after the recipe and before the image cache is decoded. Wall time comes from the
warm-up of :mod:`detdiff.plan_warmup` (a sample of the dataset's own files decoded, real steps of the models
timed on this machine), scaled by what the audit will do: decode work of every image (over the decode
workers), optimizer steps of the detector and of every fold's crop model, forward passes of the final pass.
COCOeval, analysis and report are projected from per-box and fixed costs measured once (constants below, each
with its source). Disk parts are the sizes of what the code writes (each with its basis); the free bytes are
those of the run folder's file system, and what a part already has on disk (a reused cache, a resumed run) is
not counted again. The plan is printed (:func:`format_plan`), written as ``RUNDIR/plan.json``, and an audit
whose disk parts cannot fit stops there with one line (``--image-size`` shrinks the largest part).

At the end of an audit ``run.json["plan_seconds"]`` holds the projection beside the measured stage times
(:func:`projected_vs_measured`); ``tests/benchmarks/bench_validity.py`` checks the goal of +-25%.
Projected for one process; on ``--resume`` a complete image cache counts as decoded, other stages in full.
"""

from __future__ import annotations

import inspect
import json
import math
import resource
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from detdiff.config import time_limit_seconds
from detdiff.data.coco import CocoDataset
from detdiff.stages import InsufficientSpaceError, size_text

if TYPE_CHECKING:
    from detdiff.plan_warmup import Warmup
    from detdiff.recipe import Recipe

PLAN_FILE = "plan.json"
#: meta.npz bytes per image (scale float64, usable bool, pixel float32 x 4, image id int64, reduction uint8).
META_BYTES_PER_IMAGE = 8 + 1 + 16 + 8 + 1
#: The cache's small files: npy and zip headers of meta.npz, fingerprint.json, an empty problems.json.
CACHE_FIXED_BYTES = 8192
#: JPEG cache rows (codec jpeg) per pixel, for the decode stage's room check before any row is stored: an upper
#: figure of 0.30-0.33 measured on 128-320 px views and tiles of photos and 0.47-0.54 on 64 px crops (quality 90).
ENCODED_BYTES_PER_PX = 0.6
#: COCOeval seconds per ground-truth box plus detection: 89-135 us measured with pycocotools on synthetic sets
#: of 300-2,000 images with 5-50 boxes and 20-100 detections each (this project's 2-core machine).
COCOEVAL_S_PER_ITEM = 1.0e-4
#: Detections per box the final pass keeps (score >= 0.05): 2.4-10.4, median 4, in six scenario audits.
DETECTIONS_PER_BOX = 4.0
#: Bytes per detection in detections.json (122-124 in those audits).
DETECTION_BYTES = 125
#: Analysis + tables seconds: fixed (mostly importing the analysis modules at first use: 3.4 s for the first
#: analysis of a 300-image run in a fresh process, 0.4 s for the next) and per box, fitted to seven audits of
#: 1,381-42,254 boxes (0.3-5.3 s).
ANALYSIS_FIXED_S, ANALYSIS_S_PER_BOX = 1.0, 1.0e-4
#: Analysis memory above the process: per box and per box and epoch (bench_analysis_scale.py: 21.5k boxes and
#: 8 epochs 0.84 GiB peak, 86k boxes 0.99 GiB, 21.5k boxes and 32 epochs 0.86 GiB).
ANALYSIS_BYTES_PER_BOX, ANALYSIS_BYTES_PER_BOX_EPOCH = 2500, 40
#: Tables per box (objects.csv 400, objects.parquet 300, review.json up to 100), per image (images.csv 210,
#: images.parquet 180) and fixed (suspects, classes, causes, JSON), measured in five run folders.
TABLE_BYTES_PER_BOX, TABLE_BYTES_PER_IMAGE, TABLE_BYTES_FIXED = 800, 390, 200_000
#: Report seconds besides decoding its thumbnails' images (plots and page: 2.3-4.3 s in small audits).
REPORT_FIXED_S = 2.5
#: Report pictures per ``report.top`` (190 thumbnails at top 24) and report + plots bytes per ``report.top``
#: (1.4-2.7 MB at top 24).
REPORT_SHOTS_PER_TOP, REPORT_BYTES_PER_TOP = 8, 110_000
#: Crop-model outputs per box: fold files (row, probabilities float32 x C, box float64 x 4, probe position and
#: box) and predictions.npz (the same plus fold and probe boxes): 8 C + 192 bytes (13.2 MB for 42k boxes, 15
#: classes, as measured).
CROSSFIT_BYTES_PER_BOX = 192
CROSSFIT_BYTES_PER_BOX_CLASS = 8
#: Share of boxes under ``recipe.min_object_px`` that the small-object line asks a larger view to fix.
SMALL_SHARE_OK = 0.05
VIEW_MULTIPLE = 32


@dataclass
class Plan:
    """The projection: ``disk`` bytes and ``seconds`` per part (each with a ``*_basis`` line), bytes of each disk
    part already there (``on_disk``), the ``free`` bytes of the run folder's file system, ``memory`` bytes, the
    small objects, and what the warm-up measured."""

    rundir: Path
    image_size: int
    num_images: int = 0
    disk: dict[str, int] = field(default_factory=dict)
    disk_basis: dict[str, str] = field(default_factory=dict)
    on_disk: dict[str, int] = field(default_factory=dict)
    free: int = 0
    seconds: dict[str, float] = field(default_factory=dict)
    seconds_basis: dict[str, str] = field(default_factory=dict)
    memory: dict[str, int] = field(default_factory=dict)
    memory_basis: dict[str, str] = field(default_factory=dict)
    small: dict[str, Any] = field(default_factory=dict)
    warmup: dict[str, Any] = field(default_factory=dict)
    codec: str = "raw"                  # data.cache_codec as the cache will be built

    @property
    def disk_total(self) -> int:
        return int(sum(self.disk.values()))

    @property
    def more_bytes(self) -> int:
        """Bytes still to be written: each part less what it already has on disk."""
        return int(sum(max(0, b - self.on_disk.get(k, 0)) for k, b in self.disk.items()))

    @property
    def total_seconds(self) -> float:
        return float(sum(self.seconds.values()))

    @property
    def fits(self) -> bool:
        return self.more_bytes <= self.free

    def fitting_view(self) -> int | None:
        """The largest view side (a multiple of 32 below this one) at which the disk parts would fit, if any: the
        cache's views take ``3 S^2`` bytes per image (JPEG rows: about the whole cache part, in proportion to
        ``S^2``), the rest does not depend on the view."""
        views = 3 * self.image_size ** 2 * self.num_images if self.codec == "raw" else self.disk["image cache"]
        cache_left = max(0, self.disk["image cache"] - self.on_disk["image cache"])
        room = self.free - (self.more_bytes - min(views, cache_left))
        if self.num_images == 0 or room <= 0 or views <= 0:
            return None
        side = int(self.image_size * math.sqrt(room / views) // VIEW_MULTIPLE * VIEW_MULTIPLE)
        return side if VIEW_MULTIPLE <= side < self.image_size else None

    def refusal(self) -> str:
        """The one line an audit stops with when the disk cannot hold it."""
        largest = max(self.disk, key=self.disk.get)
        view = self.fitting_view()
        smaller = (f"--image-size {view} would fit (the image cache's views shrink with the square of the side)"
                   if view else "no smaller --image-size fits")
        if self.codec == "raw":
            smaller += "; --cache-codec jpeg stores the image cache in about a tenth of the bytes"
        return (f"{self.rundir}: the audit needs about {size_text(self.more_bytes)} more on this disk (largest part: "
                f"{largest}, {size_text(self.disk[largest])}) but only {size_text(self.free)} are free; {smaller}; "
                f"or free some space or choose an --out folder on a larger disk")

    def to_json(self) -> dict[str, Any]:
        parts = {k: round(v, 2) for k, v in self.seconds.items()}
        return {"image_size": self.image_size, "num_images": self.num_images,
                "disk_bytes": {"parts": self.disk, "total": self.disk_total, "on_disk": self.on_disk,
                               "more": self.more_bytes, "free": self.free, "basis": self.disk_basis},
                "time_seconds": {"parts": parts, "total": round(sum(parts.values()), 2), "basis": self.seconds_basis},
                "memory_bytes": {**self.memory, "basis": self.memory_basis},
                "small_objects": self.small, "warmup": self.warmup, "cache_codec": self.codec}


def tile_options(config: dict[str, Any]) -> dict[str, float]:
    """The image cache's tile settings from a resolved config (``data.tile_scale``: 0 or null = no tiles)."""
    scale = config["data"].get("tile_scale")
    return {"scale": float(scale) if isinstance(scale, (int, float)) else 0.0,
            "min_object_px": float(config["recipe"]["min_object_px"])}


def cache_options(config: dict[str, Any]) -> dict[str, Any]:
    """The image cache's build options as the audit passes them (:func:`detdiff.pipeline._build_cache`)."""
    return {"max_pixels": int(config["data"]["max_pixels"]),
            "pixel_stats": bool(config["analysis"]["pixel_descriptors"]),
            "with_crops": bool(config["crossfit"]["enabled"]),
            "reduced_decode": bool(config["data"]["reduced_decode"]),
            "tiles": tile_options(config), "codec": cache_codec(config)}


def cache_codec(config: dict[str, Any]) -> str:
    """``data.cache_codec`` as the cache is built: ``auto`` (a config the recipe did not resolve) is raw."""
    codec = str(config["data"].get("cache_codec") or "auto")
    return "raw" if codec == "auto" else codec


def tile_count(dataset: CocoDataset, config: dict[str, Any]) -> int:
    """Tiles the cache will cut for ``config`` (:func:`detdiff.recipe.tile_count` with the resolved settings)."""
    from detdiff.recipe import tile_count as count_at

    options = tile_options(config)
    return count_at(dataset, int(config["data"]["image_size"]), options["scale"], options["min_object_px"])


def cache_disk_bytes(dataset: CocoDataset, config: dict[str, Any], encoded: tuple[float, float] | None = None) -> int:
    """Bytes of ``RUNDIR/cache``: the views (``images.u8``) and tiles (``tiles.u8``), one crop per box when the crop
    models are on (``crops.u8``), ``meta.npz`` and a few kB of JSON. The plan and the decode stage's room check both
    use it. With codec jpeg the rows take ``encoded`` = (bytes per view or tile, bytes per crop) as the plan's
    warm-up measured them, or :data:`ENCODED_BYTES_PER_PX` of their pixels (the room check, before any is made)."""
    from detdiff.crossfit.crops import STORE

    size, crops_on = int(config["data"]["image_size"]), bool(config["crossfit"]["enabled"])
    views = dataset.num_images + tile_count(dataset, config)
    crops = dataset.num_annotations if crops_on else 0
    if cache_codec(config) == "raw":
        per_view, per_crop, row_meta = 3.0 * size * size, 3.0 * STORE * STORE, 0
    else:                                                  # each row's offset and length go into meta.npz
        per_view, per_crop = encoded or (ENCODED_BYTES_PER_PX * size * size, ENCODED_BYTES_PER_PX * STORE * STORE)
        row_meta = 16
    return int(per_view * views + per_crop * crops + row_meta * (views + crops)
               + META_BYTES_PER_IMAGE * dataset.num_images + CACHE_FIXED_BYTES)


def _cache_part(dataset: CocoDataset, config: dict[str, Any], warm: Warmup, size: int,
                crops_on: bool) -> tuple[int, list[str], str]:
    """The image cache's disk part: bytes, where it lies, basis."""
    if cache_codec(config) == "raw":
        return (cache_disk_bytes(dataset, config), ["cache"],
                f"{size}x{size}x3 bytes per view or tile" + (", a 64x64x3 crop per box" if crops_on else "")
                + ", meta.npz")
    measured = (warm.encoded_view_bytes, warm.encoded_crop_bytes) if warm.encoded_view_bytes else None
    basis = (f"JPEG rows as the warm-up's sample stored them: {size_text(warm.encoded_view_bytes)} per view or tile"
             + (f", {size_text(warm.encoded_crop_bytes)} per crop" if crops_on else "") if measured else
             f"JPEG rows at {ENCODED_BYTES_PER_PX} bytes per px (none measured)")
    return cache_disk_bytes(dataset, config, measured), ["cache"], basis + ", meta.npz"


def free_bytes(folder: Path) -> int:
    """Free bytes on the file system of ``folder``."""
    return int(shutil.disk_usage(folder).free)


def _bytes_in(paths: list[Path]) -> int:
    """Bytes of the files at ``paths`` (files, or every file under a folder)."""
    total = 0
    for path in paths:
        files = [path] if path.is_file() else (p for p in path.rglob("*") if p.is_file()) if path.is_dir() else []
        total += sum(p.stat().st_size for p in files)
    return total


def place_crop_bytes(images: int, config: dict[str, Any]) -> int:
    """Bytes of the place crops' working file (:func:`detdiff.crossfit.places.place_crops_path`) at most."""
    from detdiff.crossfit.crops import crop_bytes

    return crop_bytes(int(config["crossfit"]["places_per_image"]) * images)


def _disk(plan: Plan, dataset: CocoDataset, config: dict[str, Any], warm: Warmup, boxes: int,
          detections: float) -> None:
    """Disk parts, their basis and what each already has in the run folder."""
    from detdiff.train.resources import log_bytes

    images, size, rundir = dataset.num_images, plan.image_size, plan.rundir
    crops_on = bool(config["crossfit"]["enabled"])
    classes, top = dataset.num_classes, int(config["report"]["top"])
    parts = {
        "image cache": _cache_part(dataset, config, warm, size, crops_on),
        "training log": (log_bytes(dataset, config), ["log"],
                         f"{int(config['train']['epochs']) + 1} epochs of per-image and per-box fields"),
        "checkpoint": (warm.checkpoint_bytes, ["checkpoint.pt"],
                       "weights and two AdamW moments, twice while one replaces the other"),
        "evaluation": (int(dataset.num_annotations * warm.feature_channels * 4 + 128 + detections * DETECTION_BYTES),
                       ["object_features.npy", "detections.json"],
                       f"{warm.feature_channels} float32 features per box, about {DETECTIONS_PER_BOX:g} detections "
                       f"per box at {DETECTION_BYTES} bytes"),
        "cross-fit": (((CROSSFIT_BYTES_PER_BOX + CROSSFIT_BYTES_PER_BOX_CLASS * classes) * boxes
                       + place_crop_bytes(images, config)) if crops_on else 0,
                      ["crossfit"], f"{CROSSFIT_BYTES_PER_BOX} + {CROSSFIT_BYTES_PER_BOX_CLASS} x classes bytes "
                                    f"per box (fold files and predictions), and the crops of up to "
                                    f"{int(config['crossfit']['places_per_image'])} places per image while they are "
                                    f"judged"),
        "tables": (TABLE_BYTES_PER_BOX * dataset.num_annotations + TABLE_BYTES_PER_IMAGE * images + TABLE_BYTES_FIXED,
                   [*(f"{t}.{e}" for t in ("images", "objects", "suspects", "classes", "causes")
                      for e in ("csv", "parquet")), "review.json"],
                   f"{TABLE_BYTES_PER_BOX} bytes per box, {TABLE_BYTES_PER_IMAGE} per image (CSV, Parquet, review)"),
        "report": (REPORT_BYTES_PER_TOP * top, ["report", "plots"],
                   f"thumbnails and plots, {size_text(REPORT_BYTES_PER_TOP)} per report.top"),
    }
    for name, (num_bytes, where, basis) in parts.items():
        plan.disk[name], plan.disk_basis[name] = int(num_bytes), basis
        plan.on_disk[name] = _bytes_in([rundir / w for w in where])
    plan.free = free_bytes(rundir)


def _complete_cache(dataset: CocoDataset, config: dict[str, Any], rundir: Path) -> bool:
    """Whether ``RUNDIR/cache`` already holds this audit's complete image cache (reused without decoding)."""
    from detdiff.data.image_cache import FINGERPRINT_FILE, current_cache

    cache_dir = rundir / "cache"
    return (cache_dir / FINGERPRINT_FILE).is_file() and current_cache(
        dataset, cache_dir, int(config["data"]["image_size"]), **cache_options(config)) is not None


def decode_workers(images: int) -> int:
    """Processes that decode the image cache: ``build_image_cache``'s default worker count, one (in-process) under
    4 images per worker."""
    from detdiff.data.image_cache import build_image_cache
    from detdiff.train.resources import available_cores

    workers = int(inspect.signature(build_image_cache).parameters["workers"].default)
    return 1 if images < 4 * workers else max(1, min(workers, available_cores()))


def decode_seconds(warm: Warmup, work: np.ndarray) -> float:
    """Seconds to decode every image: the warm-up's seconds per unit of decode ``work``, over the decode workers."""
    return warm.decode_s_per_work * float(work.sum()) / decode_workers(len(work))


def _seconds(plan: Plan, dataset: CocoDataset, config: dict[str, Any], recipe: Recipe, warm: Warmup,
             work: np.ndarray, boxes: int, detections: float) -> None:
    """Seconds per stage from the warm-up's measurements and the audit's step counts."""
    from detdiff.crossfit.folds import assign_folds, fold_steps
    from detdiff.data.cache_shards import decode_work

    images, train, cfg = dataset.num_images, config["train"], config["crossfit"]
    workers = decode_workers(images)
    decoded = _complete_cache(dataset, config, plan.rundir)
    plan.seconds["decode"] = 0.0 if decoded else decode_seconds(warm, work)
    plan.seconds_basis["decode"] = ("a complete cache is there" if decoded else
                                    f"{warm.sample_images} images decoded in {warm.decode_seconds:.2f} s, scaled by "
                                    f"decoded pixels to {images} images over {workers} worker(s)")
    views = images + tile_count(dataset, config)          # whole views and tiles: what an epoch trains on
    steps = int(train["epochs"]) * math.ceil(views / int(train["batch_size"]))
    if warm.detector_step_s is not None:
        plan.seconds["detector"] = steps * warm.detector_step_s + int(train["epochs"]) * warm.checkpoint_s
        plan.seconds_basis["detector"] = (f"{steps} steps x {warm.detector_step_s:.3f} s (timed on the sample with "
                                          f"batches, loss streams and log writes) + a checkpoint per epoch")
    else:
        plan.seconds["detector"] = float(recipe.estimate.get("detector_training_s", 0.0))
        plan.seconds_basis["detector"] = "the recipe's estimate (no usable image in the sample)"
    limit = time_limit_seconds(config)
    if limit is not None and plan.seconds["detector"] > limit:
        plan.seconds["detector"] = limit
        plan.seconds_basis["detector"] += (f"; capped by train.time_limit {limit / 60:g} min (the epochs that fit "
                                           f"are trained)")
    if cfg["enabled"]:
        folds = int(cfg["folds"])
        fold = assign_folds(images, folds, int(train["seed"]))[dataset.ann_image_index]
        trainable = ~dataset.iscrowd
        fold_rows = [int((trainable & (fold != k)).sum()) for k in range(folds)]
        crop_steps = sum(fold_steps(n, float(cfg["epochs"]), int(cfg["batch_size"])) for n in fold_rows)
        # the places judged for an unannotated object: their images decoded again (reduced by the smallest box, as
        # detdiff.crossfit.places does) and up to crossfit.places_per_image places per image predicted
        places = int(cfg["places_per_image"]) * images
        place_decode = decode_seconds(warm, decode_work(dataset, 0, bool(config["data"]["reduced_decode"])))
        if warm.crop_step_s is not None:
            plan.seconds["crop models"] = (crop_steps * warm.crop_step_s + (2 * boxes + places) * warm.predict_s_per_row
                                           + place_decode)
            plan.seconds_basis["crop models"] = (f"{crop_steps} steps x {warm.crop_step_s:.3f} s + {2 * boxes + places} "
                                                 f"predictions (boxes, box probes, places) + {place_decode:.0f} s "
                                                 f"decoding the places' images")
        else:
            plan.seconds["crop models"] = float(recipe.estimate.get("crop_models_s", 0.0))
            plan.seconds_basis["crop models"] = "the recipe's estimate (no usable box in the sample)"
    after, basis = after_training_seconds(dataset, config, warm, views, boxes, detections)
    plan.seconds.update(after)
    plan.seconds_basis.update(basis)


def after_training_seconds(dataset: CocoDataset, config: dict[str, Any], warm: Warmup, views: int, boxes: int,
                           detections: float) -> tuple[dict[str, float], dict[str, str]]:
    """Seconds of the stages after training (evaluate, analysis, report), each with its basis line: the final
    pass's ``views`` forward passes and COCOeval, analysis per box, the report's thumbnails."""
    images = dataset.num_images
    seconds = {"evaluate": views * (warm.forward_s_per_image or 0.0) + COCOEVAL_S_PER_ITEM * (boxes + detections),
               "analysis": ANALYSIS_FIXED_S + ANALYSIS_S_PER_BOX * dataset.num_annotations}
    shown = min(images, REPORT_SHOTS_PER_TOP * int(config["report"]["top"])) if config["report"]["thumbnails"] else 0
    seconds["report"] = REPORT_FIXED_S + shown * warm.decode_s_per_image
    basis = {"evaluate": (f"{views} forward passes x {(warm.forward_s_per_image or 0.0) * 1e3:.1f} ms + COCOeval of "
                          f"{boxes} boxes and about {detections:.0f} detections"),
             "analysis": f"{ANALYSIS_FIXED_S} s + {ANALYSIS_S_PER_BOX * 1e6:.0f} us per box",
             "report": f"{REPORT_FIXED_S} s + {shown} images read for thumbnails"}
    return seconds, basis


def _rss_bytes() -> int:
    """Resident bytes of this process now (``/proc/self/statm``), else its peak so far."""
    try:
        pages = int(Path("/proc/self/statm").read_text().split()[1])
        return pages * resource.getpagesize()
    except (OSError, ValueError, IndexError):
        return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def _memory(plan: Plan, dataset: CocoDataset, config: dict[str, Any], warm: Warmup, work: np.ndarray,
            base: int) -> None:
    """Projected peak resident memory: the larger of training, analysis and decoding, plus mapped cache pages."""
    from detdiff.data.cache_shards import FIXED_PIXELS

    size, batch = plan.image_size, int(config["train"]["batch_size"])
    pixels = batch * 3 * size * size * 5                       # float32 batch and its uint8 copy
    training = base + 4 * warm.param_bytes + warm.activation_bytes + pixels
    analysis = base + dataset.num_annotations * (ANALYSIS_BYTES_PER_BOX
                                                 + ANALYSIS_BYTES_PER_BOX_EPOCH * int(config["train"]["epochs"]))
    decoding = base + 2 * 2 * 3 * int(max(work.max(initial=FIXED_PIXELS) - FIXED_PIXELS, 0))
    plan.memory = {"process": base, "training": int(training), "analysis": int(analysis), "decode": int(decoding),
                   "peak": int(max(training, analysis, decoding)), "mapped": plan.disk["image cache"]}
    plan.memory_basis = {
        "process": "resident now (Python, torch and the dataset loaded)",
        "training": (f"process + weights, gradients and two AdamW moments ({size_text(4 * warm.param_bytes)}) + "
                     f"tensors kept for the backward pass ({size_text(warm.activation_bytes)}, measured) + batch"),
        "analysis": (f"process + {ANALYSIS_BYTES_PER_BOX} bytes per box + {ANALYSIS_BYTES_PER_BOX_EPOCH} per box and "
                     f"epoch (bench_analysis_scale.py)"),
        "decode": "process + two decode workers' largest decoded image, RGB, twice (pixels and their view)",
        "mapped": "the image cache's memory-mapped pages (page cache: counted in RSS, given back under pressure)"}


def _small_objects(plan: Plan, dataset: CocoDataset, config: dict[str, Any], recipe: Recipe) -> None:
    """The share of boxes under ``recipe.min_object_px`` in the view, and the view or budget that would fix it."""
    from detdiff.data.views import logged_view_sides, plan_tiles
    from detdiff.recipe import box_view_sides

    size, px = plan.image_size, float(config["recipe"]["min_object_px"])
    options = tile_options(config)
    grid, owner = plan_tiles(dataset, size, options["scale"], px)
    small = logged_view_sides(dataset, size, grid, owner) < px       # in the view that logs each box (tiles too)
    sides = box_view_sides(dataset, size)
    share = float(small.mean()) if len(sides) else 0.0
    plan.small = {"min_object_px": px, "image_size": size, "tiles": grid.num_tiles, "tile_scale": options["scale"],
                  "boxes": int(len(sides)), "small": int(small.sum()), "share": round(share, 4)}
    if share <= 0:
        return
    long_side = np.maximum(dataset.widths, dataset.heights)[dataset.ann_image_index[~dataset.iscrowd]]
    largest = int(math.ceil(float(long_side.max()) / VIEW_MULTIPLE) * VIEW_MULTIPLE)
    wanted = float(np.quantile(px * size / np.maximum(sides, 1e-6), 1 - SMALL_SHARE_OK))
    needed = int(min(largest, math.ceil(wanted / VIEW_MULTIPLE) * VIEW_MULTIPLE))   # all but 5% at px or more
    view = min(needed, 2 * size)                                                    # one step: at most double
    plan.small.update({"view_for_95pct": needed, "larger_view": view,
                       "share_at_larger_view": round(float((box_view_sides(dataset, view) < px).mean()), 4),
                       "budget_limited": any(t.startswith("data.image_size") for t in recipe.traded)})
    if view <= size:
        return
    est, growth = recipe.estimate, (view / size) ** 2
    detector = plan.seconds.get("detector", 0.0)
    budget = (float(est.get("detector_training_s", 0.0)) * growth + float(est.get("crop_models_s", 0.0))
              + float(est.get("other_stages_s", 0.0))) / 60
    grows = (not recipe.reasons.get("data.image_size", "given").startswith("given")
             and view <= int(config["recipe"]["max_view"]) and budget > 0)      # the recipe enlarges the view itself
    plan.small["flag"] = f"--image-size {view}" + (f" (or --budget {math.ceil(budget)})" if grows else "")
    plan.small["cost"] = (f"{plan.small['share_at_larger_view']:.0%} left under {px:g} px, the detector's "
                          f"{_duration(detector)} become about {_duration(detector * growth)}"
                          + (f"; {needed} px would leave {SMALL_SHARE_OK:.0%}" if needed > view else ""))


def plan_audit(dataset: CocoDataset, config: dict[str, Any], recipe: Recipe, rundir: str | Path) -> Plan:
    """Project the audit of ``dataset`` with the resolved ``config`` and its ``recipe`` into ``rundir``."""
    from detdiff.data.cache_shards import decode_work
    from detdiff.plan_warmup import run_warmup

    rundir = Path(rundir)
    base = _rss_bytes()
    plan = Plan(rundir, int(config["data"]["image_size"]), dataset.num_images, codec=cache_codec(config))
    work = decode_work(dataset, plan.image_size, bool(config["data"]["reduced_decode"]))
    warm = run_warmup(dataset, config, work, cache_options(config))
    plan.warmup = warm.to_json()
    boxes = int((~dataset.iscrowd).sum())
    detections = min(DETECTIONS_PER_BOX * boxes, float(config["eval"]["max_detections"]) * dataset.num_images)
    _disk(plan, dataset, config, warm, boxes, detections)
    _seconds(plan, dataset, config, recipe, warm, work, boxes, detections)
    _memory(plan, dataset, config, warm, work, base)
    _small_objects(plan, dataset, config, recipe)
    return plan


def _duration(seconds: float) -> str:
    """Seconds under a minute, else minutes with one decimal."""
    return f"{seconds:.0f} s" if seconds < 59.5 else f"{seconds / 60:.1f} min"


def format_plan(plan: Plan) -> str:
    """The plan as printed before decoding: disk, time, memory and small objects, a few aligned lines."""
    gb = size_text
    disk = " · ".join(f"{k} {gb(v)}" for k, v in plan.disk.items() if v)
    already = plan.disk_total - plan.more_bytes
    lines = [f"Plan (projected on this machine before decoding; {plan.rundir / PLAN_FILE}):",
             f"  {'disk':<8} {gb(plan.disk_total)} in all" + (f", {gb(already)} of it already there" if already else "")
             + f"; {gb(plan.free)} free on {plan.rundir}",
             f"  {'':<8} {disk}",
             f"  {'time':<8} {_duration(plan.total_seconds)}: "
             + " · ".join(f"{k} {_duration(v)}" for k, v in plan.seconds.items()),
             f"  {'memory':<8} peak about {gb(plan.memory['peak'])} (training {gb(plan.memory['training'])}, "
             f"analysis {gb(plan.memory['analysis'])}), plus up to {gb(plan.memory['mapped'])} of mapped cache pages"]
    small = plan.small
    tiles = f" or its {small['tiles']} tiles (up to {small['tile_scale']:g}x)" if small.get("tiles") else ""
    text = (f"{small['share']:.0%} of the boxes ({small['small']}) are under {small['min_object_px']:g} px across in "
            f"the {small['image_size']} px view{tiles}")
    if small.get("small"):
        limit = "the view the time budget allows" if small.get("budget_limited") else "this view"
        text += (f", too small for the detector at {limit} (the crop models judge them at full resolution; lint and "
                 f"descriptors cover every box)")
        if "flag" in small:
            text += f"; {small['flag']} buys resolution: {small['cost']}"
        else:
            text += "; no larger view helps: they are that small in the files"
    lines.append(f"  {'small':<8} {text}")
    if not plan.fits:
        lines.append(f"  {'refused':<8} {gb(plan.more_bytes)} to write, {gb(plan.free)} free")
    return "\n".join(lines)


def write_plan(plan: Plan) -> Path:
    """Write ``RUNDIR/plan.json`` atomically."""
    from detdiff.atomic import write_json_atomic

    return write_json_atomic(plan.rundir / PLAN_FILE, plan.to_json())


def read_plan(rundir: str | Path) -> Plan:
    """The plan an audit wrote into ``rundir`` (``plan.json``)."""
    data = json.loads((Path(rundir) / PLAN_FILE).read_text())
    disk, seconds, memory = data["disk_bytes"], data["time_seconds"], dict(data["memory_bytes"])
    memory_basis = memory.pop("basis")
    return Plan(Path(rundir), int(data["image_size"]), int(data["num_images"]), disk["parts"],
                disk["basis"], disk["on_disk"], int(disk["free"]), seconds["parts"], seconds["basis"], memory,
                memory_basis, data["small_objects"], data["warmup"], data.get("cache_codec", "raw"))


def plan_and_check(dataset: CocoDataset, config: dict[str, Any], recipe: Recipe, rundir: Path) -> Plan:
    """Plan the audit, print and write the plan, and stop with one line when the disk cannot hold it."""
    plan = plan_audit(dataset, config, recipe, rundir)
    print(format_plan(plan), flush=True)
    write_plan(plan)
    if not plan.fits:
        raise InsufficientSpaceError(plan.refusal())
    return plan


#: Measured ``run.json`` timings of each projected stage.
MEASURED = {"decode": "cache_s", "detector": "train_s", "crop models": "crossfit_s", "evaluate": "evaluate_s",
            "analysis": "analysis_s", "report": "report_s"}


def projected_vs_measured(rundir: str | Path, timings: dict[str, float]) -> dict[str, Any]:
    """The plan's seconds beside the measured ones, over the stages that ran (for ``run.json``; {} without a plan)."""
    path = Path(rundir) / PLAN_FILE
    if not path.is_file():
        return {}
    projected = json.loads(path.read_text())["time_seconds"]["parts"]
    parts = {k: [round(float(v), 2), round(float(timings[MEASURED[k]]), 2)] for k, v in projected.items()
             if MEASURED.get(k) in timings}
    total_p, total_m = sum(p for p, _ in parts.values()), sum(m for _, m in parts.values())
    return {"parts": parts, "projected": round(total_p, 2), "measured": round(total_m, 2),
            "ratio": round(total_m / total_p, 3) if total_p else None}
