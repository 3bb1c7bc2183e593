"""Fuzzed ingest: mutated COCO files never make ``detdiff check`` or ``build_dataset`` raise.

Valid small COCO dicts are generated, then mutated (keys deleted, wrong types, NaN / inf / huge numbers,
negative sizes, unicode and very long strings, duplicate ids, non-object records, sections replaced)
or their JSON text truncated. Invariants:

- ``run_check`` returns 0 or 1 with findings (1 exactly when a warning or error is found), or 2 with one
  message on stderr and nothing on stdout; it never raises;
- ``build_dataset`` never raises on a dict that ``read_coco_json`` accepts, and keeps none of the
  records lint marks as errors.

The number of generated cases is printed by the last test of the module (at least 1,000 in total).
"""

from __future__ import annotations

import contextlib
import copy
import io
import json
import os
import tempfile
from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pycocotools import mask as mask_utils

from detdiff.data.coco import CocoFormatError, build_dataset, read_coco_json
from detdiff.data.lint import lint_coco, run_check
from detdiff.data.lint.report import LintReport

W, H = 64, 48
GOOD_FILES = ["a.png", "sub/b.png", "gray.png"]
BAD_FILES = ["missing.png", "corrupt.png", "../escape.png", "/etc/hostname", "link_out.png", "sub", "nul\x00.png",
             "x" * 300 + ".png", "ünïcødé/ファイル.png", "lone\ud800.png", ""]
CASES = {"mutated": 0, "truncated": 0, "direct": 0}
# Under CI (CI=true) the cases are derandomised so a submission is judged on a repeatable set; elsewhere
# every run explores new cases.
FUZZ = settings(deadline=None, derandomize=bool(os.environ.get("CI")),
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _square_rle() -> dict:
    mask = np.zeros((H, W), np.uint8)
    mask[10:20, 10:20] = 1
    rle = mask_utils.encode(np.asfortranarray(mask))  # reference encoder: pycocotools.mask
    return {"size": rle["size"], "counts": rle["counts"].decode("ascii")}


RLE = _square_rle()


@pytest.fixture(scope="module")
def workdir():
    """One folder for the whole module: images (good, gray, corrupt, a symlink out) and the annotation file."""
    with tempfile.TemporaryDirectory(prefix="detdiff-fuzz-") as tmp:
        root = Path(tmp)
        images = root / "images"
        (images / "sub").mkdir(parents=True)
        cv2.imwrite(str(images / "a.png"), np.full((H, W, 3), 80, np.uint8))
        cv2.imwrite(str(images / "sub" / "b.png"), np.full((H, W, 3), 80, np.uint8))
        cv2.imwrite(str(images / "gray.png"), np.zeros((H, W), np.uint16))
        (images / "corrupt.png").write_bytes(b"\x89PNG\r\n\x1a\nnot really")
        cv2.imwrite(str(root / "outside.png"), np.zeros((H, W, 3), np.uint8))
        (images / "link_out.png").symlink_to(root / "outside.png")
        yield root


LONG_TEXT = st.builds(lambda ch, n: ch * n, st.characters(), st.integers(200, 3000))
NUMBERS = st.one_of(st.integers(-(2 ** 70), 2 ** 70), st.floats(allow_nan=True, allow_infinity=True),
                    st.sampled_from([0, -1, -0.0, 1e308, -1e308, 2 ** 63, 2 ** 64, 10 ** 400, float("nan")]))
WEIRD = st.recursive(
    st.one_of(st.none(), st.booleans(), NUMBERS, st.text(max_size=12), LONG_TEXT, st.sampled_from(BAD_FILES),
              st.just(dict(RLE)), st.just({"size": [H, W], "counts": "0" * 40 + "}"}),
              st.just({"size": [H, W], "counts": [5, 3]}), st.just({"size": [10 ** 6, 10 ** 6], "counts": "0"})),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=4), inner, max_size=3),
    max_leaves=8)
