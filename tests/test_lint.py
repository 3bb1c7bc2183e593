"""COCO lint: one hand-made case per finding, exit statuses, and agreement with outside references.

References: pycocotools (COCO index, mask.area / frPyObjects / encode; the pair IoU behind near
duplicates is checked against torchvision.ops.box_iou in test_boxes.py),
OpenCV (cv2.imwrite makes the image files the header reader must understand).
"""

from __future__ import annotations

import contextlib
import copy
import io
import json
import os
from collections.abc import Callable
from pathlib import Path

import cv2
import numpy as np
import pytest
from pycocotools import mask as mask_utils
from pycocotools.coco import COCO

from detdiff.data.coco import build_dataset
from detdiff.data.lint import lint_coco, run_check
from detdiff.data.lint.areas import flatten_polygons, shoelace_areas
from detdiff.data.lint.codes import CODES
from detdiff.data.lint.report import format_text

W, H = 64, 48


def base_coco() -> dict:
    """Two 64x48 images, two classes, three clean annotations: lints with no finding at all."""
    return {
        "images": [{"id": 10, "file_name": "a.png", "width": W, "height": H},
                   {"id": 20, "file_name": "sub/b.png", "width": W, "height": H}],
        "categories": [{"id": 1, "name": "box"}, {"id": 7, "name": "tape"}],
        "annotations": [
            {"id": 100, "image_id": 10, "category_id": 1, "bbox": [4, 4, 20, 10], "area": 200, "iscrowd": 0},
            {"id": 101, "image_id": 10, "category_id": 7, "bbox": [30, 20, 16, 16], "area": 256, "iscrowd": 0},
            {"id": 102, "image_id": 20, "category_id": 1, "bbox": [0, 0, 64, 48], "area": 3072, "iscrowd": 0},
        ],
    }


def make_images(tmp_path: Path) -> Path:
    """An image folder holding a.png and sub/b.png (64x48 RGB, written by OpenCV)."""
    images = tmp_path / "images"
    (images / "sub").mkdir(parents=True, exist_ok=True)
    pixels = np.full((H, W, 3), 90, np.uint8)
    cv2.imwrite(str(images / "a.png"), pixels)
    cv2.imwrite(str(images / "sub" / "b.png"), pixels)
    return images


def write_ann(tmp_path: Path, data: dict) -> Path:
    path = tmp_path / "ann.json"
    path.write_text(json.dumps(data))
    return path


def write_case(tmp_path: Path, data: dict) -> tuple[Path, Path]:
    """Annotation file plus the image folder of :func:`make_images`."""
    images = make_images(tmp_path)
    return write_ann(tmp_path, data), images


def ann(d: dict, aid: int) -> dict:
    return next(a for a in d["annotations"] if a["id"] == aid)


def img(d: dict, iid: int) -> dict:
    return next(i for i in d["images"] if i["id"] == iid)


def square_rle(top: int, left: int, side: int) -> dict:
    """Compressed RLE of a side x side square in a W x H image, by pycocotools.mask.encode."""
    mask = np.zeros((H, W), np.uint8, order="F")
    mask[top:top + side, left:left + side] = 1
    rle = mask_utils.encode(np.asfortranarray(mask))
    return {"size": rle["size"], "counts": rle["counts"].decode("ascii")}


def _set(path: Callable[[dict], dict], key: str, value) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        path(d)[key] = value
    return mutate


def _delete(path: Callable[[dict], dict], key: str) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        del path(d)[key]
    return mutate


def _append(section: str, record) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        d[section].append(copy.deepcopy(record))
    return mutate


def _write_image(name: str, pixels: np.ndarray) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        cv2.imwrite(str(images / name), pixels)
    return mutate


def _corrupt_a(d: dict, images: Path) -> None:
    (images / "a.png").write_bytes(b"\x89PNG\r\n\x1a\n this is not a PNG any more")


