"""Cross-fitted crop models: crops, windows and flips, folds, probes, and out-of-sample predictions."""

from __future__ import annotations

import json

import cv2
import numpy as np
import pytest
import torch
from torchvision import tv_tensors
from torchvision.ops import box_iou
from torchvision.transforms.v2 import functional as TF

from detdiff.boxes import xywh_to_xyxy
from detdiff.crossfit import crop_model as cm
from detdiff.crossfit.crops import CONTEXT, STORE, object_crops
from detdiff.crossfit.folds import (CropRows, assign_folds, crop_work, cross_fit, from_reference_units,
                                   load_predictions, reference_boxes, to_reference_units, windows_around)
from detdiff.data.coco import CocoDataset
from detdiff.data.probes import LOOSE_IOU, box_probes, loosen_boxes, plant_missing_probes, probe_count, training_copy


def test_object_crop_centres_the_box_with_its_context() -> None:
    # A red 20x10 block at x 100..120, y 60..70 on a blue image: its crop shows the block in the middle
    # 1/CONTEXT of each axis and blue around it (definition of the crop: CONTEXT box sides about the centre).
    image = np.zeros((200, 300, 3), np.uint8)
    image[:] = (0, 0, 255)
    image[60:70, 100:120] = (255, 0, 0)
    crop = object_crops(image, np.array([[100.0, 60.0, 20.0, 10.0]]))[0]
    inner = STORE / CONTEXT
    lo, hi = int(STORE / 2 - inner / 2) + 2, int(STORE / 2 + inner / 2) - 2
    assert crop.shape == (STORE, STORE, 3)
    assert np.all(crop[lo:hi, lo:hi, 0] > 240) and np.all(crop[lo:hi, lo:hi, 2] < 15)
    assert np.all(crop[:lo - 4, :, 2] > 240) and np.all(crop[:, hi + 4:, 2] > 240)


def test_object_crop_outside_the_image_is_grey_and_large_boxes_match_area_resizing() -> None:
    rng = np.random.default_rng(0)
    image = rng.integers(0, 256, (400, 400, 3), dtype=np.uint8)
    corner = object_crops(image, np.array([[0.0, 0.0, 10.0, 10.0]]))[0]
    assert np.all(corner[:16, :16] == 114)                 # window [-15, 25): the first 15 px lie outside
    # a window of 4 x 400 px is cut from the image shrunk by OpenCV's area interpolation (octave 3):
    # its middle quarter must equal the whole image resized to 16 px with cv2.INTER_AREA, within rounding
    big = object_crops(image, np.array([[0.0, 0.0, 400.0, 400.0]]))[0]
    middle = big[24:40, 24:40].astype(np.float64)
    reference = cv2.resize(cv2.resize(image, (50, 50), interpolation=cv2.INTER_AREA), (16, 16),
                           interpolation=cv2.INTER_AREA).astype(np.float64)
    assert np.abs(middle - reference).mean() < 12


def test_flip_batch_matches_torchvision_flips_of_pixels_and_boxes() -> None:
    # Reference: torchvision.transforms.v2.functional on tv_tensors.BoundingBoxes (transpose = vertical flip of a
    # 90-degree rotation on a square canvas, as in tests/test_train.py).
    rng = np.random.default_rng(1)
    size = 16
    pixels = torch.rand(8, 3, size, size)
    boxes = torch.tensor(np.sort(rng.random((8, 2, 2)), axis=1).transpose(0, 2, 1).reshape(8, 4)[:, [0, 2, 1, 3]],
                         dtype=torch.float32)
    flips = rng.random((8, 3)) < 0.5
    out_pixels, out_boxes = cm.flip_batch(pixels, boxes, flips)
    for k in range(8):
        img = pixels[k]
        bb = tv_tensors.BoundingBoxes(boxes[k:k + 1] * size, format="XYXY", canvas_size=(size, size))
        if flips[k, 2]:
            img, bb = TF.vertical_flip(TF.rotate(img, 90)), TF.vertical_flip(TF.rotate(bb, 90, expand=False))
        if flips[k, 0]:
            img, bb = TF.horizontal_flip(img), TF.horizontal_flip(bb)
        if flips[k, 1]:
            img, bb = TF.vertical_flip(img), TF.vertical_flip(bb)
        assert torch.allclose(out_pixels[k], img)
        assert torch.allclose(out_boxes[k] * size, bb.as_subclass(torch.Tensor)[0], atol=1e-4)