KEYS = {"images": ["id", "file_name", "width", "height"],
        "annotations": ["id", "image_id", "category_id", "bbox", "area", "iscrowd", "segmentation"],
        "categories": ["id", "name"]}


@st.composite
def valid_coco(draw) -> dict:
    """A small COCO dict that lints clean apart from findings its random contents imply."""
    image_ids = draw(st.lists(st.integers(-5, 10 ** 6), min_size=1, max_size=3, unique=True))
    cat_ids = draw(st.lists(st.integers(0, 100), min_size=1, max_size=3, unique=True))
    images = [{"id": i, "file_name": draw(st.sampled_from(GOOD_FILES)), "width": W, "height": H} for i in image_ids]
    anns = []
    for k in range(draw(st.integers(0, 6))):
        w, h = draw(st.floats(1, 30)), draw(st.floats(1, 30))
        x, y = draw(st.floats(0, W - w)), draw(st.floats(0, H - h))
        rec = {"id": k + 1, "image_id": draw(st.sampled_from(image_ids)), "category_id": draw(st.sampled_from(cat_ids)),
               "bbox": [x, y, w, h], "area": w * h, "iscrowd": 0}
        shape = draw(st.sampled_from(["none", "polygon", "rle"]))
        if shape == "polygon":
            rec["segmentation"] = [[x, y, x + w, y, x + w, y + h, x, y + h]]
        elif shape == "rle":
            rec.update(segmentation=dict(RLE), iscrowd=1, area=100.0)
        anns.append(rec)
    cats = [{"id": c, "name": f"class {c}", "supercategory": "thing"} for c in cat_ids]
    return {"images": images, "annotations": anns, "categories": cats}


MUTATION = st.one_of(
    st.tuples(st.just("delete"), st.sampled_from(list(KEYS)), st.integers(0, 9), st.integers(0, 6)),
    st.tuples(st.just("set"), st.sampled_from(list(KEYS)), st.integers(0, 9), st.integers(0, 6), WEIRD),
    st.tuples(st.just("box_item"), st.integers(0, 9), st.integers(0, 3), WEIRD),
    st.tuples(st.just("copy_id"), st.sampled_from(list(KEYS)), st.integers(0, 9), st.integers(0, 9)),
    st.tuples(st.just("replace_record"), st.sampled_from(list(KEYS)), st.integers(0, 9), WEIRD),
    st.tuples(st.just("append_record"), st.sampled_from(list(KEYS)), WEIRD),
    st.tuples(st.just("section"), st.sampled_from(list(KEYS)), WEIRD),
    st.tuples(st.just("drop_section"), st.sampled_from(list(KEYS))),
)


def mutate(data: dict, mutation: tuple) -> None:
    """Apply one mutation in place; indices are taken modulo the section length.

    The mutation is copied first: hypothesis can hand the same value object to two mutations, and
    putting one list inside itself would make a file that json cannot write at all.
    """
    action, *args = copy.deepcopy(mutation)
    if action in ("section", "drop_section"):
        if action == "section":
            data[args[0]] = args[1]
        else:
            data.pop(args[0], None)
        return
    if action == "box_item":
        section, (index, item, value) = "annotations", args
    else:
        section = args[0]
    records = data.get(section)
    if not isinstance(records, list):
        return
    if action == "append_record":
        records.append(args[1])
        return
    if not records:
        return
    index = (index if action == "box_item" else args[1]) % len(records)
    rec = records[index]
    if action == "replace_record":
        records[index] = args[2]
    elif not isinstance(rec, dict):
        return
    elif action == "delete":
        rec.pop(KEYS[section][args[2] % len(KEYS[section])], None)
    elif action == "set":
        rec[KEYS[section][args[2] % len(KEYS[section])]] = args[3]
    elif action == "copy_id":
        other = records[args[2] % len(records)]
        if isinstance(other, dict) and "id" in other:
            rec["id"] = other["id"]
    elif action == "box_item" and isinstance(rec.get("bbox"), list) and len(rec["bbox"]) == 4:
        rec["bbox"][item] = value


