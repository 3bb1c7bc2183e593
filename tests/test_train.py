"""Training loop, its log, divergence and run-folder checks, and the COCOeval final pass."""

from __future__ import annotations

import contextlib
import copy
import io
import json

import numpy as np
import pytest
import torch
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval
from torchvision.ops import box_convert, box_iou

from detdiff.config import load_config
from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.scenarios import generate_demo
from detdiff.data.image_cache import InsufficientSpaceError, build_image_cache
from detdiff.train import loop
from detdiff.train.batches import BatchMaker, flip_view_boxes
from detdiff.train.checkpoint import load_checkpoint, load_trained_model
from detdiff.train.evaluate import coco_metrics, final_pass
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLog, finished_epochs
from detdiff.train.loop import TrainingDiverged, train_and_log


def _pycocotools_stats(gt_dict, detections, max_dets=(1, 10, 100)):
    """The reference: pycocotools COCOeval('bbox') summary, prints silenced."""
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = copy.deepcopy(gt_dict)
        gt.createIndex()
        ev = COCOeval(gt, gt.loadRes(copy.deepcopy(detections)), "bbox")
        ev.params.maxDets = list(max_dets)
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return ev.stats


def _hand_made_case():
    """/work/shared/CHECKS.md "COCOeval" worked case: two 100x100 images, one class, three detections."""
    gt = {"images": [{"id": 1, "width": 100, "height": 100, "file_name": "1.png"},
                     {"id": 2, "width": 100, "height": 100, "file_name": "2.png"}],
          "categories": [{"id": 1, "name": "thing"}],
          "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 40, 40], "area": 1600,
                           "iscrowd": 0},
                          {"id": 2, "image_id": 2, "category_id": 1, "bbox": [50, 50, 30, 30], "area": 900,
                           "iscrowd": 0}]}
    dets = [{"image_id": 1, "category_id": 1, "bbox": [10, 10, 40, 40], "score": 0.9},
            {"image_id": 2, "category_id": 1, "bbox": [55, 55, 30, 30], "score": 0.8},
            {"image_id": 2, "category_id": 1, "bbox": [0, 0, 20, 20], "score": 0.95}]
    return gt, dets


def test_coco_metrics_hand_made_case_matches_pycocotools():
    gt, dets = _hand_made_case()
    m = coco_metrics(gt, dets, min_ap50=0.5)
    # pycocotools COCOeval is the reference; worked values from /work/shared/CHECKS.md
    assert m["AP"] == pytest.approx(0.2939, abs=1e-4)
    assert m["AP50"] == pytest.approx(0.6667, abs=1e-4)
    assert m["AP75"] == pytest.approx(0.2525, abs=1e-4)
    stats = _pycocotools_stats(gt, dets)
    for key, k in (("AP", 0), ("AP50", 1), ("AP75", 2), ("AP_small", 3), ("AP_medium", 4)):
        assert m[key] == pytest.approx(stats[k], abs=1e-9), key
    assert stats[5] == -1 and m["AP_large"] is None          # no large ground truth: COCOeval writes -1
    assert m["per_category"] == {"1": pytest.approx(m["AP50"])}
    assert m["trustworthy"] and m["warning"] is None
    low = coco_metrics(gt, dets, min_ap50=0.9)
    assert not low["trustworthy"] and "AP50 0.667" in low["warning"]
    empty = coco_metrics(gt, [], min_ap50=0.2)
    assert empty["AP50"] == 0.0 and not empty["trustworthy"]


def test_coco_metrics_many_boxes_and_annotation_id_zero():
    rng = np.random.default_rng(0)
    xy = rng.uniform(0, 900, (150, 2))
    boxes = np.concatenate([xy, np.full((150, 2), 20.0)], axis=1)
    gt = {"images": [{"id": 5, "width": 1000, "height": 1000, "file_name": "a.png"}],
          "categories": [{"id": 3, "name": "thing"}],
          "annotations": [{"id": k, "image_id": 5, "category_id": 3, "bbox": b.tolist(), "area": 400.0,
                           "iscrowd": 0} for k, b in enumerate(boxes)]}           # ids start at 0 on purpose
    dets = [{"image_id": 5, "category_id": 3, "bbox": b.tolist(), "score": float(s)}
            for b, s in zip(boxes, np.linspace(0.99, 0.5, 150))]
    full = coco_metrics(gt, dets, max_dets=150)
    capped = coco_metrics(gt, dets, max_dets=100)
    renumbered = copy.deepcopy(gt)
    for k, ann in enumerate(renumbered["annotations"], start=1):
        ann["id"] = k
    # pycocotools reference with valid ids and maxDets raised to 150 (COCOeval params.maxDets)
    assert full["AP50"] == pytest.approx(_pycocotools_stats(renumbered, dets, (1, 10, 150))[1], abs=1e-9)
    assert full["AP50"] == pytest.approx(1.0, abs=1e-6)
    assert capped["AP50"] == pytest.approx(_pycocotools_stats(renumbered, dets)[1], abs=1e-9)
    assert capped["AP50"] < 0.7