def _symlink_out(d: dict, images: Path) -> None:
    outside = images.parent / "outside.png"
    cv2.imwrite(str(outside), np.zeros((H, W, 3), np.uint8))
    os.symlink(outside, images / "link.png")
    img(d, 10)["file_name"] = "link.png"


def _near_duplicate(d: dict, images: Path) -> None:
    d["annotations"].append(dict(ann(d, 100), id=103, bbox=[4.2, 4.1, 20, 10]))


def _exact_duplicate(d: dict, images: Path) -> None:
    d["annotations"].append(dict(ann(d, 100), id=103))


def _polygon_area_off(d: dict, images: Path) -> None:
    ann(d, 101).update(segmentation=[[30, 20, 46, 20, 46, 36, 30, 36]], area=100.0)


def _crowd_rle(area: float) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        d["annotations"].append({"id": 104, "image_id": 20, "category_id": 7, "bbox": [10, 10, 8, 8],
                                 "area": area, "iscrowd": 1, "segmentation": square_rle(10, 10, 8)})
    return mutate


def _mutations(*steps: Callable[[dict, Path], None]) -> Callable[[dict, Path], None]:
    def mutate(d: dict, images: Path) -> None:
        for step in steps:
            step(d, images)
    return mutate


def ann_100(d: dict) -> dict:
    return ann(d, 100)


def image_10(d: dict) -> dict:
    return img(d, 10)


def category_1(d: dict) -> dict:
    return d["categories"][0]


