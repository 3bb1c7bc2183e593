"""The audit as plain functions: check → image cache → train + log → evaluate → cross-fit → analysis → report.

Each stage writes its results into the run folder before the next starts, so a failure later on loses
nothing already computed, and ``detdiff analyze`` / ``detdiff report`` can redo the later stages alone.
Each runs inside :func:`detdiff.stages.stage`, which names its folder when the disk fills; an audit first
removes the temporary files an interrupted run left (:mod:`detdiff.leftovers`).
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from detdiff import __version__
from detdiff.atomic import write_json_atomic
from detdiff.config import FLIP_CHOICES, ConfigError, load_config, load_saved_config, save_config
from detdiff.data.coco import CocoDataset, build_dataset, load_saved_dataset, read_coco_json, save_dataset
from detdiff.leftovers import leftovers_line, remove_leftovers
from detdiff.stages import DISK_FULL_ERRNOS, stage

DATASET_FILE = "dataset.npz"
RECIPE_FILE = "recipe.json"


class RunFolderError(RuntimeError):
    """The run folder cannot be used (not writable, not a run folder, or from another dataset)."""


@dataclass
class AuditResult:
    """Where an audit left its results."""

    rundir: Path
    report: Path | None
    metrics: dict[str, Any]
    summary: str


def prepare_rundir(rundir: Path) -> None:
    """Create the run folder and prove it is writable before any long work starts."""
    try:
        rundir.mkdir(parents=True, exist_ok=True)
        probe = rundir / f".write-probe-{os.getpid()}"
        probe.write_bytes(b"x" * 4096)
        probe.unlink()
    except OSError as exc:
        if exc.errno in DISK_FULL_ERRNOS:
            raise                               # the disk is full: said as such by detdiff.stages
        raise RunFolderError(f"{rundir}: output folder is not writable ({exc.strerror or exc})") from exc


def ingest(annotations: str | Path, images_dir: str | Path, rundir: Path, config: dict,
           *, verify_images: bool = False) -> CocoDataset:
    """Lint the annotation file, keep the findings, and build the dataset of usable records."""
    from detdiff.data.lint import lint_coco

    data = read_coco_json(annotations)
    report = lint_coco(annotations, images_dir, verify_images=verify_images, data=data)
    write_json_atomic(rundir / "findings.json", report.to_json(max_per_code=1000))
    dataset = build_dataset(data, ann_path=Path(annotations).resolve(), images_dir=Path(images_dir).resolve(),
                            drop_image_ids=report.error_image_ids(), drop_ann_ids=report.error_annotation_ids(),
                            min_box_side=float(config["data"]["min_box_side"]))
    if dataset.num_images == 0:
        raise RunFolderError(f"{annotations}: no usable image records (see {rundir / 'findings.json'})")
    if dataset.num_classes == 0:
        raise RunFolderError(f"{annotations}: no usable categories (see {rundir / 'findings.json'})")
    save_dataset(dataset, rundir / DATASET_FILE)
    return dataset


def load_run(rundir: str | Path) -> tuple[CocoDataset, dict]:
    """The dataset and config that a finished (or interrupted) audit used."""
    rundir = Path(rundir)
    if not (rundir / DATASET_FILE).exists() or not (rundir / "config.yaml").exists():
        raise RunFolderError(f"{rundir}: not a detdiff run folder (no {DATASET_FILE} / config.yaml); "
                             f"run 'detdiff audit' first")
    return load_saved_dataset(rundir / DATASET_FILE), load_saved_config(rundir / "config.yaml")


def analyze(rundir: str | Path, dataset: CocoDataset | None = None, config: dict | None = None):
    """Turn the training log into the tables (images, objects, suspects, classes, causes) and write them."""
    from detdiff.analysis.tables import analyze_run, write_tables

    rundir = Path(rundir)
    if dataset is None or config is None:
        dataset, config = load_run(rundir)
    with stage("analysis", rundir):
        tables = analyze_run(rundir, dataset, config)
    with stage("tables", rundir):
        write_tables(tables, rundir, dataset)
    return tables


def report(rundir: str | Path, *, top: int | None = None, thumbnails: bool | None = None,
           config: dict | None = None) -> Path:
    """Write the HTML report and the PNG plots of a run folder."""
    from detdiff.report.html import write_report

    rundir = Path(rundir)
    if config is None:
        _, config = load_run(rundir)
    rcfg = config["report"]
    with stage("report", rundir, "report"):
        return write_report(rundir, top=int(top if top is not None else rcfg["top"]),
                            thumbnails=bool(rcfg["thumbnails"] if thumbnails is None else thumbnails),
                            thumbnail_size=int(rcfg["thumbnail_size"]))


def cross_fit_run(dataset: CocoDataset, trained: CocoDataset, cache, config: dict, rundir: Path, *,
                  progress: bool = True):
    """Cross-fit the crop models (``RUNDIR/crossfit/``) with the run's thread count; every scorable box carries
    a virtual box probe, and every place where the detector saw an unannotated object is judged too (its crop cut
    from the image again: :mod:`detdiff.crossfit.places`)."""
    import torch

    from detdiff.analysis.suspects import unannotated_places
    from detdiff.crossfit.folds import cross_fit
    from detdiff.crossfit.places import place_crops, place_crops_path
    from detdiff.data.probes import box_probes
    from detdiff.train.resources import thread_count

    if cache.crops is None:
        raise RunFolderError(f"{cache.cache_dir}: the image cache holds no object crops; run the audit again")
    seed = int(config["train"]["seed"])
    scorable = np.flatnonzero(~dataset.iscrowd & cache.usable[dataset.ann_image_index])
    probe_rows, probe_boxes = box_probes(dataset, scorable, seed)
    missing_rows = np.flatnonzero(trained.iscrowd & ~dataset.iscrowd)
    places = pd.concat(unannotated_places(dataset, rundir, missing_rows, config))
    threads = thread_count(config["train"])
    store = place_crops_path(rundir / "crossfit")
    store.parent.mkdir(parents=True, exist_ok=True)
    saved = torch.get_num_threads()
    try:
        places = place_crops(dataset, places["image_index"].to_numpy(np.int64),
                             places[["suggested_x", "suggested_y", "suggested_w", "suggested_h"]].to_numpy(np.float64),
                             max_pixels=int(config["data"]["max_pixels"]), threads=threads, progress=progress,
                             store=store)
        torch.set_num_threads(threads)
        return cross_fit(dataset, trained, cache.crops, cache.usable, probe_rows, probe_boxes, config, rundir,
                         places=places, progress=progress)
    finally:
        torch.set_num_threads(saved)
        del places
        store.unlink(missing_ok=True)


def time_limit_line(epochs_done: int, epochs_planned: int, config: dict) -> str:
    """What the time limit did to the detector's training, for the terminal."""
    limit = float(config["train"]["time_limit"])
    return (f"detdiff: training ended after {epochs_done} of {epochs_planned} epochs to stay within "
            f"train.time_limit {limit:g} min (the epochs ran slower than the recipe timed them; the learning-rate "
            f"schedule was re-fitted to the shorter run)")