# ---------------------------------------------------------------- training on small demo datasets

def _tiny_dataset(tmp_path, num_images=24, seed=3):
    """A demo dataset at 128x96 px with one crowd annotation and one corrupt image added."""
    paths = generate_demo(tmp_path / "demo", num_images=num_images, seed=seed, width=128, height=96, progress=False)
    coco = read_coco_json(paths.annotations)
    coco["annotations"][0]["iscrowd"] = 1
    (paths.images_dir / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 not really a jpeg")
    coco["images"].append({"id": 99999, "file_name": "broken.jpg", "width": 128, "height": 96})
    coco["annotations"].append({"id": 99999, "image_id": 99999, "category_id": coco["categories"][0]["id"],
                                "bbox": [10, 10, 30, 30], "area": 900.0, "iscrowd": 0})
    return build_dataset(coco, images_dir=paths.images_dir)


def _tiny_config(**train):
    return load_config("ci", {"data": {"image_size": 64},
                              "train": {"epochs": 2, "batch_size": 8, "threads": 1, "device": "cpu", **train}})


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    root = tmp_path_factory.mktemp("tiny")
    ds = _tiny_dataset(root)
    cache = build_image_cache(ds, root / "cache", 64, max_pixels=10**8, progress=False, workers=1)
    return ds, cache, root


def _all_fields(rundir):
    log = LossLog.open(rundir / "log")
    out = {f"image.{k}": log.image_field(k) for k in IMAGE_FIELDS}
    out |= {f"object.{k}": log.object_field(k) for k in OBJECT_FIELDS}
    out["covered"] = log.covered()
    for e in log.epochs:
        out |= {f"unmatched{e}.{k}": v for k, v in log.unmatched(e).items()}
    return out


def test_same_seed_and_threads_give_identical_logs(tiny, tmp_path):
    ds, cache, _ = tiny
    first = train_and_log(ds, cache, _tiny_config(), tmp_path / "a", progress=False)
    train_and_log(ds, cache, _tiny_config(), tmp_path / "b", progress=False)
    a, b = _all_fields(tmp_path / "a"), _all_fields(tmp_path / "b")
    assert a.keys() == b.keys()
    for key in a:
        assert np.array_equal(a[key], b[key], equal_nan=True), key
    other = train_and_log(ds, cache, _tiny_config(seed=1), tmp_path / "c", progress=False)
    assert not np.array_equal(_all_fields(tmp_path / "c")["image.loc_sum"], a["image.loc_sum"], equal_nan=True)
    assert first.epochs_done == 2 and other.epochs_done == 2 and 0.0 <= first.data_share < 1.0

    # unusable image: never covered, NaN rows; crowd annotation: never a target
    broken = ds.file_names.index("broken.jpg")
    assert not cache.usable[broken]
    assert (a["covered"][:, cache.usable]).all() and not a["covered"][:, broken].any()
    assert np.isnan(a["image.loc_sum"][:, broken]).all()
    crowd = np.flatnonzero(ds.iscrowd)
    assert len(crowd) == 1 and (a["object.num_anchors"][:, crowd] == -1).all()
    # the per-object sums of an image add up to its image sums (loss_log contract); float32 sums
    trained = ~ds.iscrowd & cache.usable[ds.ann_image_index]
    per_image = np.zeros((2, ds.num_images))
    for e in range(2):
        np.add.at(per_image[e], ds.ann_image_index[trained], a["object.loc_sum"][e, trained])
    assert np.allclose(per_image[:, cache.usable], a["image.loc_sum"][:, cache.usable], rtol=1e-4, atol=1e-4)


def test_nan_loss_raises_training_diverged_and_keeps_finished_epochs(tiny, tmp_path, monkeypatch):
    ds, cache, _ = tiny
    real = loop.compute_loss_streams
    calls = {"n": 0}

    def poisoned(outputs, anchors, targets, loss_cfg, log_cfg, **options):
        streams = real(outputs, anchors, targets, loss_cfg, log_cfg, **options)
        calls["n"] += 1
        if calls["n"] == 5:                       # 24 usable images / batch 8 = 3 batches: epoch 1, batch 1
            streams.image["loc_sum"][2] = float("nan")
            streams.total = streams.total * float("nan")
        return streams

    monkeypatch.setattr(loop, "compute_loss_streams", poisoned)
    with pytest.raises(TrainingDiverged) as err:
        train_and_log(ds, cache, _tiny_config(epochs=3), tmp_path, progress=False)
    message = str(err.value)
    assert "epoch 1, batch 1" in message and "train.lr" in message and "grad_clip" in message
    assert err.value.epoch == 1 and len(err.value.image_ids) == 1
    assert str(err.value.image_ids[0]) in message and err.value.image_ids[0] in set(ds.image_ids.tolist())
    assert finished_epochs(tmp_path / "log") == [0]
    assert not [p for p in (tmp_path / "log").iterdir() if ".tmp" in p.name]
    assert load_checkpoint(tmp_path / "checkpoint.pt")["epoch"] == 0


def test_huge_learning_rate_diverges_with_a_clear_error(tiny, tmp_path):
    ds, cache, _ = tiny
    with pytest.raises(TrainingDiverged, match="Lower train.lr"):
        train_and_log(ds, cache, _tiny_config(lr=1e6, warmup_iters=1), tmp_path, progress=False)


def test_unwritable_or_full_rundir_fails_before_training(tiny, tmp_path, monkeypatch):
    ds, cache, _ = tiny

    def must_not_run(*args, **kwargs):
        raise AssertionError("training started although the run folder is unusable")

    monkeypatch.setattr(loop, "train_one_epoch", must_not_run)
    (tmp_path / "a_file").write_text("not a folder")
    with pytest.raises(InsufficientSpaceError, match="cannot write the training log"):
        train_and_log(ds, cache, _tiny_config(), tmp_path / "a_file" / "run", progress=False)
    import shutil
    monkeypatch.setattr(shutil, "disk_usage", lambda p: shutil._ntuple_diskusage(10**9, 10**9 - 1000, 1000))
    with pytest.raises(InsufficientSpaceError, match="needs about"):
        train_and_log(ds, cache, _tiny_config(), tmp_path / "run", progress=False)


@pytest.mark.slow
def test_detector_learns_the_demo_and_final_pass_writes_coco_results(tmp_path):
    # ci.yaml size (128 px view, width 16), 200 demo images, 30 epochs: 15 s on two idle cores.
    paths = generate_demo(tmp_path / "demo", num_images=200, seed=0, progress=False)
    ds = build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)
    config = load_config("ci", {"train": {"epochs": 30}})
    size = config["data"]["image_size"]
    cache = build_image_cache(ds, tmp_path / "run" / "cache", size, max_pixels=10**8, progress=False)
    result = train_and_log(ds, cache, config, tmp_path / "run", progress=False)
    assert result.epochs_done == 30 and result.images_per_second > 0 and 0 <= result.data_share < 0.5
    metrics = final_pass(result.model, ds, cache, config, tmp_path / "run")
    # Measured AP50 0.405 on this set-up (pycocotools COCOeval); the floor is half of it.
    assert metrics["AP50"] > 0.2, metrics
    assert json.loads((tmp_path / "run" / "metrics.json").read_text())["AP50"] == pytest.approx(metrics["AP50"])

    # detections.json is in the COCO results format: pycocotools loadRes reads it and gives the same AP50
    detections = json.loads((tmp_path / "run" / "detections.json").read_text())
    assert set(detections[0]) == {"image_id", "category_id", "bbox", "score"}
    assert set(d["category_id"] for d in detections) <= set(ds.category_ids.tolist())
    assert _pycocotools_stats(ds.to_coco_dict(), detections)[1] == pytest.approx(metrics["AP50"], abs=1e-3)

    features = np.load(tmp_path / "run" / "object_features.npy")
    assert features.shape == (ds.num_annotations, config["model"]["head_width"]) and features.dtype == np.float32
    assert np.isfinite(features).all()

    log = LossLog.open(tmp_path / "run" / "log")
    detected = log.object_field("detected")
    assert detected[-1].mean() > detected[0].mean() + 0.1
    # logged pred_box is xywh in original px: its IoU with the annotation (torchvision box_iou) equals the
    # IoU the loss computed in view px (IoU does not change under a common scale)
    pred = torch.from_numpy(np.array(log.object_field("pred_box")[-1], dtype=np.float64))
    ann = torch.from_numpy(ds.boxes)
    iou = box_iou(box_convert(pred, "xywh", "xyxy"), box_convert(ann, "xywh", "xyxy")).diagonal().numpy()
    assert np.allclose(iou, log.object_field("pred_iou")[-1], atol=1e-4)
    unmatched = log.unmatched(log.epochs[-1])
    assert ((unmatched["image_index"] >= 0) & (unmatched["image_index"] < ds.num_images)).all()

    reloaded = load_trained_model(tmp_path / "run")
    images = torch.from_numpy(np.array(cache.images[:2])).permute(0, 3, 1, 2).float() / 255
    with torch.no_grad():
        assert torch.equal(reloaded(images)["cls_logits"], result.model.eval()(images)["cls_logits"])