# (case, mutation, verify_images, code, record, record_id, field, exit status of run_check)
CASES = [
    ("image missing width", _delete(image_10, "width"), False, "missing_key", "image", 10, "width", 1),
    ("image missing id", _delete(image_10, "id"), False, "missing_key", "image", 0, "id", 1),
    ("annotation missing bbox", _delete(ann_100, "bbox"), False, "missing_key", "annotation", 100, "bbox", 1),
    ("annotation missing image_id", _delete(ann_100, "image_id"), False, "missing_key", "annotation", 100,
     "image_id", 1),
    ("category missing name", _delete(category_1, "name"), False, "missing_key", "category", 1, "name", 1),
    ("height as string", _set(image_10, "height", "48"), False, "wrong_type", "image", 10, "height", 1),
    ("file_name as number", _set(image_10, "file_name", 5), False, "wrong_type", "image", 10, "file_name", 1),
    ("category_id as string", _set(ann_100, "category_id", "1"), False, "wrong_type", "annotation", 100,
     "category_id", 1),
    ("bbox of 3 numbers", _set(ann_100, "bbox", [1, 2, 3]), False, "wrong_type", "annotation", 100, "bbox", 1),
    ("bool id", _set(ann_100, "id", True), False, "wrong_type", "annotation", 0, "id", 1),
    ("annotation not an object", _append("annotations", 7), False, "record_not_object", "annotation", 3, "", 1),
    ("unknown category", _set(ann_100, "category_id", 99), False, "unknown_category", "annotation", 100,
     "category_id", 1),
    ("unknown image", _set(ann_100, "image_id", 99), False, "unknown_image", "annotation", 100, "image_id", 1),
    ("duplicate image id", _set(lambda d: d["images"][1], "id", 10), False, "duplicate_id", "image", 10, "id", 1),
    ("duplicate annotation id", _set(lambda d: d["annotations"][2], "id", 100), False, "duplicate_id",
     "annotation", 100, "id", 1),
    ("duplicate category id", _set(lambda d: d["categories"][1], "id", 1), False, "duplicate_id", "category",
     1, "id", 1),
    # pycocotools cocoeval.py keeps matched gt ids in gtm/dtm where 0 means "unmatched" (see CHECKS.md)
    ("annotation id 0", _set(ann_100, "id", 0), False, "annotation_id_zero", "annotation", 0, "id", 1),
    ("missing area", _delete(ann_100, "area"), False, "missing_area", "annotation", 100, "area", 0),
    ("missing iscrowd", _delete(ann_100, "iscrowd"), False, "missing_iscrowd", "annotation", 100, "iscrowd", 0),
    ("area as string", _set(ann_100, "area", "big"), False, "area_invalid", "annotation", 100, "area", 1),
    ("iscrowd 2", _set(ann_100, "iscrowd", 2), False, "iscrowd_invalid", "annotation", 100, "iscrowd", 1),
    ("zero width box", _set(ann_100, "bbox", [4, 4, 0, 10]), False, "box_nonpositive_size", "annotation", 100,
     "bbox", 1),
    ("negative height box", _set(ann_100, "bbox", [4, 4, 20, -3]), False, "box_nonpositive_size", "annotation",
     100, "bbox", 1),
    ("NaN in box", _set(ann_100, "bbox", [4, float("nan"), 20, 10]), False, "box_nonfinite", "annotation", 100,
     "bbox", 1),
    ("infinite box", _set(ann_100, "bbox", [4, 4, float("inf"), 10]), False, "box_nonfinite", "annotation", 100,
     "bbox", 1),
    ("box 5 px past the right edge", _set(ann_100, "bbox", [49, 4, 20, 10]), False, "box_exceeds_image",
     "annotation", 100, "bbox", 1),
    ("box beyond the image", _set(ann_100, "bbox", [70, 4, 20, 10]), False, "box_outside_image", "annotation",
     100, "bbox", 1),
    ("zero image width", _set(image_10, "width", 0), False, "image_size_invalid", "image", 10, "width", 1),
    ("area half of w*h", _set(ann_100, "area", 100), False, "area_box_mismatch", "annotation", 100, "area", 1),
    ("polygon area off", _polygon_area_off, False, "area_mask_mismatch", "annotation", 101, "area", 1),
    ("RLE area off", _crowd_rle(20.0), False, "area_mask_mismatch", "annotation", 104, "area", 1),
    ("crowd RLE mask", _crowd_rle(64.0), False, "crowd_rle_mask", "annotation", 104, "segmentation", 0),
    ("polygon of 2 points", _set(ann_100, "segmentation", [[4, 4, 24, 14]]), False, "segmentation_invalid",
     "annotation", 100, "segmentation", 1),
    ("exact duplicate box", _exact_duplicate, False, "duplicate_box", "annotation", 103, "bbox", 1),
    ("near duplicate box", _near_duplicate, False, "near_duplicate_box", "annotation", 103, "bbox", 1),
    ("category without annotations", _append("categories", {"id": 9, "name": "pallet"}), False,
     "category_without_annotations", "category", 9, "id", 1),
    ("image without annotations", _append("images", {"id": 30, "file_name": "a.png", "width": W, "height": H}),
     False, "image_without_annotations", "image", 30, "id", 1),   # exit 1: also duplicate_file_name
    ("two records, one file", _set(lambda d: d["images"][1], "file_name", "a.png"), False,
     "duplicate_file_name", "image", 20, "file_name", 1),
    ("no annotations at all", lambda d, images: d.update(annotations=[]), False, "section_empty", "file",
     "annotations", "annotations", 1),
    ("file missing", _set(image_10, "file_name", "nope.png"), False, "image_file_missing", "image", 10,
     "file_name", 1),
    ("file_name with ..", _set(image_10, "file_name", "../ann.json"), False, "unsafe_file_name", "image", 10,
     "file_name", 1),
    ("absolute file_name", _set(image_10, "file_name", "/etc/hostname"), False, "unsafe_file_name", "image", 10,
     "file_name", 1),
    ("symlink out of the root", _symlink_out, False, "unsafe_file_name", "image", 10, "file_name", 1),
    ("corrupt file", _corrupt_a, True, "image_unreadable", "image", 10, "file_name", 1),
    ("declared width differs", _set(image_10, "width", 65), True, "image_size_mismatch", "image", 10, "width", 1),
    ("grayscale file", _write_image("a.png", np.zeros((H, W), np.uint8)), True, "image_grayscale", "image", 10,
     "file_name", 0),
    ("RGBA file", _write_image("a.png", np.zeros((H, W, 4), np.uint8)), True, "image_has_alpha", "image", 10,
     "file_name", 0),
    ("16-bit file", _write_image("a.png", np.zeros((H, W, 3), np.uint16)), True, "image_16bit", "image", 10,
     "file_name", 0),
]