def run_overrides(*, image_size: int | None = None, epochs: int | None = None, batch_size: int | None = None,
                  device: str | None = None, seed: int | None = None, threads: int | None = None,
                  flips: str | None = None, budget: float | None = None, cache_codec: str | None = None) -> dict:
    """Config overrides from the command line or the API (``None`` = keep the config file's value)."""
    if flips is not None and flips not in FLIP_CHOICES:
        raise ConfigError(f"flips must be one of {', '.join(FLIP_CHOICES)}, got {flips!r}")
    return {"data": {"image_size": image_size, "cache_codec": cache_codec},
            "train": {"epochs": epochs, "batch_size": batch_size, "device": device, "seed": seed,
                      "threads": threads, "flips": flips},
            "recipe": {"budget_minutes": budget}}


def _resolve_config(rundir: Path, config_path: str | Path | None, overrides: dict, resume: bool) -> dict:
    """The config of this run: on ``--resume`` the saved one (only ``--epochs`` may extend it)."""
    saved = rundir / "config.yaml"
    if not (resume and saved.exists()):
        return load_config(config_path, overrides)
    config = load_saved_config(saved)
    epochs = overrides.get("train", {}).get("epochs")
    if epochs is not None:
        config["train"]["epochs"] = int(epochs)
    if config_path is not None or any(v is not None for sec, kv in overrides.items() for k, v in kv.items()
                                      if (sec, k) != ("train", "epochs")):
        print(f"detdiff: --resume keeps the settings saved in {saved}; only --epochs is taken from the "
              f"command line", file=sys.stderr)
    return config


def _saved_recipe(rundir: Path, config: dict):
    """The recipe an interrupted run fitted (``recipe.json``), if the config resumed with still has its values."""
    from detdiff.recipe import Recipe

    path = rundir / RECIPE_FILE
    if not (path.is_file() and (rundir / "config.yaml").is_file()):
        return None
    saved = json.loads(path.read_text())
    recipe = Recipe(saved["settings"], saved["reasons"], saved["estimate_seconds"], saved["traded"], saved["notes"])
    for key, value in recipe.settings.items():
        section, name = key.split(".")
        if config[section].get(name) != value:
            return None
    return recipe