def check_run(path: Path, images_dir: Path | None, *, as_json: bool, verify: bool) -> int:
    """run_check's contract on one file; returns its status."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stderr(err):
        status = run_check(path, images_dir, as_json=as_json, verify_images=verify, out=out)
    assert status in (0, 1, 2)
    if status == 2:
        assert len(err.getvalue().strip().splitlines()) == 1 and out.getvalue() == ""
        assert "Traceback" not in err.getvalue()
    else:
        assert out.getvalue() and err.getvalue() == ""
        if as_json:
            assert json.loads(out.getvalue())["exit_status"] == status
    return status


def check_build(data: dict, source: str, images_dir: Path | None, verify: bool) -> LintReport:
    """build_dataset never raises and keeps no record that lint marks as an error; returns the lint."""
    report = lint_coco(source, images_dir, verify_images=verify, data=data)
    assert report.exit_status == int(any(f.severity != "info" for f in report.findings))
    dataset = build_dataset(data, drop_image_ids=report.error_image_ids(), drop_ann_ids=report.error_annotation_ids())
    assert not set(dataset.image_ids.tolist()) & report.error_image_ids()
    assert not set(dataset.ann_ids.tolist()) & report.error_annotation_ids()
    assert len(dataset.boxes) == len(dataset.ann_ids) and np.isfinite(dataset.boxes).all()
    assert (dataset.boxes[:, 2:] > 0).all()
    build_dataset(data)
    return report


@settings(FUZZ, max_examples=600)
@given(data=valid_coco(), mutations=st.lists(MUTATION, max_size=4), use_images=st.booleans(),
       verify=st.booleans(), as_json=st.booleans())
def test_mutated_files(workdir, data, mutations, use_images, verify, as_json) -> None:
    CASES["mutated"] += 1
    for mutation in mutations:
        mutate(data, mutation)
    path = workdir / "ann.json"
    path.write_text(json.dumps(data))
    images_dir = workdir / "images" if use_images else None
    status = check_run(path, images_dir, as_json=as_json, verify=verify)
    try:
        read = read_coco_json(path)
    except CocoFormatError:
        assert status == 2
        return
    assert status in (0, 1)
    report = check_build(read, str(path), images_dir, verify)
    if not mutations:                  # generated valid: findings, if any, are never errors
        assert report.totals()["error"] == 0, [f for f in report.findings if f.severity == "error"]


@settings(FUZZ, max_examples=250)
@given(data=valid_coco(), cut=st.floats(0, 1, exclude_max=True), junk=st.binary(max_size=8))
def test_truncated_json(workdir, data, cut, junk) -> None:
    CASES["truncated"] += 1
    text = json.dumps(data).encode()
    path = workdir / "truncated.json"
    path.write_bytes(text[:int(cut * len(text))] + junk)
    assert check_run(path, None, as_json=False, verify=False) == 2


@settings(FUZZ, max_examples=250)
@given(data=valid_coco(), mutations=st.lists(MUTATION.filter(lambda m: m[0] not in ("section", "drop_section")),
                                             min_size=1, max_size=6))
def test_mutated_dicts_build(workdir, data, mutations) -> None:
    """Dicts handed over directly (as the pipeline does after reading) with several mutations each."""
    CASES["direct"] += 1
    for mutation in mutations:
        mutate(data, mutation)
    check_build(data, "<fuzzed dict>", workdir / "images", verify=False)


def test_case_count_is_reported(capsys) -> None:
    """Runs last (file order): prints how many cases the fuzz tests above generated."""
    line = f"fuzzed ingest: {sum(CASES.values())} generated cases ({', '.join(f'{k} {v}' for k, v in CASES.items())})"
    with capsys.disabled():
        print("\n" + line)
    if all(CASES.values()):
        assert sum(CASES.values()) >= 1000
