"""Large JPEGs decoded at reduced size (libjpeg DCT scaling via Pillow's ``Image.draft``): what is chosen, and
that views, crops and box geometry match a full-resolution decode."""

from __future__ import annotations

import json

import cv2
import numpy as np
import pytest
from PIL import Image

from detdiff.crossfit.crops import CONTEXT, STORE
from detdiff.data.coco import build_dataset
from detdiff.data.image_cache import MIN_CROP_SIDE, build_image_cache, draft_reduction
from fault_injection import DecodeInterrupt

VIEW = 320


def _dataset(images_dir, records, boxes):
    """``records`` = [(file_name, width, height)], ``boxes`` = {image index: [xywh]} -> CocoDataset."""
    images = [{"id": i + 1, "file_name": f, "width": w, "height": h} for i, (f, w, h) in enumerate(records)]
    anns = [{"id": 100 * (i + 1) + k, "image_id": i + 1, "category_id": 1, "bbox": [float(v) for v in b],
             "iscrowd": 0, "area": float(b[2] * b[3])} for i, bs in boxes.items() for k, b in enumerate(bs)]
    return build_dataset({"images": images, "annotations": anns, "categories": [{"id": 1, "name": "thing"}]},
                         images_dir=images_dir)


def _photo(width: int, height: int, boxes, seed: int = 0) -> np.ndarray:
    """A smooth colour gradient with each box filled white on a black frame (RGB uint8), slightly blurred."""
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
    rgb = np.stack([60 + 120 * xx / width, 60 + 120 * yy / height, 90 + 60 * np.sin(xx / 300 + yy / 200)], axis=-1)
    rgb = rgb.astype(np.uint8)
    for x, y, w, h in boxes:
        x, y, w, h = (int(v) for v in (x, y, w, h))
        rgb[y:y + h, x:x + w] = 0
        m = max(1, min(w, h) // 8)
        rgb[y + m:y + h - m, x + m:x + w - m] = 255
    return cv2.GaussianBlur(rgb, (5, 5), 1.0)


def _inside(view: np.ndarray, box, scale: float) -> np.ndarray:
    """The central half of ``box`` (xywh original px) in a view of that ``scale`` (inside the white fill)."""
    x, y, w, h = (v * scale for v in box)
    return view[int(y + h / 4):int(np.ceil(y + 3 * h / 4)), int(x + w / 4):int(np.ceil(x + 3 * w / 4))]


def _opencv_descriptors(view: np.ndarray, width: int, height: int) -> np.ndarray:
    """OpenCV reference on the image part of a view: Laplacian variance, mean and std of the grey level."""
    scale = len(view) / max(width, height)
    gray = cv2.cvtColor(view[:round(height * scale), :round(width * scale)], cv2.COLOR_RGB2GRAY)
    return np.array([cv2.Laplacian(gray, cv2.CV_64F).var(), gray.mean(), gray.std()])


def _caches(tmp_path, records, boxes, view: int = VIEW):
    ds = _dataset(tmp_path, records, boxes)
    kwargs = dict(max_pixels=10**8, progress=False, workers=1, with_crops=True)
    reduced = build_image_cache(ds, tmp_path / "reduced", view, reduced_decode=True, **kwargs)
    # reference: Pillow's full-resolution decode (the path without reduction), cut and letterboxed the same way
    full = build_image_cache(ds, tmp_path / "full", view, reduced_decode=False, **kwargs)
    return ds, reduced, full


def _reduction(cache) -> np.ndarray:
    with np.load(cache.cache_dir / "meta.npz") as meta:
        return meta["reduction"]


def test_draft_reduction_keeps_the_view_and_every_crop_at_full_resolution():
    big = np.array([[0, 0, 200, 150]])
    assert MIN_CROP_SIDE == STORE / CONTEXT == 16
    assert draft_reduction(4000, 3000, big, 250) == 8                     # 500 px = 2 x 250
    assert draft_reduction(4000, 3000, big, 320) == 4                     # 1000 >= 2 x 320 > 500
    assert draft_reduction(4000, 3000, big, 1000) == 2 and draft_reduction(4000, 3000, big, 1001) == 1
    assert draft_reduction(4000, 3000, np.array([[5, 5, 100, 40]]), 320) == 2   # 40 px side: 20 >= 16 > 10
    assert draft_reduction(4000, 3000, np.array([[5, 5, 100, 31.9]]), 320) == 1
    assert draft_reduction(4000, 3000, np.zeros((0, 4)), 250) == 8         # no box: only the view limits
    assert draft_reduction(4001, 3000, big, 250) == 1                      # 8, 4, 2 do not divide 4001
    assert draft_reduction(4004, 3000, big, 250) == 4                      # 4 divides both, 8 does not
    assert draft_reduction(640, 480, big, 160) == 2 and draft_reduction(640, 480, big, 161) == 1


@pytest.mark.parametrize("view, reduction", [(320, 4), (250, 8)])
def test_large_jpeg_decodes_reduced_with_the_crops_and_view_of_a_full_decode(tmp_path, view, reduction):
    boxes = [(400, 300, 600, 500), (2500, 1200, 900, 1300), (400, 2600, 200, 160)]     # shortest side 160 = 16 * 8
    Image.fromarray(_photo(4000, 3000, boxes)).save(tmp_path / "big.jpg", quality=95)
    _, reduced, full = _caches(tmp_path, [("big.jpg", 4000, 3000)], {0: boxes}, view)
    assert _reduction(reduced).tolist() == [reduction] and _reduction(full).tolist() == [1]
    assert reduced.problems == [] and reduced.scale[0] == full.scale[0] == view / 4000
    view_diff = np.abs(reduced.images[0].astype(int) - full.images[0].astype(int))
    crop_diff = np.abs(reduced.crops.astype(int) - full.crops.astype(int))
    # measured: view mean 0.07-0.11 grey levels, crops 0.05-0.07; 99th percentiles 1 (edges of the white fills)
    assert view_diff.mean() < 0.3 and np.percentile(view_diff, 99) <= 2, (view_diff.mean(), view_diff.max())
    assert crop_diff.mean() < 0.2 and np.percentile(crop_diff, 99) <= 2, (crop_diff.mean(), crop_diff.max())
    # the geometry itself (OpenCV reference: cv2.resize INTER_AREA of the full image into the view): each box's
    # white inside lands at xyxy * scale in the view, and at the crop's centre quarter
    s = reduced.scale[0]
    for box in boxes:
        assert _inside(reduced.images[0], box, s).min() > 200 and _inside(full.images[0], box, s).min() > 200
    lo, hi = int(STORE * (0.5 - 0.5 / CONTEXT)) + 3, int(STORE * (0.5 + 0.5 / CONTEXT)) - 3
    assert (reduced.crops[:, lo:hi, lo:hi].min(axis=(1, 2, 3)) > 200).all()
    assert (reduced.crops[:, :lo - 6, :].max(axis=(1, 2, 3)) < 200).all()   # gradient above the box, no white
    # descriptors are measured on the view, so the reduction hardly changes them (measured: blur 0.90x and 0.97x;
    # at full resolution this image's Laplacian variance is 5.4, 100x less than on the view or a reduced decode)
    assert np.allclose(reduced.pixel[0, :3], _opencv_descriptors(full.images[0], 4000, 3000), rtol=0.15)
    assert np.allclose(reduced.pixel[0, 1:3], _opencv_descriptors(full.images[0], 4000, 3000)[1:], rtol=0.01)


def test_a_tiny_box_keeps_full_resolution_and_a_png_is_never_drafted(tmp_path):
    boxes = [(400, 300, 600, 500), (2000, 1000, 12, 10)]             # one 10 px box: no reduction for this image
    Image.fromarray(_photo(4000, 3000, boxes)).save(tmp_path / "tiny.jpg", quality=90)
    png = _photo(2400, 1600, [(100, 100, 800, 600)])
    Image.fromarray(png).save(tmp_path / "big.png", compress_level=1)
    records = [("tiny.jpg", 4000, 3000), ("big.png", 2400, 1600)]
    _, reduced, full = _caches(tmp_path, records, {0: boxes, 1: [(100, 100, 800, 600)]})
    assert _reduction(reduced).tolist() == [1, 1]
    assert np.array_equal(reduced.images, full.images) and np.array_equal(reduced.crops, full.crops)
    for i, (_, w, h) in enumerate(records):
        assert np.allclose(reduced.pixel[i, :3], _opencv_descriptors(reduced.images[i], w, h), rtol=1e-5)


def test_exif_rotated_large_jpeg_is_reduced_in_its_displayed_orientation(tmp_path):
    stored_boxes = [(300, 200, 800, 700)]                          # in the stored (4000 wide) orientation
    stored = _photo(4000, 3000, stored_boxes)
    exif = Image.Exif()
    exif[0x0112] = 6    # EXIF 2.3 Orientation tag 274; 6 = displayed image is the stored one turned 90° clockwise
    Image.fromarray(stored).save(tmp_path / "rot.jpg", quality=95, exif=exif.tobytes())
    x, y, w, h = stored_boxes[0]
    displayed_box = (3000 - (y + h), x, h, w)                      # clockwise turn: (x, y) -> (H - y, x)
    _, reduced, full = _caches(tmp_path, [("rot.jpg", 3000, 4000)], {0: [displayed_box]})
    assert _reduction(reduced).tolist() == [4]
    assert json.loads((reduced.cache_dir / "problems.json").read_text()) == []     # sizes agree once turned
    assert _inside(reduced.images[0], displayed_box, reduced.scale[0]).min() > 200
    assert _inside(full.images[0], displayed_box, full.scale[0]).min() > 200
    assert np.abs(reduced.crops.astype(int) - full.crops.astype(int)).mean() < 0.3


def test_interrupted_reduced_build_resumes_with_the_reductions_of_a_clean_build(tmp_path, monkeypatch):
    records, boxes = [], {}
    for i in range(6):                      # 1024x768 for a 64 px view: 1/8 without boxes, 1/2 with a 40 px box
        Image.fromarray(_photo(1024, 768, [(100, 100, 300, 40)] if i % 2 else [])).save(tmp_path / f"{i}.jpg",
                                                                                         quality=90)
        records.append((f"{i}.jpg", 1024, 768))
        if i % 2:
            boxes[i] = [(100, 100, 300, 40)]
    ds = _dataset(tmp_path, records, boxes)
    kwargs = dict(max_pixels=10**8, progress=False, workers=1, with_crops=True)
    clean = build_image_cache(ds, tmp_path / "clean", 64, **kwargs)
    assert _reduction(clean).tolist() == [8, 2] * 3
    decode = DecodeInterrupt(monkeypatch, stop_after=3)
    with pytest.raises(KeyboardInterrupt):
        build_image_cache(ds, tmp_path / "cache", 64, **kwargs)
    decode.resume()
    resumed = build_image_cache(ds, tmp_path / "cache", 64, **kwargs)
    assert _reduction(resumed).tolist() == _reduction(clean).tolist()
    for name in ("images.u8", "crops.u8", "problems.json", "fingerprint.json"):
        assert (resumed.cache_dir / name).read_bytes() == (clean.cache_dir / name).read_bytes(), name