def _prepare_main(annotations: str | Path, images_dir: str | Path, rundir: Path, config: dict, resume: bool,
                  progress: bool, timings: dict[str, float]):
    """Main process only: folder, lint + ingest, recipe, config and plan (each written to ``rundir``)."""
    from detdiff.plan import plan_and_check
    from detdiff.recipe import fit_recipe, format_recipe

    t0 = time.perf_counter()
    with stage("check", rundir):
        prepare_rundir(rundir)
        removed, freed = remove_leftovers(rundir)
        if removed:
            print(leftovers_line(rundir, removed, freed), file=sys.stderr, flush=True)
        if not resume:
            for stale in ("log", "checkpoint.pt", "crossfit"):
                target = rundir / stale
                if target.is_dir():
                    shutil.rmtree(target)
                elif target.exists():
                    target.unlink()
        dataset = ingest(annotations, images_dir, rundir, config)
        timings["check_s"] = time.perf_counter() - t0
        recipe = _saved_recipe(rundir, config) if resume else None
        if recipe is None:
            config, recipe = fit_recipe(dataset, config, measure=True)
            write_json_atomic(rundir / RECIPE_FILE, recipe.to_json())
        print(format_recipe(recipe), flush=True)
        save_config(config, rundir / "config.yaml")
        plan_and_check(dataset, config, recipe, rundir)     # prints, writes plan.json; refuses a disk too small
    timings["recipe_s"] = time.perf_counter() - t0 - timings["check_s"]
    return dataset, config


def _build_cache(dataset: CocoDataset, rundir: Path, config: dict, dist, progress: bool):
    """The image cache (stage ``decode``): built by this process, or under torchrun by every rank, one shard each,
    which the main rank joins (``detdiff.data.cache_shards``: the run folder must be on a filesystem every machine
    shares). Either way through the resumable :func:`detdiff.data.image_cache.build_image_cache`. A failure on any
    rank stops every rank with the same error."""
    from detdiff.data.image_cache import build_image_cache
    from detdiff.plan import cache_disk_bytes, cache_options

    size, cache_dir = int(config["data"]["image_size"]), rundir / "cache"
    options = cache_options(config)
    with stage("decode", rundir, "cache", cache_disk_bytes(dataset, config)):
        if not dist.distributed:
            return build_image_cache(dataset, cache_dir, size, progress=progress, **options)
        return _build_cache_shards(dataset, cache_dir, size, options, dist, progress)


