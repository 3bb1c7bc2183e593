"""The plan before work: disk parts against the files really written, free bytes against the OS, the small-object
share against the view geometry, ``audit --plan`` (no decoding), and the one-line refusal when the disk is short."""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from types import SimpleNamespace
from unittest import mock

import numpy as np
import pytest

from detdiff import cli
from detdiff import plan as plan_module
from detdiff.config import load_config
from detdiff.crossfit.crops import STORE
from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.image_cache import build_image_cache
from detdiff.data.scenarios import generate_demo
from detdiff.data.views import logged_view_sides, plan_tiles
from detdiff.plan import (PLAN_FILE, cache_disk_bytes, cache_options, format_plan, plan_audit, projected_vs_measured,
                          read_plan, tile_options, write_plan)
from detdiff.recipe import box_view_sides, fit_recipe

SIZE = 64


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """A 16-image demo at 128x96 px, its dataset, and the ci config resolved at a 64 px view."""
    root = tmp_path_factory.mktemp("plan")
    paths = generate_demo(root / "demo", num_images=16, seed=5, width=128, height=96, progress=False)
    dataset = build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)
    config = load_config("ci", {"data": {"image_size": SIZE}})
    config, recipe = fit_recipe(dataset, config, measure=False)
    return SimpleNamespace(paths=paths, dataset=dataset, config=config, recipe=recipe, root=root)


def _audit_argv(demo, out: Path, *extra: str) -> list[str]:
    return ["audit", str(demo.paths.annotations), "--images", str(demo.paths.images_dir), "--out", str(out),
            "--config", "ci", "--image-size", str(SIZE), "--quiet", *extra]


def test_cache_disk_bytes_is_what_the_cache_writes(demo, tmp_path):
    cache_dir = tmp_path / "cache"
    build_image_cache(demo.dataset, cache_dir, SIZE, progress=False, workers=1, **cache_options(demo.config))
    # the memory maps, from numpy's own arithmetic: uint8 [I, S, S, 3] views and [A, 64, 64, 3] crops
    views = np.zeros((demo.dataset.num_images, SIZE, SIZE, 3), np.uint8).nbytes
    crops = np.zeros((demo.dataset.num_annotations, STORE, STORE, 3), np.uint8).nbytes
    assert os.path.getsize(cache_dir / "images.u8") == views
    assert os.path.getsize(cache_dir / "crops.u8") == crops
    written = sum(p.stat().st_size for p in cache_dir.iterdir() if p.is_file())
    assert written <= cache_disk_bytes(demo.dataset, demo.config) <= written + 16 * 1024
    without_crops = {**demo.config, "crossfit": {**demo.config["crossfit"], "enabled": False}}
    assert cache_disk_bytes(demo.dataset, demo.config) - cache_disk_bytes(demo.dataset, without_crops) == crops


def test_plan_contents(demo, tmp_path):
    rundir = tmp_path / "run"
    rundir.mkdir()
    plan = plan_audit(demo.dataset, demo.config, demo.recipe, rundir)
    assert set(plan.disk) == {"image cache", "training log", "checkpoint", "evaluation", "cross-fit", "tables",
                              "report"}
    assert plan.disk["image cache"] == cache_disk_bytes(demo.dataset, demo.config)
    assert plan.disk_total == sum(plan.disk.values()) == plan.more_bytes          # nothing on disk yet
    assert abs(plan.free - shutil.disk_usage(rundir).free) < 64 * 2**20           # the OS's own figure
    assert set(plan.seconds) == {"decode", "detector", "crop models", "evaluate", "analysis", "report"}
    assert all(v > 0 for v in plan.seconds.values()) and set(plan.seconds_basis) == set(plan.seconds)
    assert plan.warmup["sample_images"] == 12 and plan.warmup["detector_step_s"] > 0
    assert plan.memory["peak"] >= plan.memory["training"] > plan.memory["process"] > 0
    # small objects: the share under min_object_px of sqrt(w h) * S / long side, as box_view_sides computes it
    sides = box_view_sides(demo.dataset, SIZE)
    rows = ~demo.dataset.iscrowd
    long_side = np.maximum(demo.dataset.widths, demo.dataset.heights)[demo.dataset.ann_image_index[rows]]
    assert np.allclose(sides, np.sqrt(demo.dataset.boxes[rows, 2] * demo.dataset.boxes[rows, 3]) * SIZE / long_side)
    px = float(demo.config["recipe"]["min_object_px"])
    # ... counted in the view that logs each box: a tile enlarges a small box, never shrinks it
    grid, owner = plan_tiles(demo.dataset, SIZE, tile_options(demo.config)["scale"], px)
    logged = logged_view_sides(demo.dataset, SIZE, grid, owner)
    assert np.all(logged >= sides - 1e-9)
    assert plan.small["small"] == int((logged < px).sum()) <= int((sides < px).sum())
    assert plan.small["share"] == pytest.approx((logged < px).mean(), abs=1e-4)
    whole_only = {**demo.config, "data": {**demo.config["data"], "tile_scale": 0.0}}
    assert plan_audit(demo.dataset, whole_only, demo.recipe, rundir).small["small"] == int((sides < px).sum()) > 0
    assert plan.small["flag"].startswith("--image-size ") and plan.small["larger_view"] > SIZE
    text = format_plan(plan)
    assert "--image-size" in text and f"{plan.small['share']:.0%} of the boxes" in text
    write_plan(plan)
    again = read_plan(rundir)
    assert again.to_json() == json.loads((rundir / PLAN_FILE).read_text()) == plan.to_json()