def test_window_units_round_trip() -> None:
    rng = np.random.default_rng(2)
    windows = cm.sample_windows(rng, 50)
    inside = cm.box_in_window(windows)
    back = cm.window_to_box_units(inside.astype(np.float64), windows.astype(np.float64))
    assert np.allclose(back, np.tile([0, 0, 1, 1], (50, 1)), atol=1e-5)
    boxes = np.array([[10.0, 20.0, 2.0, 30.0], [0.0, 0.0, 50.0, 40.0]])
    reference = reference_boxes(boxes)
    assert np.allclose(from_reference_units(to_reference_units(boxes, reference), reference), boxes)


def test_folds_are_balanced_and_seeded() -> None:
    folds = assign_folds(100, 3, seed=5)
    assert sorted(np.bincount(folds).tolist()) == [33, 33, 34]
    assert np.array_equal(folds, assign_folds(100, 3, seed=5))
    assert not np.array_equal(folds, assign_folds(100, 3, seed=6))


def _dataset(num_images: int, per_image: int, num_classes: int, rng: np.random.Generator) -> CocoDataset:
    n = num_images * per_image
    xy = rng.uniform(20, 140, (n, 2))
    wh = rng.uniform(12, 40, (n, 2))
    return CocoDataset(
        image_ids=np.arange(1, num_images + 1), file_names=[f"{i}.jpg" for i in range(num_images)],
        widths=np.full(num_images, 200), heights=np.full(num_images, 200),
        category_ids=np.arange(1, num_classes + 1) * 10, category_names=[f"c{k}" for k in range(num_classes)],
        supercategories=["x"] * num_classes, ann_ids=np.arange(1, n + 1),
        ann_image_index=np.repeat(np.arange(num_images), per_image), labels=rng.integers(0, num_classes, n),
        boxes=np.concatenate([xy, wh], axis=1), areas=wh.prod(axis=1), iscrowd=np.zeros(n, bool))


def test_loosened_boxes_keep_their_iou_inside_the_range() -> None:
    rng = np.random.default_rng(3)
    ds = _dataset(10, 20, 3, rng)
    loose, ok = loosen_boxes(rng, ds.boxes, ds.widths[ds.ann_image_index], ds.heights[ds.ann_image_index])
    assert ok.mean() > 0.95
    # reference IoU: torchvision.ops.box_iou
    iou = box_iou(torch.from_numpy(xywh_to_xyxy(loose[ok])), torch.from_numpy(xywh_to_xyxy(ds.boxes[ok]))).diagonal()
    assert float(iou.min()) >= LOOSE_IOU[0] - 1e-9 and float(iou.max()) <= LOOSE_IOU[1] + 1e-9
    assert np.all(loose[:, :2] >= 0) and np.all(loose[:, :2] + loose[:, 2:] <= 200 + 1e-9)
    rows, boxes = box_probes(ds, np.arange(ds.num_annotations), seed=0)
    assert len(rows) == len(boxes) and len(rows) > 0.95 * ds.num_annotations


def test_missing_probes_are_left_out_of_training_only() -> None:
    rng = np.random.default_rng(4)
    ds = _dataset(50, 10, 3, rng)
    cfg = {"enabled": True, "rate": 0.01, "min_count": 20, "max_count": 300, "max_share": 0.03}
    assert probe_count(500, cfg) == 15                     # 20 wanted, 3% of 500 allowed
    rows = plant_missing_probes(ds, cfg, seed=0)
    assert len(rows) == 15 and np.array_equal(rows, plant_missing_probes(ds, cfg, seed=0))
    copy = training_copy(ds, rows)
    assert copy.iscrowd[rows].all() and copy.iscrowd.sum() == 15
    assert np.array_equal(copy.labels, ds.labels) and np.array_equal(copy.boxes, ds.boxes)
    assert not ds.iscrowd.any()
    assert len(plant_missing_probes(ds, {**cfg, "enabled": False}, seed=0)) == 0


def _coloured_crops(ds: CocoDataset, rng: np.random.Generator) -> np.ndarray:
    """Stored crops where each class is a colour (a task a crop model learns in a few epochs)."""
    palette = np.array([[230, 40, 40], [40, 230, 40], [40, 40, 230]], np.uint8)
    crops = np.full((ds.num_annotations, STORE, STORE, 3), 114, np.uint8)
    inner = slice(int(STORE * 1.5 / CONTEXT), int(STORE * 2.5 / CONTEXT))
    crops[:, inner, inner] = palette[ds.labels][:, None, None, :]
    noise = rng.integers(-20, 21, crops.shape)
    return np.clip(crops.astype(np.int64) + noise, 0, 255).astype(np.uint8)


