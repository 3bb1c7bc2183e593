"""The compressed image cache (``data.cache_codec: jpeg``): every stored row is OpenCV's own JPEG of the raw row,
and an audit runs through it end to end."""

from __future__ import annotations

import json
import subprocess
import sys

import cv2
import numpy as np
import pytest
from skimage import data as skdata

from detdiff.config import load_config
from detdiff.data.coco import build_dataset
from detdiff.data.encoded_rows import JPEG_QUALITY, EncodedRows
from detdiff.data.image_cache import ENCODED_FILES, build_image_cache
from detdiff.data.scenarios import generate_demo
from detdiff.recipe import fit_recipe


@pytest.fixture(scope="module")
def photos(tmp_path_factory):
    """scikit-image's bundled photographs written as a JPEG and a PNG of other sizes, with small and large boxes."""
    root = tmp_path_factory.mktemp("photos")
    (root / "images").mkdir()
    records, boxes = [], []
    for i, (name, size, ext) in enumerate([("astronaut", (1400, 1400), ".jpg"), ("coffee", (900, 600), ".png"),
                                           ("chelsea", (451, 300), ".jpg")]):
        pixels = cv2.resize(getattr(skdata, name)(), size, interpolation=cv2.INTER_CUBIC)
        cv2.imwrite(str(root / "images" / f"{name}{ext}"), cv2.cvtColor(pixels, cv2.COLOR_RGB2BGR))
        records.append({"id": i + 1, "file_name": f"{name}{ext}", "width": size[0], "height": size[1]})
        for k, side in enumerate((10, 40, 200)):
            boxes.append({"id": 10 * i + k + 1, "image_id": i + 1, "category_id": 1 + k % 2,
                          "bbox": [30.0 + 60 * k, 50.0, float(side), float(side) * 0.8], "area": side * side * 0.8,
                          "iscrowd": 0})
    coco = {"images": records, "annotations": boxes,
            "categories": [{"id": 1, "name": "a"}, {"id": 2, "name": "b"}]}
    return root, build_dataset(coco, images_dir=root / "images")


def test_jpeg_rows_are_opencv_jpegs_of_the_raw_rows(photos, tmp_path):
    root, ds = photos
    options = dict(max_pixels=10**8, progress=False, workers=1, with_crops=True,
                   tiles={"scale": 2.0, "min_object_px": 16})
    raw = build_image_cache(ds, tmp_path / "raw", 128, **options)
    jpeg = build_image_cache(ds, tmp_path / "jpeg", 128, codec="jpeg", **options)
    assert jpeg.codec == "jpeg" and isinstance(jpeg.images, EncodedRows) and raw.num_tiles > 0
    assert sorted(p.name for p in jpeg.cache_dir.glob("*.jpgrows")) == sorted(ENCODED_FILES.values())
    np.testing.assert_array_equal(jpeg.scale, raw.scale)
    np.testing.assert_array_equal(jpeg.pixel, raw.pixel)               # descriptors come from the decoded pixels
    params = [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY]
    for name in ("images", "tiles", "crops"):
        stored, reference = np.asarray(getattr(jpeg, name)), np.asarray(getattr(raw, name))
        assert stored.shape == reference.shape, name
        for row, want in zip(stored, reference):
            # reference: OpenCV's encoder and decoder applied to the raw row (libjpeg is deterministic)
            again = cv2.imdecode(cv2.imencode(".jpg", cv2.cvtColor(want, cv2.COLOR_RGB2BGR), params)[1],
                                 cv2.IMREAD_COLOR)
            np.testing.assert_array_equal(row, cv2.cvtColor(again, cv2.COLOR_BGR2RGB))
        # JPEG at quality 90 keeps photographs above about 30 dB PSNR (common practice; 33-44 dB measured here)
        assert cv2.PSNR(reference, stored) > 30.0, name
        assert getattr(jpeg, name).nbytes * 4 < reference.nbytes, name
    views = np.arange(raw.num_images + raw.num_tiles)
    np.testing.assert_array_equal(jpeg.view_pixels(views[::-1]), np.asarray(jpeg.view_pixels(views))[::-1])
    np.testing.assert_array_equal(jpeg.view_of(int(views[-1])), jpeg.tiles[-1])


def test_a_refused_image_reads_as_padding_and_a_short_file_is_refused(tmp_path):
    paths = generate_demo(tmp_path / "demo", num_images=6, seed=3, width=128, height=96, progress=False)
    coco = json.loads(paths.annotations.read_text())
    (paths.images_dir / "broken.jpg").write_bytes(b"not an image")
    coco["images"].append({"id": 999, "file_name": "broken.jpg", "width": 128, "height": 96})
    ds = build_dataset(coco, images_dir=paths.images_dir)
    cache = build_image_cache(ds, tmp_path / "cache", 64, max_pixels=10**8, progress=False, workers=1, codec="jpeg")
    broken = ds.file_names.index("broken.jpg")
    assert not cache.usable[broken] and (cache.images[broken] == 114).all()
    assert cache.images.lengths[broken] == 0 and (cache.images.lengths[cache.usable] > 0).all()
    blob = tmp_path / "cache" / ENCODED_FILES["images"]
    blob.write_bytes(blob.read_bytes()[:-10])
    with pytest.raises(FileNotFoundError, match="damaged"):
        EncodedRows.open(blob, cache.images.offsets, cache.images.lengths, (64, 64, 3))


def test_auto_codec_is_raw_for_small_caches_and_jpeg_past_the_limit(photos):
    _, ds = photos
    config = load_config("ci", {"data": {"image_size": 128}})
    assert config["data"]["cache_codec"] == "auto"
    resolved, recipe = fit_recipe(ds, config, measure=False)
    assert resolved["data"]["cache_codec"] == "raw" and recipe.settings["data.cache_codec"] == "raw"
    config["recipe"]["raw_cache_gb"] = 1e-4                 # 100 kB: three 128 px views and crops are more
    resolved, recipe = fit_recipe(ds, config, measure=False)
    assert resolved["data"]["cache_codec"] == "jpeg" and "over recipe.raw_cache_gb" in recipe.reasons["data.cache_codec"]


@pytest.mark.slow
def test_an_audit_with_the_jpeg_cache_runs_and_plans_its_bytes(tmp_path):
    paths = generate_demo(tmp_path / "demo", num_images=40, seed=5, width=160, height=120, progress=False)
    run = tmp_path / "run"
    subprocess.run([sys.executable, "-m", "detdiff", "audit", str(paths.annotations), "--images", str(paths.images_dir),
                    "--out", str(run), "--config", "ci", "--epochs", "2", "--image-size", "96", "--threads", "1",
                    "--device", "cpu", "--cache-codec", "jpeg", "--no-report", "--quiet"], check=True)
    assert json.loads((run / "recipe.json").read_text())["settings"]["data.cache_codec"] == "jpeg"
    assert not list((run / "cache").glob("*.u8")) and (run / "cache" / ENCODED_FILES["images"]).is_file()
    plan = json.loads((run / "plan.json").read_text())
    assert plan["cache_codec"] == "jpeg"
    projected, on_disk = plan["disk_bytes"]["parts"]["image cache"], sum(
        p.stat().st_size for p in (run / "cache").iterdir() if p.is_file())
    assert 0.5 < on_disk / projected < 2.0, (on_disk, projected)       # the warm-up's sample measured the row bytes
    assert (run / "objects.csv").is_file() and json.loads((run / "metrics.json").read_text())["AP50"] is not None