def test_warmup_times_detector_steps_without_saved_tensor_hooks(demo, tmp_path):
    # A saved-tensor hook (torch.autograd.graph.saved_tensors_hooks), even one that returns its tensor unchanged,
    # doubled a bfloat16 training step (measured on a streetcam sample: 0.31 s against 0.16 s): the warm-up measures
    # what a step keeps on one untimed step and times the others without a hook.
    import torch

    real = torch.autograd.graph.saved_tensors_hooks
    entered = []

    def counting(*args, **kwargs):
        entered.append(1)
        return real(*args, **kwargs)

    rundir = tmp_path / "run"
    rundir.mkdir()
    with mock.patch.object(torch.autograd.graph, "saved_tensors_hooks", counting):
        plan = plan_audit(demo.dataset, demo.config, demo.recipe, rundir)
    assert len(entered) == 1
    assert plan.warmup["activation_bytes"] > 0 and plan.warmup["detector_step_s"] > 0


def test_plan_counts_a_built_cache_as_there(demo, tmp_path):
    rundir = tmp_path / "run"
    build_image_cache(demo.dataset, rundir / "cache", SIZE, progress=False, workers=1, **cache_options(demo.config))
    plan = plan_audit(demo.dataset, demo.config, demo.recipe, rundir)
    on_disk = sum(p.stat().st_size for p in (rundir / "cache").iterdir())
    assert plan.on_disk["image cache"] == on_disk
    assert plan.more_bytes == plan.disk_total - on_disk
    assert plan.seconds["decode"] == 0.0 and plan.seconds_basis["decode"] == "a complete cache is there"


def test_audit_plan_flag_decodes_nothing(demo, tmp_path, capsys):
    out = tmp_path / "run"
    assert cli.main(_audit_argv(demo, out, "--plan")) == 0
    printed = capsys.readouterr().out
    assert "Plan (projected on this machine" in printed and "plan only" in printed
    saved = json.loads((out / PLAN_FILE).read_text())
    assert saved["disk_bytes"]["parts"]["image cache"] == cache_disk_bytes(demo.dataset, demo.config)
    assert (out / "findings.json").is_file() and (out / "recipe.json").is_file()
    for never in ("cache", "log", "checkpoint.pt", "crossfit", "run.json", "metrics.json"):
        assert not (out / never).exists(), never


def test_refusal_when_the_disk_is_too_small(demo, tmp_path, monkeypatch, capsys):
    out = tmp_path / "run"
    usage = SimpleNamespace(disk_usage=lambda path: shutil._ntuple_diskusage(10**6, 10**6 - 1000, 1000))
    monkeypatch.setattr(plan_module, "shutil", usage)             # only the plan sees a nearly full disk
    assert cli.main(_audit_argv(demo, out)) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert str(out) in err and "--image-size" in err and "--out" in err and "1 kB are free" in err
    assert (out / "findings.json").is_file() and (out / PLAN_FILE).is_file()   # what was computed stays
    assert not (out / "cache").exists()


def test_projected_vs_measured(tmp_path):
    (tmp_path / PLAN_FILE).write_text(json.dumps({"time_seconds": {"parts": {
        "decode": 2.0, "detector": 10.0, "crop models": 6.0, "evaluate": 1.0, "analysis": 1.0, "report": 3.0}}}))
    timings = {"check_s": 0.1, "recipe_s": 5.0, "cache_s": 3.0, "train_s": 12.0, "evaluate_s": 1.0,
               "crossfit_s": 6.0, "analysis_s": 2.0}                   # no report: --no-report
    got = projected_vs_measured(tmp_path, timings)
    assert got["projected"] == 20.0 and got["measured"] == 24.0 and got["ratio"] == 1.2
    assert "report" not in got["parts"] and got["parts"]["detector"] == [10.0, 12.0]
    assert projected_vs_measured(tmp_path / "none", timings) == {}


def test_api_plan_audit_stops_after_the_plan(tmp_path):
    import detdiff

    with mock.patch("detdiff.pipeline.run_audit") as run, mock.patch("detdiff.plan.read_plan") as read:
        got = detdiff.plan_audit("a.json", "imgs", tmp_path, budget=3, flips="none")
    assert run.call_args.kwargs["plan_only"] is True and got is read.return_value
    assert run.call_args.kwargs["overrides"]["recipe"]["budget_minutes"] == 3


def test_refusal_names_the_view_that_fits(tmp_path):
    views = {side: 3 * side * side * 100 for side in (128, 256)}              # 100 images, uint8 RGB views
    plan = plan_module.Plan(tmp_path, 256, 100, disk={"image cache": views[256] + 5000, "training log": 7000},
                            on_disk={"image cache": 0, "training log": 0}, free=views[128] + 12_000 + 500)
    assert not plan.fits and plan.fitting_view() == 128
    line = plan.refusal()
    assert "--image-size 128 would fit" in line and str(tmp_path) in line and "--out" in line
    plan.free = 12_000 - 1                                                      # not even the other parts fit
    assert plan.fitting_view() is None and "no smaller --image-size fits" in plan.refusal()