@pytest.mark.parametrize("precision", ["float32", "bfloat16"])
def test_cross_fit_predicts_out_of_fold_and_resumes(tmp_path, precision: str) -> None:
    rng = np.random.default_rng(5)
    ds = _dataset(60, 6, 3, rng)
    crops = _coloured_crops(ds, rng)
    truth = ds.labels.copy()
    wrong = rng.choice(ds.num_annotations, 12, replace=False)
    ds.labels[wrong] = (ds.labels[wrong] + 1) % 3                      # wrong labels the models must not learn
    config = {"crossfit": {"folds": 3, "epochs": 6, "batch_size": 64, "lr": 0.003, "width": 8, "input_size": 16,
                            "precision": precision},
              "train": {"flips": "horizontal", "seed": 0}}
    usable = np.ones(ds.num_images, bool)
    rows, boxes = box_probes(ds, np.arange(ds.num_annotations), seed=0)
    torch.set_num_threads(1)
    result = cross_fit(ds, ds, crops, usable, rows, boxes, config, tmp_path, progress=False)
    assert np.isfinite(result.probs).all() and np.allclose(result.probs.sum(1), 1, atol=1e-5)
    predicted = result.probs.argmax(1)
    assert (predicted == truth).mean() > 0.9
    assert (predicted[wrong] == truth[wrong]).mean() > 0.8          # judged by models that never saw the label
    # every box is predicted by the model of its image's fold, which did not train on that image
    assert np.array_equal(result.fold, assign_folds(ds.num_images, 3, 0)[ds.ann_image_index])
    saved = load_predictions(tmp_path)
    assert saved is not None and np.allclose(saved.probs, result.probs)
    again = cross_fit(ds, ds, crops, usable, rows, boxes, config, tmp_path, progress=False)
    assert np.array_equal(again.probs, result.probs) and again.seconds == pytest.approx(result.seconds)


def test_timed_crop_work_is_a_fold_step_and_a_prediction() -> None:
    # The recipe and the plan time these callables; they must do a fold's work: a step moves the weights (a full
    # batch even from a few rows), a prediction covers every row asked for and leaves the weights alone.
    rows = CropRows.random(num_classes=4, input_size=32, rows=40)
    assert rows.crops.shape == (40, STORE, STORE, 3) and rows.crops.dtype == np.uint8
    cfg = {"width": 8, "lr": 0.003, "batch_size": 64, "precision": "float32"}
    work = crop_work(rows, 4, cfg, "horizontal")
    before = [p.detach().clone() for p in work.model.parameters()]
    work.step()
    assert all(not torch.equal(a, p) for a, p in zip(before, work.model.parameters()))
    assert work.model.training and work.predicted >= 40
    trained = [p.detach().clone() for p in work.model.parameters()]
    work.predict()
    assert not work.model.training
    assert all(torch.equal(a, p) for a, p in zip(trained, work.model.parameters()))


def test_bfloat16_training_pass_matches_float32_within_bfloat16_rounding() -> None:
    # The autocast pass rounds inputs and weights of convolutions and linear layers to bfloat16 (8 significant bits:
    # torch.finfo(torch.bfloat16).eps = 2**-7, a torch reference value); through five layers the logits must stay
    # within a few such steps of the float32 pass, and the weights themselves stay float32.
    torch.manual_seed(0)
    model = cm.CropModel(5, width=8, input_size=16)
    pixels = torch.rand(64, 3, 16, 16).contiguous(memory_format=torch.channels_last)
    geometry = torch.randn(64, 4)
    with cm.training_autocast("float32"):
        exact, _, _ = model(pixels, geometry)
    with cm.training_autocast("bfloat16"):
        rounded, box, _ = model(pixels, geometry)
    assert exact.dtype == torch.float32 and rounded.dtype == torch.bfloat16 and box.dtype == torch.bfloat16
    eps = torch.finfo(torch.bfloat16).eps
    assert (rounded.float() - exact).abs().max() <= 8 * eps * exact.abs().max()
    assert all(p.dtype == torch.float32 for p in model.parameters())
    with pytest.raises(ValueError, match="crossfit.precision"):
        cm.training_autocast("half")