def test_base_case_is_clean(tmp_path) -> None:
    path, images = write_case(tmp_path, base_coco())
    report = lint_coco(path, images, verify_images=True)
    assert report.findings == [] and report.exit_status == 0
    assert run_check(path, images, verify_images=True, out=io.StringIO()) == 0


@pytest.mark.parametrize("case, mutate, verify, code, record, record_id, field, status", CASES,
                         ids=[c[0] for c in CASES])
def test_finding(tmp_path, case, mutate, verify, code, record, record_id, field, status) -> None:
    d = base_coco()
    images = make_images(tmp_path)
    mutate(d, images)
    path = write_ann(tmp_path, d)
    report = lint_coco(path, images, verify_images=verify)
    hits = [f for f in report.findings if f.code == code]
    assert hits, f"{case}: no {code} in {[f.code for f in report.findings]}"
    f = hits[0]
    assert (f.severity, f.record, f.record_id, f.field) == (CODES[code][0], record, record_id, field)
    assert f.message and "\n" not in f.message
    out = io.StringIO()
    assert run_check(path, images, verify_images=verify, out=out) == status
    assert code in out.getvalue()
    if f.severity == "error" and record in ("image", "annotation") and not f.by_position:
        skipped = report.error_image_ids() if record == "image" else report.error_annotation_ids()
        assert record_id in skipped


def test_single_record_sections_are_clean(tmp_path) -> None:
    d = base_coco()
    d.update(images=d["images"][:1], categories=d["categories"][:1], annotations=d["annotations"][:1])
    path, images = write_case(tmp_path, d)
    assert lint_coco(path, images).findings == []


def test_image_format_cases_are_only_info(tmp_path) -> None:
    """Grayscale, RGBA and 16-bit files (written by OpenCV) are info; nothing else is reported for them."""
    path, images = write_case(tmp_path, base_coco())
    cv2.imwrite(str(images / "a.png"), np.zeros((H, W), np.uint16))       # 16-bit single channel
    cv2.imwrite(str(images / "sub" / "b.png"), np.zeros((H, W, 4), np.uint16))
    report = lint_coco(path, images, verify_images=True)
    assert sorted((f.code, f.record_id) for f in report.findings) == [
        ("image_16bit", 10), ("image_16bit", 20), ("image_grayscale", 10), ("image_has_alpha", 20)]
    assert report.exit_status == 0


def test_within_tolerance_is_not_reported(tmp_path) -> None:
    """1.5 px past the edge (tolerance max(2 px, 1 %)) and area within 10 % of w*h pass.

    Both tolerances are detdiff's own choice (common practice, no published source).
    """
    d = base_coco()
    ann(d, 100).update(bbox=[45.5, 4, 20, 10], area=190)
    path, images = write_case(tmp_path, d)
    assert lint_coco(path, images).findings == []


def test_boolean_iscrowd_is_accepted(tmp_path) -> None:
    d = base_coco()
    ann(d, 100)["iscrowd"] = False
    ann(d, 101)["iscrowd"] = True
    path, images = write_case(tmp_path, d)
    report = lint_coco(path, images)
    assert report.findings == [] and report.counts["crowd_annotations"] == 1