def _build_cache_shards(dataset: CocoDataset, cache_dir: Path, size: int, options: dict, dist, progress: bool):
    """Under torchrun: each rank decodes its shard, the main rank joins them (see :func:`_build_cache`)."""
    from detdiff.data.cache_shards import build_cache_shard, merge_cache_shards
    from detdiff.data.image_cache import ImageCache, current_cache
    from detdiff.train.distributed import all_gather_object, broadcast_object
    from detdiff.train.resources import available_cores

    if broadcast_object(dist.is_main and current_cache(dataset, cache_dir, size, **options) is not None, dist):
        return ImageCache.open(cache_dir)
    workers = max(1, available_cores() // int(os.environ.get("LOCAL_WORLD_SIZE", "1")))
    steps = (("decoding its share of the image cache",
              lambda: build_cache_shard(dataset, cache_dir, size, dist.rank, dist.world_size, workers=workers,
                                        progress=progress and dist.is_main, **options)),
             ("joining the image cache shards",
              lambda: merge_cache_shards(dataset, cache_dir, size, dist.world_size, **options) if dist.is_main
              else None))
    for what, step in steps:
        failure = None
        try:
            step()
        except BaseException as exc:        # re-raised below, after every rank has heard of it
            failure = exc
        messages = all_gather_object(None if failure is None else f"{type(failure).__name__}: {failure}", dist)
        if failure is not None:
            raise failure
        failed = [f"rank {k} ({m})" for k, m in enumerate(messages) if m is not None]
        if failed:
            raise RunFolderError(f"{what} failed on {', '.join(failed)}")
    return ImageCache.open(cache_dir)


def run_audit(annotations: str | Path, images_dir: str | Path, rundir: str | Path, *,
              config_path: str | Path | None = None, overrides: dict | None = None, resume: bool = False,
              progress: bool = True, make_report: bool = True, top: int | None = None,
              thumbnails: bool | None = None, plan_only: bool = False) -> AuditResult:
    """Run the whole audit into ``rundir`` and return where the results are (``plan_only``: stop after the plan,
    :mod:`detdiff.plan`, before decoding anything).

    With ``torchrun`` every process calls this; only the main process lints, evaluates, analyses and reports;
    every process decodes its share of the image cache and trains its share of each epoch. A failure on the
    main process before training is passed to the others, so no process waits forever.
    """
    from detdiff.data.probes import PROBES_FILE, plant_missing_probes, probes_record, training_copy
    from detdiff.plan import projected_vs_measured
    from detdiff.train.distributed import all_true, barrier, broadcast_object, init_distributed, shutdown
    from detdiff.train.evaluate import final_pass
    from detdiff.train.loop import train_and_log
    from detdiff.train.resources import log_bytes

    rundir = Path(rundir)
    config = _resolve_config(rundir, config_path, overrides or {}, resume)
    dist = init_distributed(config["train"]["device"])
    timings: dict[str, float] = {}
    failure: BaseException | None = None
    if dist.is_main:
        try:
            dataset, config = _prepare_main(annotations, images_dir, rundir, config, resume, progress, timings)
        except BaseException as exc:            # re-raised below, after the other processes are told
            failure = exc
    message = broadcast_object(None if failure is None else str(failure), dist)
    if failure is not None:
        raise failure
    if message is not None:
        raise RunFolderError(f"main process stopped before training: {message}")
    if plan_only:
        shutdown()
        return AuditResult(rundir, None, {}, "")
    barrier()
    if not all_true((rundir / DATASET_FILE).is_file(), dist):
        raise RunFolderError(f"{rundir}: not visible to every process; with several machines the run folder (and "
                             f"the images) must be on a filesystem that all of them mount at the same path")
    if not dist.is_main:
        dataset = load_saved_dataset(rundir / DATASET_FILE)
        config = load_saved_config(rundir / "config.yaml")       # the recipe's resolved values
    t_cache = time.perf_counter()
    cache = _build_cache(dataset, rundir, config, dist, progress)
    timings["cache_s"] = time.perf_counter() - t_cache
    missing_probes = plant_missing_probes(dataset, config["probes"], int(config["train"]["seed"]))
    trained = training_copy(dataset, missing_probes)
    t1 = time.perf_counter()
    with stage("train", rundir, "log", log_bytes(dataset, config)):
        if dist.is_main:
            write_json_atomic(rundir / PROBES_FILE, probes_record(dataset, missing_probes))
        result = train_and_log(trained, cache, config, rundir, resume=resume, progress=progress and dist.is_main)
    timings["train_s"] = time.perf_counter() - t1
    if dist.is_main and result.epochs_done < result.epochs_planned:
        print(time_limit_line(result.epochs_done, result.epochs_planned, config), file=sys.stderr, flush=True)
    shutdown()                                   # evaluation, analysis and report run on the main process only
    if not dist.is_main:
        return AuditResult(rundir, None, {}, "")

    t2 = time.perf_counter()
    with stage("evaluate", rundir):
        metrics = final_pass(result.model, dataset, cache, config, rundir)
    timings["evaluate_s"] = time.perf_counter() - t2
    if config["crossfit"]["enabled"]:
        t_fit = time.perf_counter()
        with stage("crossfit", rundir, "crossfit"):
            cross_fit_run(dataset, trained, cache, config, rundir, progress=progress)
        timings["crossfit_s"] = time.perf_counter() - t_fit
    run_info = {
        "detdiff_version": __version__, "annotations": str(Path(annotations).resolve()),
        "images_dir": str(Path(images_dir).resolve()), "num_images": dataset.num_images,
        "num_annotations": int((~dataset.iscrowd).sum()), "num_crowd": int(dataset.iscrowd.sum()),
        "num_categories": dataset.num_classes, "num_usable_images": int(cache.usable.sum()),
        "unusable_images": cache.problems, "config": config, "device": str(result.device),
        "world_size": dist.world_size, "epochs_done": result.epochs_done,
        "epochs_planned": result.epochs_planned,
        "train_seconds": result.seconds, "images_per_second": result.images_per_second,
        "data_loading_share": result.data_share, "timings": timings,
    }
    with stage("summary", rundir):
        write_json_atomic(rundir / "run.json", run_info)
    t3 = time.perf_counter()
    tables = analyze(rundir, dataset, config)
    timings["analysis_s"] = time.perf_counter() - t3
    if tables.self_check:
        run_info["self_check"] = tables.self_check
    report_path = None
    if make_report:
        t4 = time.perf_counter()
        report_path = report(rundir, top=top, thumbnails=thumbnails, config=config)
        timings["report_s"] = time.perf_counter() - t4
    run_info["timings"] = timings
    run_info["plan_seconds"] = projected_vs_measured(rundir, timings)
    with stage("summary", rundir):
        write_json_atomic(rundir / "run.json", run_info)
    from detdiff.report.summary import terminal_summary

    return AuditResult(rundir, report_path, metrics, terminal_summary(rundir))