def _torchvision_view_transform(boxes, flips, size):
    """Reference for flip_view_boxes: torchvision.transforms.v2.functional on tv_tensors.BoundingBoxes (XYXY,
    canvas S x S). On a square canvas the transpose (x <-> y) is vertical_flip(rotate(., 90)); the view is
    transposed first (``flips[:, 2]``), then mirrored horizontally (``[:, 0]``), then vertically (``[:, 1]``)."""
    from torchvision import tv_tensors
    from torchvision.transforms.v2 import functional as TF

    steps = [(2, lambda b: TF.vertical_flip(TF.rotate(b, 90))), (0, TF.horizontal_flip), (1, TF.vertical_flip)]
    out = boxes
    for column, transform in steps:
        ref = tv_tensors.BoundingBoxes(out.clone(), format="XYXY", canvas_size=(size, size))
        out = torch.where(flips[:, column:column + 1], transform(ref).as_subclass(torch.Tensor), out)
    return out


@pytest.mark.parametrize("axes", [2, 3])   # 2: flips only (transpose column False), 3: with the transpose
def test_flip_view_boxes_matches_torchvision_v2_rotate_and_flips(axes):
    # Reference: _torchvision_view_transform (torchvision's rotate and flips), after checking on pixels that
    # vertical_flip(rotate(., 90)) is the transpose. inverse=True must give the boxes back; without a
    # transpose a flip is its own inverse.
    from torchvision.transforms.v2 import functional as TF

    size = 64
    image = torch.zeros(1, size, size)
    image[0, 10:20, 30:50] = 1.0
    assert torch.equal(TF.vertical_flip(TF.rotate(image, 90)), image.transpose(1, 2))
    gen = torch.Generator().manual_seed(axes)
    xy = torch.rand((60, 2), generator=gen) * 50
    boxes = torch.cat([xy, xy + 1 + torch.rand((60, 2), generator=gen) * 13], dim=1)
    flips = torch.rand((60, 3), generator=gen) < 0.5
    flips[:, 2] &= axes == 3
    ours = flip_view_boxes(boxes, flips, size)
    assert torch.allclose(ours, _torchvision_view_transform(boxes, flips, size))
    assert torch.allclose(flip_view_boxes(ours, flips, size, inverse=True), boxes)
    if axes == 2:
        assert torch.allclose(flip_view_boxes(ours, flips, size), boxes)