def test_polygon_area_accepts_pixel_count_or_exact_area(tmp_path) -> None:
    """Exporters write the polygon's exact area or its pixel count; both are accepted."""
    poly = [[30.5, 20.5, 44.2, 21.0, 45.0, 35.5, 31.0, 34.0, 30.7, 28.0]]
    rle = mask_utils.merge(mask_utils.frPyObjects(poly, H, W))
    pixels = float(mask_utils.area(rle))  # reference: pycocotools.mask rasterisation
    xs, ys = np.array(poly[0][0::2]), np.array(poly[0][1::2])
    exact = 0.5 * abs(np.dot(xs, np.roll(ys, -1)) - np.dot(ys, np.roll(xs, -1)))
    for area in (pixels, exact):
        d = base_coco()
        ann(d, 101).update(segmentation=poly, area=area)
        path, images = write_case(tmp_path, d)
        assert [f.code for f in lint_coco(path, images).findings] == []


@pytest.mark.parametrize("text, what", [
    ("{not json", "not valid JSON"),
    ("[]", "top level must be a JSON object"),
    ('{"images": [], "categories": []}', "missing top-level key"),
    ('{"images": {}, "annotations": [], "categories": 3}', "must be JSON lists"),
    ('{"images": null, "annotations": [], "categories": []}', "must be JSON lists"),
    (b"\xff\xfe\x00garbage", "not valid JSON"),
])
def test_unusable_input_exits_2_with_one_message(tmp_path, capsys, text, what) -> None:
    path = tmp_path / "ann.json"
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    assert run_check(path) == 2
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and what in lines[0] and str(path) in lines[0]
    assert "Traceback" not in captured.err and captured.out == ""


def test_missing_file_and_missing_folder_exit_2(tmp_path, capsys) -> None:
    assert run_check(tmp_path / "absent.json") == 2
    path, _ = write_case(tmp_path, base_coco())
    assert run_check(path, tmp_path / "no-such-folder") == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 2 and "Traceback" not in err


def test_counts_agree_with_pycocotools_index(tmp_path) -> None:
    d = base_coco()
    _crowd_rle(64.0)(d, tmp_path)
    path, images = write_case(tmp_path, d)
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(path))  # reference index: pycocotools coco.py createIndex
    report = lint_coco(path, images)
    assert report.counts["images"] == len(coco.imgs)
    assert report.counts["annotations"] == len(coco.anns)
    assert report.counts["categories"] == len(coco.cats)
    assert report.counts["crowd_annotations"] == len(coco.getAnnIds(iscrowd=True))
    assert report.counts["crowd_rle_masks"] == 1


def test_rle_area_is_pycocotools_area(tmp_path) -> None:
    d = base_coco()
    _crowd_rle(10.0)(d, tmp_path)
    path, images = write_case(tmp_path, d)
    (finding,) = [f for f in lint_coco(path, images).findings if f.code == "area_mask_mismatch"]
    assert f"{float(mask_utils.area(square_rle(10, 10, 8))):g} pixels" in finding.message  # pycocotools.mask.area


def test_shoelace_area_agrees_with_pycocotools_raster() -> None:
    """The exact polygon area and pycocotools' pixel count agree within 2 % on a large polygon."""
    poly = [[10.0, 10.0, 200.5, 15.0, 230.0, 180.0, 120.0, 220.0, 15.0, 150.5]]
    parts, coords_per_part, coords = flatten_polygons([poly])
    exact = shoelace_areas(parts, coords_per_part, coords)
    pixels = mask_utils.area(mask_utils.merge(mask_utils.frPyObjects(poly, 300, 300)))  # pycocotools.mask
    assert exact[0] == pytest.approx(float(pixels), rel=0.02)


def test_no_pixels_are_read_without_verify(tmp_path, monkeypatch) -> None:
    from PIL import Image

    def refuse(*args, **kwargs):
        raise AssertionError("an image was opened")

    monkeypatch.setattr(Image, "open", refuse)
    path, images = write_case(tmp_path, base_coco())
    report = lint_coco(path, images)
    assert report.counts["image_files_checked"] == 2 and report.findings == []


def test_symlink_inside_root_is_accepted(tmp_path) -> None:
    d = base_coco()
    path, images = write_case(tmp_path, d)
    os.symlink(images / "a.png", images / "alias.png")
    img(d, 10)["file_name"] = "alias.png"
    path.write_text(json.dumps(d))
    assert lint_coco(path, images, verify_images=True).findings == []