def test_object_crops_match_torchvision_roi_align() -> None:
    # Reference: torchvision.ops.roi_align(aligned=True, sampling_ratio=SAMPLES) on pixels - 114 (zero outside).
    from torchvision.ops import roi_align

    from detdiff.crossfit.crops import SAMPLES
    rng = np.random.default_rng(6)
    image = rng.integers(0, 256, (120, 160, 3), dtype=np.uint8)
    boxes = np.array([[40.0, 30.0, 20.0, 14.0], [5.0, 80.0, 9.0, 30.0], [100.0, 2.0, 30.0, 25.0]])
    ours = object_crops(image, boxes).astype(np.float64)
    side = np.maximum(boxes[:, 2:], 4.0)
    centre = boxes[:, :2] + boxes[:, 2:] / 2
    windows = np.concatenate([centre - side * CONTEXT / 2, centre + side * CONTEXT / 2], axis=1)
    pixels = torch.from_numpy(image.astype(np.float32)).permute(2, 0, 1)[None] - 114.0
    rois = torch.cat([torch.zeros(3, 1), torch.from_numpy(windows).float()], dim=1)
    reference = (roi_align(pixels, rois, (STORE, STORE), 1.0, sampling_ratio=SAMPLES, aligned=True) + 114.0)
    reference = reference.permute(0, 2, 3, 1).numpy()
    inside = np.abs(ours - reference) <= 1.0            # rounding to uint8
    # at the border roi_align clamps samples in (-1, -0.5) to the edge where we take them as outside: allow a rim
    assert inside.mean() > 0.97


def test_background_boxes_lie_beside_the_box_and_their_windows_inside_the_crop() -> None:
    # IoU with the annotated box [0, 0, 1, 1]: torchvision.ops.box_iou. The training-size window (WINDOW x the box)
    # must lie inside the stored crop, so that no black roi_align border marks a background window.
    rng = np.random.default_rng(0)
    boxes, ok = cm.background_boxes(rng, 2000, (0.5 - CONTEXT / 2, 0.5 + CONTEXT / 2))
    assert ok.mean() > 0.95
    iou = box_iou(torch.from_numpy(boxes[ok]).double(), torch.tensor([[0.0, 0.0, 1.0, 1.0]], dtype=torch.float64))
    assert (iou < cm.BACKGROUND_MAX_IOU).all()
    windows = windows_around(boxes[ok].astype(np.float64))
    assert (windows >= 0.5 - CONTEXT / 2 - 1e-6).all() and (windows <= 0.5 + CONTEXT / 2 + 1e-6).all()
    side = boxes[ok, 2:] - boxes[ok, :2]
    assert (side <= 1 + 1e-6).all() and (side >= np.exp(-cm.SCALE) - 1e-6).all()   # the object's own scale


def test_place_crops_are_object_crops_of_the_opencv_decoded_image(tmp_path) -> None:
    # reference decode: OpenCV (cv2.imread, BGR -> RGB); the crop itself is object_crops, checked above against
    # torchvision's roi_align
    from detdiff.crossfit.places import place_crops
    from detdiff.data.coco import build_dataset
    from digits_scene import build_digit_scenes
    ann, images, _ = build_digit_scenes(tmp_path, num_images=4, seed=1)
    ds = build_dataset(json.loads(ann.read_text()), ann_path=ann, images_dir=images)
    image = np.array([0, 2, 3, 0])                           # one image's places need not be adjacent
    boxes = np.array([[5.0, 6.0, 20.0, 24.0], [0.0, 0.0, 12.0, 9.0], [100.0, 90.0, 40.0, 50.0],
                      [60.0, 40.0, 30.0, 30.0]])
    reference = np.stack([object_crops(cv2.cvtColor(cv2.imread(str(images / ds.file_names[i])), cv2.COLOR_BGR2RGB),
                                       b[None])[0] for i, b in zip(image, boxes)])
    places = place_crops(ds, image, boxes, max_pixels=10**8, threads=2, progress=False)
    assert np.array_equal(places.image, image) and np.array_equal(places.box, boxes)
    assert np.array_equal(places.crops, reference)
    stored = place_crops(ds, image, boxes, max_pixels=10**8, progress=False, store=tmp_path / "places.npy")
    assert isinstance(stored.crops, np.memmap) and np.array_equal(stored.crops, reference)   # same crops, on disk
    (images / ds.file_names[2]).unlink()                     # an image gone since the cache: its place is left out
    for store in (None, tmp_path / "again.npy"):
        kept = place_crops(ds, image, boxes, max_pixels=10**8, progress=False, store=store)
        assert np.array_equal(kept.image, image[[0, 2, 3]]) and np.array_equal(kept.crops, reference[[0, 2, 3]])