def test_batch_maker_dihedral_moves_pixels_and_boxes_together(tiny):
    # The pixels under each target box before the transform are the pixels under its transformed box after
    # it (same sum over the box's whole-pixel interior), for every drawn (h, v, transpose) combination.
    ds, cache, _ = tiny
    maker = BatchMaker(ds, cache, torch.device("cpu"), flips="dihedral", seed=0)
    maker.set_epoch(1)
    rows = np.flatnonzero(cache.usable)[:16]
    batch = maker(rows)
    plain = BatchMaker(ds, cache, torch.device("cpu"))(rows)
    assert batch.flips[:, 2].any() and not batch.flips[:, 2].all()
    for b in range(len(rows)):
        before, after = plain.targets[b]["boxes"], batch.targets[b]["boxes"]
        for box0, box1 in zip(before, after):
            x1, y1, x2, y2 = [int(v) for v in torch.cat([box0[:2].ceil(), box0[2:].floor()])]
            u1, v1, u2, v2 = [int(v) for v in torch.cat([box1[:2].ceil(), box1[2:].floor()])]
            if x2 > x1 and y2 > y1:
                assert torch.isclose(plain.images[b][:, y1:y2, x1:x2].sum(), batch.images[b][:, v1:v2, u1:u2].sum())
        flips = torch.from_numpy(np.repeat(batch.flips[b:b + 1], len(before), 0))
        assert torch.allclose(batch.unflip(after, flips.numpy()), before, atol=1e-4)
    both = BatchMaker(ds, cache, torch.device("cpu"), flips="both", seed=0)
    both.set_epoch(1)
    assert np.array_equal(both.epoch_flips[:, :2], maker.epoch_flips[:, :2])   # same flips as before the transpose
    assert not both.epoch_flips[:, 2].any()


