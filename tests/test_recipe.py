"""The recipe fitted to a dataset: view size, dimension clusters, epochs, and the time budget."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from detdiff.config import ConfigError, load_config
from detdiff.data.coco import CocoDataset
from detdiff.recipe import (box_view_sides, budget_seconds, choose_view_size, dimension_clusters, fit_recipe,
                            format_recipe, scaled_epochs)


def _dataset(boxes_wh: np.ndarray, size: tuple[int, int] = (640, 480), per_image: int = 10) -> CocoDataset:
    n = len(boxes_wh)
    images = int(np.ceil(n / per_image))
    rng = np.random.default_rng(0)
    xy = rng.uniform(0, 1, (n, 2)) * (np.array(size) - boxes_wh)
    return CocoDataset(
        image_ids=np.arange(1, images + 1), file_names=[f"{i}.jpg" for i in range(images)],
        widths=np.full(images, size[0]), heights=np.full(images, size[1]), category_ids=np.array([1, 2]),
        category_names=["a", "b"], supercategories=["x", "x"], ann_ids=np.arange(1, n + 1),
        ann_image_index=np.arange(n) // per_image, labels=np.arange(n) % 2,
        boxes=np.concatenate([xy, boxes_wh], axis=1).astype(np.float64), areas=boxes_wh.prod(axis=1).astype(float),
        iscrowd=np.zeros(n, bool))


def test_dimension_clusters_find_the_three_box_shapes() -> None:
    # Three well-separated shapes with 5% jitter: k-means with the 1 - IoU distance (YOLO9000, Redmon &
    # Farhadi, CVPR 2017) must put one centre on each, sorted by area.
    rng = np.random.default_rng(1)
    shapes = np.array([[8.0, 8.0], [40.0, 20.0], [30.0, 90.0]])
    wh = np.repeat(shapes, 200, axis=0) * rng.uniform(0.95, 1.05, (600, 2))
    centres = dimension_clusters(wh, 3)
    assert np.allclose(centres, shapes, rtol=0.06)


def test_view_size_brings_the_wanted_share_of_boxes_to_the_target() -> None:
    cfg = load_config()["recipe"]
    wh = np.repeat([[20.0, 20.0], [60.0, 60.0]], [300, 700], axis=0)           # 30% small boxes in 640 px images
    ds = _dataset(wh)
    size, reason = choose_view_size(ds, {**cfg, "object_quantile": 0.8, "min_object_px": 16, "max_view": 640})
    assert size % 32 == 0
    # 80% of the boxes must reach 16 px: the small ones need 16 * 640 / 20 = 512 px
    assert size == 512 and (box_view_sides(ds, size) >= 16).mean() >= 0.8
    assert (box_view_sides(ds, size - 32) >= 16).mean() < 0.8
    assert "512" in reason
    capped, _ = choose_view_size(ds, {**cfg, "object_quantile": 0.8, "min_object_px": 16, "max_view": 320})
    assert capped == 320


def test_epochs_shrink_with_the_dataset() -> None:
    assert scaled_epochs(1000, 1000, 30, 8, 60) == 30
    assert scaled_epochs(250, 1000, 30, 8, 60) == 60
    assert scaled_epochs(100_000, 1000, 30, 8, 60) == 8


def test_fit_recipe_resolves_auto_and_keeps_explicit_values() -> None:
    wh = np.random.default_rng(2).uniform(15, 80, (400, 2))
    ds = _dataset(wh)
    config = load_config()
    resolved, recipe = fit_recipe(ds, config, measure=False)
    assert isinstance(resolved["data"]["image_size"], int) and isinstance(resolved["train"]["epochs"], int)
    shapes = resolved["model"]["anchor_shapes"]
    assert len(shapes) == len(resolved["model"]["strides"]) and all(len(level) == 3 for level in shapes)
    assert set(recipe.reasons) >= {"data.image_size", "train.epochs", "crossfit.epochs", "model.anchor_shapes"}
    assert "Recipe" in format_recipe(recipe)
    explicit = load_config(overrides={"data": {"image_size": 224}, "train": {"epochs": 5}})
    kept, recipe2 = fit_recipe(ds, explicit, measure=False)
    assert kept["data"]["image_size"] == 224 and kept["train"]["epochs"] == 5
    assert recipe2.reasons["train.epochs"].startswith("given")
    for key in ("crossfit.precision", "train.precision"):
        section, name = key.split(".")
        assert resolved[section][name] == "float32"                   # auto without timed steps
        assert recipe.reasons[key].startswith("float32: no timed steps")


@pytest.mark.parametrize("key", ["crossfit.precision", "train.precision"])
def test_precision_is_timed_and_bad_values_are_refused(key: str) -> None:
    section, name = key.split(".")
    ds = _dataset(np.random.default_rng(6).uniform(15, 80, (200, 2)))
    config = load_config(overrides={"recipe": {"budget_minutes": 1}})
    resolved, recipe = fit_recipe(ds, config, measure=True)
    chosen, reason = resolved[section][name], recipe.reasons[key]
    assert chosen in ("float32", "bfloat16") and reason.startswith(chosen) and "x;" in reason
    assert recipe.settings[key] == chosen
    kept, _ = fit_recipe(ds, load_config(overrides={section: {name: "bfloat16"}}), measure=False)
    assert kept[section][name] == "bfloat16"
    with pytest.raises(ConfigError, match=f"{key} must be one of auto, float32, bfloat16"):
        fit_recipe(ds, load_config(overrides={section: {name: "fp16"}}), measure=False)


def test_auto_budget_counts_images_their_tiles_and_boxes() -> None:
    cfg = load_config()["recipe"]
    per_image, per_box = float(cfg["seconds_per_image"]), float(cfg["seconds_per_box"])
    # 800 images, half of them tiled, 10,000 boxes: 800 x 1.5 image-units plus 10,000 boxes
    assert budget_seconds(cfg, 800, 0.5, 10_000) == pytest.approx(per_image * 1200 + per_box * 10_000)
    assert budget_seconds(cfg, 1, 0.0, 1) == 60.0 * float(cfg["min_budget_minutes"])          # the floor
    assert budget_seconds({**cfg, "budget_minutes": 7}, 800, 0.5, 10_000) == 420.0                # explicit wins


def test_crop_estimate_covers_the_folds_steps_and_predictions() -> None:
    # Boxes 4x those of another set: the crop models' estimate grows with both their training steps (epochs x
    # boxes) and their predictions (every box and its box probe, and up to crossfit.places_per_image places in each
    # of the 60 images), each at the timed seconds the recipe saves.
    wh = np.random.default_rng(5).uniform(15, 80, (600, 2))
    config = load_config(overrides={"recipe": {"budget_minutes": 600}, "crossfit": {"epochs": 2}})
    _, recipe = fit_recipe(_dataset(wh), config, measure=True)
    est = recipe.estimate
    assert est["crop_step_s"] > 0 and est["crop_predict_s_per_box"] > 0
    steps = 3 * int(np.ceil(600 * 2 / 3 / 128))                        # three folds, one epoch each
    places = int(config["crossfit"]["places_per_image"]) * 60
    predictions = (2 * 600 + places) * est["crop_predict_s_per_box"]
    assert est["crop_models_s"] == pytest.approx(2 * steps * est["crop_step_s"] + predictions, rel=1e-3, abs=0.2)


def test_budget_bounds_the_whole_audit(monkeypatch: pytest.MonkeyPatch) -> None:
    # The stages outside training (decode, final pass, analysis, report) are projected first and the training gets
    # the rest of the budget; when they would take most of it the training still keeps MIN_TRAINING_SHARE.
    from detdiff import recipe as recipe_module

    wh = np.random.default_rng(6).uniform(15, 80, (400, 2))
    config = load_config(overrides={"recipe": {"budget_minutes": 2, "min_budget_minutes": 0}})
    _, recipe = fit_recipe(_dataset(wh), config, measure=True)
    est = recipe.estimate
    assert est["budget_s"] == 120.0 and est["other_stages_s"] > 0
    assert est["training_budget_s"] == pytest.approx(120.0 - est["other_stages_s"], abs=0.1)
    assert any("whole audit" in n and "for training" in n for n in recipe.notes), recipe.notes
    assert "of it for training" in format_recipe(recipe)
    monkeypatch.setattr(recipe_module, "other_stage_seconds", lambda *args: 110.0)
    _, recipe = fit_recipe(_dataset(wh), config, measure=True)
    assert recipe.estimate["training_budget_s"] == pytest.approx(120.0 * recipe_module.MIN_TRAINING_SHARE)
    assert any("the audit will take longer" in n for n in recipe.notes), recipe.notes


def _one_second_steps(monkeypatch: pytest.MonkeyPatch, crossfit: dict) -> tuple[Any, CocoDataset, dict]:
    """Every timed step 1 s and the stages outside training none (monkeypatched), so the arithmetic is exact: the
    recipe module, 400 boxes of 40-80 px in 40 images, and overrides for a 200 s budget at a 256 px view without tiles
    (``crossfit`` added to the crop models' section)."""
    from detdiff import recipe as recipe_module

    monkeypatch.setattr(recipe_module, "measure_step_seconds", lambda *args, **kwargs: 1.0)
    monkeypatch.setattr(recipe_module, "measure_crop_seconds", lambda *args, **kwargs: (1.0, 0.0))
    monkeypatch.setattr(recipe_module, "other_stage_seconds", lambda *args: 0.0)
    overrides = {"recipe": {"budget_minutes": 200 / 60, "min_budget_minutes": 0},
                 "data": {"image_size": 256, "tile_scale": 0}, "train": {"precision": "float32"},
                 "crossfit": {"precision": "float32", **crossfit}}
    return recipe_module, _dataset(np.random.default_rng(7).uniform(40, 80, (400, 2))), overrides


def test_time_the_detector_leaves_goes_back_to_the_crop_models(monkeypatch: pytest.MonkeyPatch) -> None:
    # Steps timed at 1 s each (monkeypatched) make the arithmetic exact: 200 s of training, the crop models capped at
    # 40% (80 s: 8.8 of 9-step epochs), the detector's epochs cut in steps of 0.8 to fit the other 120 s; what that
    # leaves is spent on more crop-model epochs, and the total stays within the budget.
    _, dataset, overrides = _one_second_steps(monkeypatch, {"folds": 3})
    config = load_config(overrides=overrides)
    resolved, recipe = fit_recipe(dataset, config, measure=True)
    est, epochs = recipe.estimate, resolved["crossfit"]["epochs"]
    assert est["crop_step_s"] == 1.0 and resolved["train"]["epochs"] < config["recipe"]["max_epochs"]
    assert 80 / 9 < epochs <= config["recipe"]["max_crop_epochs"]
    assert est["crop_models_s"] == pytest.approx(9 * epochs)
    assert est["detector_training_s"] + est["crop_models_s"] <= 200.0
    assert est["detector_training_s"] + est["crop_models_s"] > 200.0 - 9 * 0.1 - 1e-6        # nothing left unused
    assert any("left over" in n for n in recipe.notes), recipe.notes
    # the detector's share of the budget bounds its training: 200 s less the crop models' estimate, in minutes
    assert resolved["train"]["time_limit"] == pytest.approx(round((200.0 - est["crop_models_s"]) / 60, 1))
    assert recipe.settings["train.time_limit"] == resolved["train"]["time_limit"]
    overrides["train"]["epochs"] = 5                      # epochs given: they are not cut for time
    pinned, pinned_recipe = fit_recipe(dataset, load_config(overrides=overrides), measure=True)
    assert pinned["train"]["time_limit"] == "none" and "given" in pinned_recipe.reasons["train.time_limit"]


def test_a_cut_budget_gives_the_crop_models_two_folds_and_twice_the_epochs(monkeypatch: pytest.MonkeyPatch) -> None:
    # Steps timed at 1 s each (monkeypatched): 400 boxes in batches of 128 make an epoch of three folds 3 x 3 steps
    # (each model trains on 267 boxes) and one of two folds 2 x 2 steps (200 boxes each). The crop models' 40% of
    # 200 s buys 8.9 epochs of three folds, 20 of two; the 30 wanted do not fit either way.
    recipe_module, dataset, overrides = _one_second_steps(monkeypatch, {"batch_size": 128})
    resolved, recipe = fit_recipe(dataset, load_config(overrides=overrides), measure=True)
    assert resolved["crossfit"]["folds"] == 2 and recipe.settings["crossfit.folds"] == 2
    assert recipe_module.crop_epoch_seconds(2, 400, 128, 1.0) == 4.0
    assert recipe_module.crop_epoch_seconds(3, 400, 128, 1.0) == 9.0
    assert resolved["crossfit"]["epochs"] >= 20.0
    assert recipe.estimate["crop_models_s"] == pytest.approx(4 * resolved["crossfit"]["epochs"])
    assert "crossfit.folds 3 -> 2 for the budget" in recipe.traded
    assert "8.9 epochs of 3 folds" in recipe.reasons["crossfit.folds"], recipe.reasons["crossfit.folds"]
    overrides["crossfit"]["folds"] = 3                       # a number given is kept
    kept, recipe3 = fit_recipe(dataset, load_config(overrides=overrides), measure=True)
    assert kept["crossfit"]["folds"] == 3 and 80 / 9 <= kept["crossfit"]["epochs"] < 20.0
    assert not any(t.startswith("crossfit.folds") for t in recipe3.traded)
    overrides["crossfit"].update(folds="auto", epochs=6)     # pinned epochs pin the crop models' work: three folds
    pinned, _ = fit_recipe(dataset, load_config(overrides=overrides), measure=True)
    assert pinned["crossfit"]["folds"] == 3 and pinned["crossfit"]["epochs"] == 6


def test_budget_trades_the_view_first_then_epochs_and_says_so() -> None:
    wh = np.random.default_rng(3).uniform(15, 80, (400, 2))
    ds = _dataset(wh)
    config = load_config(overrides={"recipe": {"budget_minutes": 0.0001, "max_view": 256, "min_budget_minutes": 0}})
    resolved, recipe = fit_recipe(ds, config, measure=True)
    keys = [t.split()[0] for t in recipe.traded]     # crop models first, then the detector's view, its epochs, tiles
    assert keys == ["crossfit.folds", "crossfit.epochs", "data.image_size", "train.epochs", "data.tile_scale"], \
        recipe.traded
    assert resolved["crossfit"]["folds"] == 2
    assert resolved["data"]["tile_scale"] == 0
    assert resolved["data"]["image_size"] == config["recipe"]["min_view"]
    assert resolved["train"]["epochs"] == config["recipe"]["min_epochs"]
    assert resolved["crossfit"]["epochs"] == config["recipe"]["min_crop_epochs"]
    assert recipe.notes and "budget" in recipe.notes[0]
    assert recipe.estimate["detector_step_s"] > 0


def test_time_left_over_enlarges_the_view_within_the_budget() -> None:
    # Large boxes need only the smallest view; with a generous budget the view grows (up to max_view), and with
    # a budget that the wanted view already fills it stays where the boxes put it.
    wh = np.random.default_rng(4).uniform(120, 200, (400, 2))
    ds = _dataset(wh)
    wanted, _ = choose_view_size(ds, load_config()["recipe"])
    roomy = load_config(overrides={"recipe": {"budget_minutes": 600, "max_view": 320}})
    resolved, recipe = fit_recipe(ds, roomy, measure=True)
    assert wanted == 192 and resolved["data"]["image_size"] == 320
    assert "enlarged from 192" in recipe.reasons["data.image_size"] and not recipe.traded
    tight = load_config(overrides={"recipe": {"budget_minutes": 0.0001, "min_budget_minutes": 0}})
    resolved, _ = fit_recipe(ds, tight, measure=True)
    assert resolved["data"]["image_size"] == wanted


def test_tiles_for_small_boxes_fit_the_budget_before_epochs() -> None:
    # 12 px boxes in 4000 x 3000 photos are about 1 px in any view the recipe allows: with time to spare the recipe
    # cuts tiles at the largest scale that fits (8 px boxes reach 16 px at 2x), trading epochs for them first.
    wh = np.random.default_rng(5).uniform(10, 14, (400, 2))
    ds = _dataset(wh, size=(4000, 3000), per_image=20)
    roomy = load_config(overrides={"recipe": {"budget_minutes": 600}})
    resolved, recipe = fit_recipe(ds, roomy, measure=True)
    assert resolved["data"]["tile_scale"] == roomy["recipe"]["max_tile_scale"]
    assert "tiles of" in recipe.reasons["data.tile_scale"] and recipe.estimate["views_per_epoch"] > ds.num_images
    assert not any(n.startswith("9") or "too small" in n for n in recipe.notes), recipe.notes
    tight = load_config(overrides={"recipe": {"budget_minutes": 0.5, "min_budget_minutes": 0}})
    resolved, recipe = fit_recipe(ds, tight, measure=True)
    cap = resolved["data"]["tile_scale"]
    assert cap < roomy["recipe"]["max_tile_scale"]
    assert any(t.startswith("data.tile_scale") for t in recipe.traded), recipe.traded
    if cap == 0:
        assert any("too small" in n and "--budget" in n for n in recipe.notes), recipe.notes


def test_detector_step_is_timed_on_the_training_device(monkeypatch: pytest.MonkeyPatch) -> None:
    """The recipe sizes the detector's work to the device training uses: ``train.device`` is resolved the way the
    training loop resolves it, and a CUDA device that is not there is refused by name."""
    import torch

    from detdiff.recipe import detector_step
    from detdiff.train import distributed

    asked: list[str] = []
    resolve = distributed.resolve_device
    monkeypatch.setattr(distributed, "resolve_device", lambda device: asked.append(device) or resolve("cpu"))
    config = load_config(overrides={"train": {"device": "auto", "batch_size": 2}})
    detector_step(config, num_classes=2, image_size=64, boxes_per_image=2)()
    assert asked == ["auto"]
    monkeypatch.setattr(distributed, "resolve_device", resolve)
    if not torch.cuda.is_available():
        with pytest.raises(RuntimeError, match="train.device is 'cuda'"):
            detector_step(load_config(overrides={"train": {"device": "cuda"}}), num_classes=2, image_size=64)