def test_error_records_are_what_build_dataset_skips(tmp_path) -> None:
    d = base_coco()
    ann(d, 100)["bbox"] = [4, 4, -1, 10]
    img(d, 20)["file_name"] = "gone.png"
    path, images = write_case(tmp_path, d)
    report = lint_coco(path, images)
    assert report.error_annotation_ids() == {100} and report.error_image_ids() == {20}
    ds = build_dataset(d, drop_image_ids=report.error_image_ids(), drop_ann_ids=report.error_annotation_ids())
    assert ds.image_ids.tolist() == [10] and ds.ann_ids.tolist() == [101]


def test_text_listing_is_capped_and_json_is_complete(tmp_path) -> None:
    d = base_coco()
    d["annotations"] += [{"id": 200 + k, "image_id": 10, "category_id": 1, "bbox": [1, 1, 0, 5], "area": 0,
                          "iscrowd": 0} for k in range(15)]
    path, images = write_case(tmp_path, d)
    report = lint_coco(path, images)
    text = format_text(report)
    assert "box_nonpositive_size (15)" in text and "... and 5 more" in text
    payload = json.loads(json.dumps(report.to_json()))
    assert payload["codes"]["box_nonpositive_size"]["count"] == 15
    assert len([f for f in payload["findings"] if f["code"] == "box_nonpositive_size"]) == 15
    capped = report.to_json(max_per_code=4)
    assert capped["codes"]["box_nonpositive_size"] == {"severity": "error", "count": 15, "listed": 4}
    out = io.StringIO()
    assert run_check(path, images, as_json=True, out=out) == 1
    assert json.loads(out.getvalue())["exit_status"] == 1


def test_unprintable_names_do_not_break_output(tmp_path) -> None:
    d = base_coco()
    img(d, 10)["file_name"] = "bad\ud800name" + "x" * 5000 + ".png"
    path, images = write_case(tmp_path, d)
    out = io.TextIOWrapper(io.BytesIO(), encoding="ascii")
    assert run_check(path, images, out=out) == 1
    out.seek(0)
    text = out.read()
    assert "image_file_missing" in text and len(max(text.splitlines(), key=len)) < 6000


@pytest.mark.parametrize("mutate, code, field", [
    (_set(ann_100, "bbox", [0, 0, 10 ** 400, 5]), "box_nonfinite", "bbox"),
    (_set(ann_100, "id", 2 ** 64), "wrong_type", "id"),
    (_set(image_10, "width", 1e308), "image_size_invalid", "width"),
    (_set(image_10, "height", 0.5), "image_size_invalid", "height"),
    (_set(ann_100, "segmentation", {"size": [H, W], "counts": "0000}"}), "segmentation_invalid", "segmentation"),
    (_set(ann_100, "segmentation", {"size": [H, W], "counts": [5, 3]}), "segmentation_invalid", "segmentation"),
    (_set(ann_100, "segmentation", [[0, 0, 1e300, 0, 1e300, 1e300]]), None, None),
    (_set(ann_100, "segmentation", [[0, 0, 10 ** 400, 0, 5, 5]]), "segmentation_invalid", "segmentation"),
    (_set(ann_100, "segmentation", "polygon"), "segmentation_invalid", "segmentation"),
    (_set(image_10, "file_name", "nul\x00.png"), "image_file_missing", "file_name"),
    (_set(image_10, "file_name", "ü" * 4000 + ".png"), "image_file_missing", "file_name"),
])
def test_hostile_values_become_findings(tmp_path, mutate, code, field) -> None:
    d = base_coco()
    images = make_images(tmp_path)
    mutate(d, images)
    path = write_ann(tmp_path, d)
    report = lint_coco(path, images, verify_images=True)
    if code is not None:
        assert (code, field) in {(f.code, f.field) for f in report.findings}
    assert run_check(path, images, verify_images=True, out=io.StringIO()) in (0, 1)
