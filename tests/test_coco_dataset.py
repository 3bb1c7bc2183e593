"""The neutral dataset form agrees with pycocotools' index and never assumes contiguous ids."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from pycocotools.coco import COCO

from detdiff.data.coco import (UnsafeImagePath, build_dataset, load_saved_dataset, read_coco_json,
                               resolve_image_path, save_dataset)


def _coco_dict() -> dict:
    return {
        "images": [{"id": 907, "file_name": "b.jpg", "width": 100, "height": 80},
                   {"id": 15, "file_name": "a.jpg", "width": 64, "height": 64}],
        "categories": [{"id": 31, "name": "carton"}, {"id": 4, "name": "tape"}],
        "annotations": [
            {"id": 70, "image_id": 907, "category_id": 4, "bbox": [1, 2, 10, 20], "area": 200, "iscrowd": 0},
            {"id": 12, "image_id": 907, "category_id": 31, "bbox": [5, 5, 30, 30], "area": 900, "iscrowd": 0},
            {"id": 3, "image_id": 15, "category_id": 31, "bbox": [0, 0, 8, 8], "area": 64, "iscrowd": 0},
        ],
    }


def test_counts_match_pycocotools_index(tmp_path) -> None:
    path = tmp_path / "ann.json"
    path.write_text(json.dumps(_coco_dict()))
    coco = COCO(str(path))  # reference index: pycocotools coco.py
    ds = build_dataset(read_coco_json(path))
    assert ds.num_images == len(coco.imgs)
    assert ds.num_annotations == len(coco.anns)
    assert ds.num_classes == len(coco.cats)
    for j, aid in enumerate(ds.ann_ids):
        ref = coco.anns[int(aid)]
        assert ds.image_ids[ds.ann_image_index[j]] == ref["image_id"]
        assert ds.category_ids[ds.labels[j]] == ref["category_id"]
        np.testing.assert_allclose(ds.boxes[j], ref["bbox"])  # COCO bbox = [x, y, w, h]


def test_sorted_ids_and_offsets() -> None:
    ds = build_dataset(_coco_dict())
    assert list(ds.image_ids) == [15, 907] and list(ds.category_ids) == [4, 31]
    assert list(ds.ann_ids[ds.ann_slice(1)]) == [12, 70]
    assert ds.boxes_xyxy()[0].tolist() == [0, 0, 8, 8]


def test_bad_records_are_skipped_not_trusted() -> None:
    d = _coco_dict()
    d["annotations"] += [
        {"id": 80, "image_id": 999, "category_id": 4, "bbox": [0, 0, 5, 5]},          # unknown image
        {"id": 81, "image_id": 15, "category_id": 99, "bbox": [0, 0, 5, 5]},          # unknown category
        {"id": 82, "image_id": 15, "category_id": 4, "bbox": [0, 0, -5, 5]},          # negative width
        {"id": 83, "image_id": 15, "category_id": 4, "bbox": [0, 0, float("nan"), 5]},
        {"id": 3, "image_id": 15, "category_id": 4, "bbox": [1, 1, 5, 5]},            # duplicate id
    ]
    ds = build_dataset(d)
    assert sorted(ds.ann_ids.tolist()) == [3, 12, 70]


def test_save_and_load_round_trip(tmp_path) -> None:
    ds = build_dataset(_coco_dict(), images_dir=tmp_path)
    save_dataset(ds, tmp_path / "ds.npz")
    back = load_saved_dataset(tmp_path / "ds.npz")
    assert back.file_names == ds.file_names and back.images_dir == ds.images_dir
    np.testing.assert_array_equal(back.boxes, ds.boxes)
    np.testing.assert_array_equal(back.image_offsets, ds.image_offsets)


@pytest.mark.parametrize("name", ["../x.jpg", "a/../../x.jpg", "/etc/passwd", "link/out.jpg"])
def test_paths_leaving_the_root_are_refused(tmp_path, name: str) -> None:
    root = tmp_path / "images"
    root.mkdir()
    outside = tmp_path / "outside"
    outside.mkdir()
    os.symlink(outside, root / "link")
    with pytest.raises(UnsafeImagePath):
        resolve_image_path(root, name)


def test_inner_paths_are_accepted(tmp_path) -> None:
    assert resolve_image_path(tmp_path, "sub/a.jpg") == tmp_path.resolve() / "sub" / "a.jpg"
