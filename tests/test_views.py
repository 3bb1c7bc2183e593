"""Tiles where small boxes need them: where they lie, what they show, and that every annotation is logged once."""

from __future__ import annotations

import cv2
import numpy as np
import pytest
import torch
from skimage import data as skdata
from torchvision.ops import clip_boxes_to_image

from detdiff.config import load_config
from detdiff.data.coco import CocoDataset, build_dataset, read_coco_json
from detdiff.data.image_cache import PAD_VALUE, build_image_cache
from detdiff.data.scenarios import generate_demo
from detdiff.data.views import (MIN_OWNED_SHARE, MIN_VISIBLE, TILE_OVERLAP, TileGrid, ViewTable, logged_view_sides,
                                plan_tiles, tile_pixels, whole_view_scale)
from detdiff.train.evaluate import final_pass
from detdiff.train.loop import train_and_log
from detdiff.train.loss_log import LossLog


def _photo_dataset(sides: list[float], size=(3000, 2000), per_image: int = 6, seed: int = 0) -> CocoDataset:
    rng = np.random.default_rng(seed)
    n = len(sides)
    images = int(np.ceil(n / per_image))
    wh = np.repeat(np.asarray(sides, float)[:, None], 2, axis=1)
    xy = rng.uniform(0, 1, (n, 2)) * (np.array(size) - wh)
    return CocoDataset(
        image_ids=np.arange(1, images + 1), file_names=[f"{i}.jpg" for i in range(images)],
        widths=np.full(images, size[0]), heights=np.full(images, size[1]), category_ids=np.array([1, 2]),
        category_names=["a", "b"], supercategories=["x", "x"], ann_ids=np.arange(1, n + 1),
        ann_image_index=np.arange(n) // per_image, labels=np.arange(n) % 2,
        boxes=np.concatenate([xy, wh], axis=1), areas=wh.prod(axis=1), iscrowd=np.zeros(n, bool))


def test_boxes_of_8_px_and_more_are_logged_where_they_are_16_px_across() -> None:
    # The goal of the real-size issue: an object of at least 8 px on the original image gets its losses logged in a
    # view where it is at least 16 px across (sqrt of the area). 3000 px photos at a 320 px view: 8-40 px boxes are
    # 1-4 px in the whole view.
    rng = np.random.default_rng(1)
    ds = _photo_dataset(list(rng.uniform(8, 40, 60)) + [400.0] * 6, per_image=11)
    grid, owner = plan_tiles(ds, 320, 2.0, 16)
    sides = logged_view_sides(ds, 320, grid, owner)
    assert grid.num_tiles > 0 and np.all(sides >= 16 - 1e-9), np.sort(sides)[:5]
    assert np.all(owner[np.sqrt(ds.boxes[:, 2] * ds.boxes[:, 3]) >= 400] == -1)    # large boxes: the whole view
    assert np.all(np.isin(np.arange(grid.num_tiles), owner))                      # no tile without a box to log
    assert plan_tiles(ds, 320, 0.0, 16)[0].num_tiles == 0


def test_every_annotation_is_logged_by_exactly_one_view_and_tiles_clip_like_torchvision() -> None:
    rng = np.random.default_rng(2)
    ds = _photo_dataset(list(rng.uniform(6, 60, 90)) + list(rng.uniform(300, 900, 10)), per_image=10, seed=3)
    grid, owner = plan_tiles(ds, 256, 1.5, 16)
    table = ViewTable.build(ds, whole_view_scale(ds, 256), grid, owner)
    logged = np.bincount(table.target_row[table.target_logged], minlength=ds.num_annotations)
    assert np.all(logged == 1)
    view = np.repeat(np.arange(table.num_views), np.diff(table.offsets))
    tile = view >= ds.num_images
    # reference: torchvision's clip_boxes_to_image on the boxes moved into each tile's pixels
    moved = ((ds.boxes_xyxy()[table.target_row[tile]] - np.tile(table.origin[view[tile]], 2))
             * table.scale[view[tile]][:, None])
    expected = clip_boxes_to_image(torch.from_numpy(moved), (256, 256)).numpy()
    assert np.allclose(table.target_box[tile], expected, atol=1e-3)
    # a tile trains on what it shows at least MIN_VISIBLE of, or logs
    area = np.prod(moved[:, 2:] - moved[:, :2], axis=1)
    shown = np.prod(expected[:, 2:] - expected[:, :2], axis=1) / area
    assert np.all((shown >= MIN_VISIBLE - 1e-6) | table.target_logged[tile])
    # the owner tile shows at least MIN_OWNED_SHARE of its box, and all of it when the box fits in the overlap of
    # neighbouring tiles (TILE_OVERLAP of the side)
    owned = table.target_logged[tile]
    assert np.all(shown[owned] >= MIN_OWNED_SHARE - 1e-6)
    fits = owned & (np.max(moved[:, 2:] - moved[:, :2], axis=1) <= TILE_OVERLAP * 256)
    assert fits.sum() > 20 and np.allclose(shown[fits], 1.0)
    assert np.allclose(table.to_original(table.target_box[tile][fits], view[tile][fits]),
                       ds.boxes_xyxy()[table.target_row[tile][fits]], atol=1e-3)