def test_batch_maker_flips_pixels_and_boxes_together_and_reproducibly(tiny):
    ds, cache, _ = tiny
    maker = BatchMaker(ds, cache, torch.device("cpu"), flips="both", seed=0)
    maker.set_epoch(3)
    first = maker.epoch_flips.copy()
    maker.set_epoch(3)
    assert np.array_equal(first, maker.epoch_flips)                 # drawn from (seed, epoch) only
    maker.set_epoch(4)
    assert not np.array_equal(first, maker.epoch_flips)
    rows = np.flatnonzero(cache.usable)[:8]
    batch = maker(rows)
    plain = BatchMaker(ds, cache, torch.device("cpu"))(rows)
    for b in range(len(rows)):
        expected = plain.images[b]
        if batch.flips[b, 0]:
            expected = expected.flip(-1)
        if batch.flips[b, 1]:
            expected = expected.flip(-2)
        assert torch.equal(batch.images[b], expected)
        flips = torch.from_numpy(np.repeat(batch.flips[b:b + 1], len(plain.targets[b]["boxes"]), 0))
        assert torch.allclose(batch.targets[b]["boxes"], flip_view_boxes(plain.targets[b]["boxes"], flips, 64))
    assert batch.flips.any() and not batch.flips.all()
    horizontal = BatchMaker(ds, cache, torch.device("cpu"), flips="horizontal")
    horizontal.set_epoch(0)
    assert not horizontal.epoch_flips[:, 1].any()
    with pytest.raises(ValueError, match="train.flips"):
        BatchMaker(ds, cache, torch.device("cpu"), flips="sideways")


@pytest.mark.parametrize("flips", ["both", "dihedral"])
def test_flipped_training_logs_boxes_in_original_coordinates(tiny, tmp_path, flips):
    # pred_iou is computed on the flipped view; recomputing it from the logged (flipped back) pred_box with
    # torchvision.ops.box_iou against the annotated box must give the same value.
    ds, cache, _ = tiny
    train_and_log(ds, cache, _tiny_config(flips=flips, epochs=3), tmp_path / "f", progress=False)
    log = LossLog.open(tmp_path / "f" / "log")
    trained = np.flatnonzero(log.object_field("num_anchors")[-1] >= 0)
    pred = torch.from_numpy(log.object_field("pred_box")[-1][trained].astype(np.float64))
    ann = torch.from_numpy(ds.boxes[trained].astype(np.float64))
    iou = box_iou(box_convert(pred, "xywh", "xyxy"), box_convert(ann, "xywh", "xyxy")).diagonal().numpy()
    logged = log.object_field("pred_iou")[-1][trained]
    assert np.allclose(iou, logged, atol=2e-3)
    assert (logged > 0.05).mean() > 0.5       # not trivially zero: the boxes overlap where they should


def test_epochs_within_keeps_the_pace_of_the_finished_epochs() -> None:
    from detdiff.train.hooks import epochs_within

    # exact arithmetic: 3 epochs took 30 s (10 s each); a 75 s limit leaves 45 s, room for 4 more: 7 in all
    assert epochs_within(75.0, 30.0, 3, 17, 2) == 7
    assert epochs_within(75.0, 30.0, 3, 17, 8) == 8           # never under the floor (recipe.min_epochs)
    assert epochs_within(1000.0, 30.0, 3, 17, 2) == 17        # never more than planned
    assert epochs_within(10.0, 30.0, 3, 17, 2) == 3           # never fewer than done
    assert epochs_within(75.0, 0.0, 0, 17, 2) == 17           # nothing done yet: the plan stands


