"""The training view cache: letterbox geometry, robustness to bad files, reuse, and pixel descriptors."""

from __future__ import annotations

import json
import os

import cv2
import numpy as np
import pytest
from PIL import Image

from detdiff.data.coco import build_dataset
from detdiff.data.image_cache import (FINGERPRINT_FILE, PAD_VALUE, ImageCache, InsufficientSpaceError,
                                      build_image_cache, check_folder_room)


def _dataset(images_dir, records, boxes=None):
    """COCO dict -> CocoDataset: ``records`` = [(file_name, width, height)], ``boxes`` = {image index: [xywh]}."""
    boxes = boxes or {}
    images = [{"id": i + 1, "file_name": f, "width": w, "height": h} for i, (f, w, h) in enumerate(records)]
    anns = [{"id": 100 * (i + 1) + k, "image_id": i + 1, "category_id": 1, "bbox": list(b), "iscrowd": 0,
             "area": float(b[2] * b[3])} for i, bs in boxes.items() for k, b in enumerate(bs)]
    return build_dataset({"images": images, "annotations": anns, "categories": [{"id": 1, "name": "thing"}]},
                         images_dir=images_dir)


def test_letterbox_geometry_box_lands_at_xyxy_times_scale(tmp_path):
    img = np.zeros((100, 200, 3), dtype=np.uint8)
    x1, y1, x2, y2 = 40, 20, 120, 60
    img[y1:y2, x1:x2] = 255
    Image.fromarray(img).save(tmp_path / "a.png")
    ds = _dataset(tmp_path, [("a.png", 200, 100)], {0: [(x1, y1, x2 - x1, y2 - y1)]})
    cache = build_image_cache(ds, tmp_path / "cache", 64, max_pixels=10**8, progress=False, workers=1)
    scale = 64 / 200                                   # DEVELOPERS.md "Training view": S / max(w, h)
    assert cache.scale[0] == pytest.approx(scale)
    view = cache.images[0]
    vx1, vy1, vx2, vy2 = (np.array([x1, y1, x2, y2]) * scale)       # 12.8, 6.4, 38.4, 19.2
    inside = view[int(np.ceil(vy1)) + 1:int(vy2) - 1, int(np.ceil(vx1)) + 1:int(vx2) - 1]
    assert inside.min() == 255
    assert view[:int(vy1) - 1, :].max() == 0 and view[int(np.ceil(vy2)) + 1:32, :].max() == 0
    assert view[:32, :int(vx1) - 1].max() == 0 and view[:32, int(np.ceil(vx2)) + 1:].max() == 0
    assert (view[32:] == PAD_VALUE).all()             # padding below the 64x32 resized image, top-left placed
    assert cache.usable.all() and cache.problems == []