def test_tile_pixels_match_opencv_affine_resampling_of_a_photograph() -> None:
    # Reference: cv2.warpAffine with the tile's affine map (scale s, origin o; pixel centres: x_src = (x + 0.5) / s
    # - 0.5 + o), on scikit-image's bundled photograph 'astronaut', enlarged 1.6x into a tile.
    photo = skdata.astronaut()                                             # 512 x 512 RGB
    grid = TileGrid(np.zeros(2, np.int64), np.array([[0.0, 0.0], [150.0, 200.0]]), np.full(2, 1.6), 128)
    tiles = tile_pixels(photo, 512, 512, grid, 128, PAD_VALUE)
    for k, (ox, oy) in enumerate(grid.origin):
        s = 1.6
        inverse = np.array([[1 / s, 0, 0.5 / s - 0.5 + ox], [0, 1 / s, 0.5 / s - 0.5 + oy]])
        ref = cv2.warpAffine(photo, inverse, (128, 128), flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP)
        diff = np.abs(tiles[k].astype(float) - ref.astype(float))
        assert diff.mean() < 3.0, diff.mean()
    edge = TileGrid(np.zeros(1, np.int64), np.array([[400.0, 0.0]]), np.ones(1), 256)
    padded = tile_pixels(photo, 512, 512, edge, 256, PAD_VALUE)[0]
    assert np.all(padded[:, 112:] == PAD_VALUE) and np.array_equal(padded[:, :112], photo[:256, 400:])


@pytest.fixture(scope="module")
def street(tmp_path_factory):
    root = tmp_path_factory.mktemp("street")
    paths = generate_demo(root / "data", scenario="streetcam", num_images=6, seed=4, progress=False)
    return paths, build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir), root


def test_training_on_tiles_logs_each_object_once_and_detections_map_back(street) -> None:
    # A whole chain on real-size images (640-4000 px): cache with tiles, two epochs, evaluation by pycocotools.
    paths, ds, root = street
    config = load_config("ci", {"data": {"image_size": 128}, "train": {"epochs": 2, "batch_size": 8, "threads": 1,
                                                                       "device": "cpu"}})
    cache = build_image_cache(ds, root / "cache", 128, max_pixels=10**9, progress=False, workers=1,
                              tiles={"scale": 1.0, "min_object_px": 16})
    assert cache.num_tiles > 0 and cache.tiles.shape == (cache.num_tiles, 128, 128, 3)
    result = train_and_log(ds, cache, config, root / "run", progress=False)
    log = LossLog.open(root / "run" / "log")
    usable_rows = ~ds.iscrowd & cache.usable[ds.ann_image_index]
    anchors = log.object_field("num_anchors")
    assert np.all(anchors[:, usable_rows] >= 0) and np.all(anchors[:, ~usable_rows] == -1)
    assert np.all(log.covered()[:, cache.usable])
    pred = log.object_field("pred_box")[-1][usable_rows]
    assert np.all(np.isfinite(pred)) and np.all(pred[:, 0] > -ds.widths.max())
    metrics = final_pass(result.model, ds, cache, config, root / "run")
    assert metrics["AP50"] is not None and metrics["num_images"] == int(cache.usable.sum())
    import json
    dets = json.loads((root / "run" / "detections.json").read_text())
    size = {int(i): (w, h) for i, w, h in zip(ds.image_ids, ds.widths, ds.heights)}
    assert all(d["bbox"][0] + d["bbox"][2] <= size[d["image_id"]][0] + 0.01 for d in dets)
    per_image = np.bincount([d["image_id"] for d in dets])
    assert per_image.max(initial=0) <= max(config["eval"]["max_detections"], 1)