def test_a_time_limit_ends_training_at_the_epochs_that_fit_and_refits_the_schedule(tiny, tmp_path, monkeypatch):
    from types import SimpleNamespace

    from detdiff.train import hooks
    from detdiff.train.optimizer import FINAL_LR_FACTOR

    ds, cache, _ = tiny
    ticks = iter(range(0, 10**6, 5))                          # a clock that advances 5 s per reading: 5 s an epoch
    monkeypatch.setattr(hooks, "time", SimpleNamespace(perf_counter=lambda: float(next(ticks))))
    config = _tiny_config(epochs=6, time_limit=0.25, warmup_iters=1)     # 15 s: 3 epochs of 6 fit
    config["recipe"]["min_epochs"] = 2
    result = train_and_log(ds, cache, config, tmp_path, progress=False)
    assert (result.epochs_done, result.epochs_planned) == (3, 6)
    assert finished_epochs(tmp_path / "log") == [0, 1, 2]
    saved = load_checkpoint(tmp_path / "checkpoint.pt")
    assert saved["epoch"] == 2 and saved["extra"]["time_limit_cut"] == {"from": 6, "to": 3}
    assert saved["extra"]["train_seconds"] == pytest.approx(15.0)
    lr = float(config["train"]["lr"])                        # the re-fitted cosine ends at its final share
    assert [g["lr"] for g in saved["optimizer"]["param_groups"]] == pytest.approx([lr * FINAL_LR_FACTOR] * 2)
    resumed = train_and_log(ds, cache, config, tmp_path, resume=True, progress=False)
    assert (resumed.epochs_done, resumed.epochs_planned, resumed.epoch_seconds) == (3, 6, [])   # the cut stands
    assert finished_epochs(tmp_path / "log") == [0, 1, 2]
    config["recipe"]["min_epochs"] = 5                        # the floor holds even when the limit would cut more
    floored = train_and_log(ds, cache, config, tmp_path / "floor", progress=False)
    assert (floored.epochs_done, floored.epochs_planned) == (5, 6)


def test_progress_bar_shows_one_rate() -> None:
    from types import SimpleNamespace

    from detdiff.train.hooks import ProgressHook

    hook = ProgressHook()
    hook.before_epoch(SimpleNamespace(images_in_epoch=8, epoch=0, epochs=2))
    ones = torch.ones(4)
    streams = SimpleNamespace(image={"num_pos": ones, "loc_sum": ones, "pos_sum": 2 * ones, "neg_sum": ones})
    hook.after_step(None, SimpleNamespace(image_index=np.arange(4)), streams)
    shown = str(hook.bar)
    hook.close()
    assert shown.count("/s") == 1 and "pos 2.000" in shown, shown


def test_a_tile_detection_on_a_probe_box_is_unmatched_one_on_a_target_is_part_of_it(tmp_path) -> None:
    """A tile's detection lying inside a training target is a part of that box and not logged; inside a crowd box
    (a missing-box probe in the training copy, detdiff.data.probes.training_copy) it is unmatched, as an
    unannotated object is. Part = intersection over the detection's area >= PART_OF_BOX; the intersection's
    reference is torchvision.ops.box_iou (inter = iou * union)."""
    from detdiff.train.distributed import DistInfo
    from detdiff.boxes import PART_OF_BOX, parts_of_boxes
    from detdiff.train.hooks import LossLogHook

    coco = {"images": [{"id": 1, "file_name": "a.jpg", "width": 200, "height": 100}],
            "categories": [{"id": 1, "name": "thing"}],
            "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 10, 40, 40], "area": 1600,
                             "iscrowd": 0},
                            {"id": 2, "image_id": 1, "category_id": 1, "bbox": [120, 10, 40, 40], "area": 1600,
                             "iscrowd": 1}]}
    dataset = build_dataset(coco)
    info = DistInfo(rank=0, world_size=1, local_rank=0, is_main=True, device=torch.device("cpu"))
    hook = LossLogHook(tmp_path / "log", dataset, info, unmatched_per_image=3)
    detections = np.array([[20.0, 20.0, 20.0, 20.0], [130.0, 20.0, 20.0, 20.0]])      # xywh, inside box 1 / box 2
    parts = parts_of_boxes(hook.ann_xyxy, hook.image_offsets, np.zeros(2, dtype=np.int64), detections)
    assert parts.tolist() == [True, False]
    det, ann = box_convert(torch.from_numpy(detections), "xywh", "xyxy"), torch.from_numpy(dataset.boxes_xyxy())
    iou = box_iou(det, ann)
    area_d, area_a = (det[:, 2:] - det[:, :2]).prod(1), (ann[:, 2:] - ann[:, :2]).prod(1)
    inter = iou * (area_d[:, None] + area_a[None, :]) / (1 + iou)
    assert (inter.diag() / area_d >= PART_OF_BOX).all()          # both lie inside their box; only the target holds parts