def test_objectness_of_fold_models_finds_unannotated_digits_on_real_textures(tmp_path) -> None:
    # Real pixels from open data: scikit-learn's handwritten digits (UCI, Alpaydin & Kaynak 1998) on scikit-image's
    # textures (tests/digits_scene.py). A fifth of the digits are left unannotated; the fold models, which never
    # saw those images, must rate the unannotated digits as objects and background places beside them as not:
    # AUROC (scikit-learn's roc_auc_score) >= 0.9.
    from sklearn.metrics import roc_auc_score
    from detdiff.crossfit.folds import Places
    from detdiff.data.coco import build_dataset
    from digits_scene import build_digit_scenes
    ann, images, _ = build_digit_scenes(tmp_path, num_images=240, seed=2)
    ds = build_dataset(json.loads(ann.read_text()), ann_path=ann, images_dir=images)
    rng = np.random.default_rng(0)
    unannotated = np.sort(rng.choice(ds.num_annotations, ds.num_annotations // 5, replace=False))
    trained = training_copy(ds, unannotated)
    crops = np.zeros((ds.num_annotations, STORE, STORE, 3), np.uint8)
    for i in range(ds.num_images):
        rows = np.flatnonzero(ds.ann_image_index == i)
        rgb = cv2.cvtColor(cv2.imread(str(images / ds.file_names[i])), cv2.COLOR_BGR2RGB)
        crops[rows] = object_crops(rgb, ds.boxes[rows])
    # places: the unannotated digits, as many same-size boxes on the texture away from every digit, and each digit's
    # box shifted by a fifth of its side on both axes (a near miss, IoU about 0.5)
    image = ds.ann_image_index[unannotated]
    shifted = ds.boxes[unannotated].copy()
    shifted[:, :2] = rng.uniform(0, 128 - shifted[:, 2:], shifted[:, 2:].shape)
    clear = box_iou(torch.from_numpy(xywh_to_xyxy(shifted)), torch.from_numpy(ds.boxes_xyxy())).numpy()
    clear = (clear * (ds.ann_image_index[None, :] == image[:, None])).max(1) < 0.05
    near = ds.boxes[unannotated].copy()
    near[:, :2] += near[:, 2:] * 0.2
    place_image = np.r_[image, image[clear], image]
    place_box = np.r_[ds.boxes[unannotated], shifted[clear], near]
    place = place_crops_from_images(images, ds, place_image, place_box)
    config = {"crossfit": {"folds": 3, "epochs": 8, "batch_size": 64, "lr": 0.003, "width": 8, "input_size": 16,
                            "precision": "float32"},
              "train": {"flips": "none", "seed": 0}}
    torch.set_num_threads(1)
    result = cross_fit(ds, trained, crops, np.ones(ds.num_images, bool), np.zeros(0, np.int64), np.zeros((0, 4)),
                       config, tmp_path / "run", places=Places(place_image, place_box, place), progress=False)
    is_digit = np.r_[np.ones(len(image)), np.zeros(clear.sum())]
    assert np.isfinite(result.place_object_p).all() and np.isfinite(result.place_refined).all()
    assert roc_auc_score(is_digit, result.place_object_p[:len(is_digit)]) >= 0.9
    # the box a fold model draws around a near miss lies closer to the digit than the near miss does (IoU by
    # torchvision.ops.box_iou): the crop models learned to correct boxes from shifted windows
    truth = torch.from_numpy(xywh_to_xyxy(ds.boxes[unannotated]))
    before = box_iou(torch.from_numpy(xywh_to_xyxy(near)), truth).diagonal()
    after = box_iou(torch.from_numpy(xywh_to_xyxy(result.place_refined[-len(near):])), truth).diagonal()
    assert float(after.median()) > float(before.median()) + 0.1


def place_crops_from_images(images, ds: CocoDataset, image: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Crops of ``boxes`` cut from the OpenCV-decoded images (the reference decode)."""
    out = np.zeros((len(image), STORE, STORE, 3), np.uint8)
    for i in np.unique(image):
        rows = np.flatnonzero(image == i)
        rgb = cv2.cvtColor(cv2.imread(str(images / ds.file_names[i])), cv2.COLOR_BGR2RGB)
        out[rows] = object_crops(rgb, boxes[rows])
    return out