def _write_bad_and_odd_files(root):
    """Every kind of file the issue lists, plus an outside file; returns the (file_name, width, height) records."""
    Image.fromarray(np.full((30, 40, 3), 90, np.uint8)).save(root / "good.png")
    Image.fromarray(np.full((60, 80, 3), 200, np.uint8)).save(root / "full.jpg", quality=95)
    data = (root / "full.jpg").read_bytes()
    (root / "truncated.jpg").write_bytes(data[: len(data) // 2])
    (root / "empty.jpg").write_bytes(b"")
    (root / "text.jpg").write_text("this is not an image\n")
    Image.new("L", (3000, 3000)).save(root / "huge.png")                    # header says 9 Mpx
    huge = (root / "huge.png").read_bytes()
    # half a file: decoding would fail, so the "too many pixels" reason proves the header was read first
    (root / "huge_truncated.png").write_bytes(huge[: len(huge) // 2])
    g16 = np.zeros((20, 30), np.uint16)
    g16[:, 10:20] = 100 * 257
    g16[:, 20:] = 65535
    Image.fromarray(g16).save(root / "deep16.png")
    rgba = np.zeros((20, 30, 4), np.uint8)
    rgba[:, 15:] = (255, 0, 0, 255)                                        # left half fully transparent
    Image.fromarray(rgba, "RGBA").save(root / "alpha.png")
    Image.fromarray(np.tile(np.arange(30, dtype=np.uint8) * 8, (20, 1)), "L").save(root / "gray.png")
    Image.fromarray(np.full((50, 100, 3), 10, np.uint8)).save(root / "small_file.png")
    (root.parent / "outside.png").write_bytes((root / "good.png").read_bytes())
    records = [("good.png", 40, 30), ("truncated.jpg", 80, 60), ("empty.jpg", 80, 60), ("text.jpg", 10, 10),
               ("huge_truncated.png", 3000, 3000), ("deep16.png", 30, 20), ("alpha.png", 30, 20),
               ("gray.png", 30, 20), ("small_file.png", 200, 100), ("../outside.png", 40, 30),
               ("missing.png", 40, 30), ("full.jpg", 80, 60)]
    return records


@pytest.mark.parametrize("workers", [1, 2])
def test_bad_files_are_unusable_with_reasons_and_the_build_goes_on(tmp_path, workers):
    root = tmp_path / "images"
    root.mkdir()
    records = _write_bad_and_odd_files(root)
    ds = _dataset(root, records)
    cache = build_image_cache(ds, tmp_path / "cache", 32, max_pixels=1_000_000, progress=False, workers=workers)
    by_name = {p["file_name"]: p for p in cache.problems}
    unusable = {"truncated.jpg": "corrupt or truncated", "empty.jpg": "empty file", "text.jpg": "not an image",
                "huge_truncated.png": "exceeds data.max_pixels", "../outside.png": "unsafe file_name",
                "missing.png": "file not found"}
    for name, reason in unusable.items():
        i = ds.file_names.index(name)
        assert not cache.usable[i], name
        assert reason in by_name[name]["reason"] and by_name[name]["level"] == "error", by_name[name]
        assert np.isnan(cache.pixel[i]).all()
        assert (cache.images[i] == PAD_VALUE).all()
    usable = ["good.png", "deep16.png", "alpha.png", "gray.png", "small_file.png", "full.jpg"]
    assert all(cache.usable[ds.file_names.index(n)] for n in usable)
    on_disk = json.loads((tmp_path / "cache" / "problems.json").read_text())
    assert {p["file_name"] for p in on_disk} == set(unusable) | {"small_file.png"}

    # 16-bit grey scales to 8 bits (65535 -> 255, 100*257 -> 100); 30x20 at S=32 -> 32x21 view, same columns
    deep = cache.images[ds.file_names.index("deep16.png")]
    assert deep[5, 2].tolist() == [0, 0, 0] and deep[5, 15].tolist() == [100] * 3 and deep[5, 28].tolist() == [255] * 3
    # RGBA: transparent area composited over the padding grey, opaque red kept
    alpha = cache.images[ds.file_names.index("alpha.png")]
    assert alpha[5, 3].tolist() == [PAD_VALUE] * 3 and alpha[5, 28].tolist() == [255, 0, 0]
    gray = cache.images[ds.file_names.index("gray.png")]
    assert (gray[..., 0] == gray[..., 1]).all() and (gray[..., 1] == gray[..., 2]).all()
    # declared 200x100 but the file is 100x50: warning, still usable, view follows the declared size
    i = ds.file_names.index("small_file.png")
    note = by_name["small_file.png"]
    assert note["usable"] and note["level"] == "warning" and "100x50" in note["reason"]
    assert cache.scale[i] == pytest.approx(32 / 200)
    assert (cache.images[i][:16] == 10).all() and (cache.images[i][16:] == PAD_VALUE).all()


def test_exif_orientation_is_applied(tmp_path):
    stored = np.zeros((40, 60, 3), np.uint8)          # stored 60 wide x 40 high
    stored[:20, :20] = (255, 0, 0)                    # red block at the stored top-left
    exif = Image.Exif()
    exif[0x0112] = 6    # EXIF 2.3 Orientation tag 274; 6 = displayed image is the stored one turned 90° clockwise
    Image.fromarray(stored).save(tmp_path / "rot.jpg", quality=95, exif=exif.tobytes())
    ds = _dataset(tmp_path, [("rot.jpg", 40, 60)])    # COCO sizes are of the displayed image: 40 wide x 60 high
    cache = build_image_cache(ds, tmp_path / "cache", 60, max_pixels=10**8, progress=False, workers=1)
    assert cache.usable[0] and cache.problems == []
    view = cache.images[0].astype(int)
    expected = np.rot90(stored, k=-1)                 # numpy: k=-1 turns clockwise -> red block at top-right
    assert expected.shape == (60, 40, 3)
    assert np.abs(view[:60, :40] - expected).mean() < 8
    assert view[5, 35, 0] > 200 and view[5, 5, 0] < 50


def test_cache_is_reused_and_rebuilt_when_incomplete_or_changed(tmp_path):
    Image.fromarray(np.full((20, 20, 3), 50, np.uint8)).save(tmp_path / "a.png")
    ds = _dataset(tmp_path, [("a.png", 20, 20)])
    cache_dir = tmp_path / "cache"
    build_image_cache(ds, cache_dir, 32, max_pixels=10**8, progress=False, workers=1)
    stamp = (cache_dir / "images.u8").stat().st_mtime_ns
    again = build_image_cache(ds, cache_dir, 32, max_pixels=10**8, progress=False, workers=1)
    assert (cache_dir / "images.u8").stat().st_mtime_ns == stamp and again.images[0, 0, 0, 0] == 50
    (cache_dir / FINGERPRINT_FILE).unlink()           # what a kill before the last rename leaves
    with pytest.raises(FileNotFoundError, match="no complete image cache"):
        ImageCache.open(cache_dir)
    Image.fromarray(np.full((20, 20, 3), 70, np.uint8)).save(tmp_path / "a.png")
    os.utime(tmp_path / "a.png", ns=(stamp + 10**9, stamp + 10**9))
    rebuilt = build_image_cache(ds, cache_dir, 32, max_pixels=10**8, progress=False, workers=1)
    assert rebuilt.images[0, 0, 0, 0] == 70
    assert not [p for p in cache_dir.iterdir() if ".tmp" in p.name]
    other_size = build_image_cache(ds, cache_dir, 64, max_pixels=10**8, progress=False, workers=1)
    assert other_size.images.shape == (1, 64, 64, 3)


def test_pixel_descriptors_equal_direct_opencv_calls(tmp_path):
    square = np.zeros((64, 64), np.uint8)
    square[16:48, 16:48] = 255
    Image.fromarray(square, "L").save(tmp_path / "square.png")
    rng = np.random.default_rng(0)
    noisy = cv2.GaussianBlur(rng.integers(0, 256, (90, 120, 3), dtype=np.uint8), (5, 5), 1.5)
    Image.fromarray(noisy).save(tmp_path / "noisy.png")
    box = (30, 20, 40, 30)
    ds = _dataset(tmp_path, [("square.png", 64, 64), ("noisy.png", 120, 90)], {1: [box]})
    # full-resolution descriptors (the view's are checked in test_reduced_decode.py)
    cache = build_image_cache(ds, tmp_path / "cache", 32, max_pixels=10**8, progress=False, workers=1,
                              reduced_decode=False)
    # /work/shared/CHECKS.md worked values (OpenCV): Laplacian variance 4191.06, Canny(100, 200) density 0.030273
    assert cache.pixel[0, 0] == pytest.approx(4191.06, rel=1e-5)
    assert cache.pixel[0, 3] == pytest.approx(0.030273, abs=1e-6)
    gray = cv2.cvtColor(noisy, cv2.COLOR_RGB2GRAY)
    # OpenCV reference: cv2.Laplacian(gray, CV_64F).var() (Pech-Pacheco et al., ICPR 2000), brightness/contrast
    assert cache.pixel[1, 0] == pytest.approx(cv2.Laplacian(gray, cv2.CV_64F).var(), rel=1e-5)
    assert cache.pixel[1, 1] == pytest.approx(gray.mean(), rel=1e-5)
    assert cache.pixel[1, 2] == pytest.approx(gray.std(), rel=1e-5)
    # OpenCV reference: Canny(100, 200) edge density outside the annotated box (thresholds: common practice)
    edges = cv2.Canny(gray, 100, 200) > 0
    outside = np.ones_like(edges)
    outside[20:50, 30:70] = False
    assert cache.pixel[1, 3] == pytest.approx(edges[outside].mean(), rel=1e-5)


def test_unwritable_or_full_cache_folder_is_refused(tmp_path, monkeypatch):
    (tmp_path / "file").write_text("x")
    with pytest.raises(InsufficientSpaceError, match="cannot write"):
        check_folder_room(tmp_path / "file" / "cache", 10, "the image cache")
    import shutil
    monkeypatch.setattr(shutil, "disk_usage", lambda p: shutil._ntuple_diskusage(10**9, 10**9 - 100, 100))
    with pytest.raises(InsufficientSpaceError, match="needs about"):
        check_folder_room(tmp_path / "cache", 10**6, "the image cache")


FORK_AFTER_OPENCV = """
import sys
import cv2
import numpy as np
from PIL import Image
from detdiff.data.coco import build_dataset
from detdiff.data.image_cache import build_image_cache

root = sys.argv[1]
for i in range(12):
    Image.fromarray(np.full((40, 60, 3), 20 * i, np.uint8)).save(f"{root}/{i}.png")
ds = build_dataset({"images": [{"id": i + 1, "file_name": f"{i}.png", "width": 60, "height": 40} for i in range(12)],
                    "annotations": [], "categories": [{"id": 1, "name": "a"}]}, images_dir=root)
big = np.random.default_rng(0).integers(0, 255, (2000, 3000, 3), dtype=np.uint8)
for round in range(8):
    cv2.setNumThreads(2)                                  # the parent's own OpenCV work runs on its thread pool
    cv2.GaussianBlur(cv2.resize(big, (1500, 1000), interpolation=cv2.INTER_AREA), (9, 9), 3)
    build_image_cache(ds, f"{root}/cache{round}", 32, max_pixels=10**8, progress=False, workers=2)
print("ok")
"""


def test_fork_pool_after_the_parent_used_opencv_threads_does_not_hang(tmp_path):
    import subprocess
    import sys

    (tmp_path / "child.py").write_text(FORK_AFTER_OPENCV)
    done = subprocess.run([sys.executable, str(tmp_path / "child.py"), str(tmp_path)], capture_output=True,
                          text=True, timeout=60, env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)})
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr[-2000:]
