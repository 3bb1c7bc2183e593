"""The street-camera scenario: real image sizes, long-tailed look-alike classes, mostly small objects, faults."""

from __future__ import annotations

import collections
import contextlib
import io
import json
from pathlib import Path

import cv2
import numpy as np
import pytest
from pycocotools.coco import COCO
from pycocotools.cocoeval import Params

from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.scenarios import SCENARIOS, DemoPaths, generate_demo, streetcam

NUM_IMAGES = 16
LAYOUTS = 300           # layouts only (no pixels): enough objects for shares and frequencies


@pytest.fixture(scope="module")
def street(tmp_path_factory: pytest.TempPathFactory) -> tuple[DemoPaths, dict, dict]:
    out = tmp_path_factory.mktemp("street")
    paths = generate_demo(out, scenario="streetcam", num_images=NUM_IMAGES, seed=3, progress=False)
    return paths, json.loads(paths.annotations.read_text()), json.loads(paths.truth.read_text())


@pytest.fixture(scope="module")
def layouts() -> list[streetcam.Layout]:
    seeds = np.random.SeedSequence(8).spawn(LAYOUTS)
    return [streetcam.layout(np.random.default_rng(s)) for s in seeds]


def _quiet_coco(path: Path) -> COCO:
    with contextlib.redirect_stdout(io.StringIO()):   # pycocotools prints while indexing
        return COCO(str(path))


def _small_range() -> list[float]:
    # COCOeval's own area ranges (pycocotools cocoeval.py, Params.setDetParams): small is [0, 32 ** 2]
    params = Params(iouType="bbox")
    return params.areaRng[params.areaRngLbl.index("small")]


def test_registered_under_its_name():
    assert SCENARIOS["streetcam"] is streetcam.generate


def test_coco_file_loads_and_every_box_lies_inside_its_image(street):
    paths, coco, truth = street
    # pycocotools is the reference reader of the COCO format (cocodataset.org, "Data format")
    api = _quiet_coco(paths.annotations)
    written = [o for o in truth["objects"] if o["annotation_id"] is not None]
    duplicates = [f for f in truth["faults"] if f["kind"] == "duplicate_box"]
    assert len(api.imgs) == NUM_IMAGES and len(api.cats) == len(streetcam.CATEGORIES) == 24
    assert len(api.anns) == len(written) + len(duplicates) == truth["counts"]["annotations"]
    for ann in api.anns.values():
        img = api.imgs[ann["image_id"]]
        x, y, w, h = ann["bbox"]
        assert w > 0 and h > 0 and x >= 0 and y >= 0, ann
        assert x + w <= img["width"] + 1e-9 and y + h <= img["height"] + 1e-9, ann
        assert ann["area"] == pytest.approx(w * h) and ann["iscrowd"] == 0
    for img in list(api.imgs.values())[:4]:
        pixels = cv2.imread(str(paths.images_dir / img["file_name"]))
        assert pixels.shape == (img["height"], img["width"], 3)


def test_written_file_reads_with_the_dataset_loader(street):
    paths, coco, _ = street
    dataset = build_dataset(read_coco_json(paths.annotations), ann_path=paths.annotations,
                            images_dir=paths.images_dir)
    assert dataset.num_annotations == len(coco["annotations"]) and dataset.num_classes == 24


def test_images_have_real_photo_sizes_in_both_orientations(street, layouts):
    _, coco, _ = street
    allowed = {(w, h) for w, h, _ in streetcam.IMAGE_SIZES} | {(h, w) for w, h, _ in streetcam.IMAGE_SIZES}
    assert all((img["width"], img["height"]) in allowed for img in coco["images"])
    sizes = [(lay.width, lay.height) for lay in layouts]
    assert {(w, h) for w, h in sizes} <= allowed
    assert min(min(s) for s in sizes) == 480 and max(max(s) for s in sizes) >= 3000
    portrait = np.mean([h > w for w, h in sizes])
    assert 0.1 < portrait < 0.35


def test_most_objects_are_coco_small(street, layouts):
    lo, hi = _small_range()
    _, coco, _ = street
    areas = np.array([a["area"] for a in coco["annotations"]])
    assert np.mean((areas >= lo) & (areas <= hi)) >= 0.4
    boxes = np.array([obj.placed.bbox for lay in layouts for obj in lay.drawn if obj.placed is not None])
    areas = boxes[:, 2] * boxes[:, 3]
    assert np.mean((areas >= lo) & (areas <= hi)) >= 0.4
    assert np.mean(areas > 96 ** 2) > 0.05                 # and some large ones (COCOeval "large")
    longest = boxes[:, 2:].max(axis=1)
    assert longest.min() >= streetcam.MIN_LONG_PX and boxes[:, 2:].min() >= streetcam.MIN_SIDE_PX


def test_small_objects_in_large_frames_are_a_few_pixels(layouts):
    longest = [max(obj.placed.bbox[2:]) for lay in layouts if max(lay.width, lay.height) >= 3000
               for obj in lay.drawn if obj.placed is not None]
    assert np.mean(np.array(longest) <= 30) > 0.3


def test_at_least_twenty_classes_with_a_long_tail(layouts):
    names = streetcam.NAMES
    assert len(names) == len(set(names)) >= 20
    freq = streetcam.CLASS_FREQUENCY
    assert 15 <= max(freq.values()) / min(freq.values()) <= 25
    counts = collections.Counter(names[obj.placed.category] for lay in layouts for obj in lay.drawn
                                 if obj.placed is not None)
    assert set(counts) == set(names)
    shares = np.array([counts[n] for n in names]) / sum(counts.values())
    target = np.array([freq[n] for n in names]) / sum(freq.values())
    assert np.all(np.abs(shares - target) <= 0.35 * target + 0.004), dict(zip(names, shares.round(3)))
    assert max(counts.values()) / min(counts.values()) >= 10


def test_every_class_has_look_alikes_weighted_by_frequency():
    groups = streetcam.LOOKALIKE_GROUPS
    assert all(len(members) >= 2 for members in groups.values())
    group_of = {n: g for g, members in groups.items() for n in members}
    for name, options in streetcam.CONFUSIONS.items():
        counts = collections.Counter(options)
        assert name not in counts and set(counts) == set(groups[group_of[name]]) - {name}
        per_frequency = {counts[o] / streetcam.CLASS_FREQUENCY[o] for o in counts}
        assert max(per_frequency) == pytest.approx(min(per_frequency))


def test_planted_faults_follow_the_rates_and_wrong_classes_stay_in_their_group(street):
    _, coco, truth = street
    n = len(truth["objects"])
    for kind, rate in streetcam.FAULT_RATES.items():
        assert truth["counts"][kind] == sum(f["kind"] == kind for f in truth["faults"]) == round(rate * n)
    group = {c["id"]: c["supercategory"] for c in coco["categories"]}
    by_id = {a["id"]: a for a in coco["annotations"]}
    wrong = [f for f in truth["faults"] if f["kind"] == "wrong_class"]
    assert wrong
    for f in wrong:
        assert by_id[f["annotation_id"]]["category_id"] == f["written_category_id"] != f["true_category_id"]
        assert group[f["written_category_id"]] == group[f["true_category_id"]]


def test_difficulties_are_recorded(street):
    _, _, truth = street
    objects = truth["objects"]
    assert any(o["truncated"] for o in objects) and any(o["in_group"] for o in objects)
    assert any(o["visible_fraction"] < 0.9 for o in objects)
    assert all(o["visible_fraction"] >= streetcam.GROUP_MIN_VISIBLE - 1e-3 for o in objects)
    assert all(o["in_image_fraction"] >= streetcam.MIN_IN_IMAGE - 1e-3 for o in objects)
    lo, hi = _small_range()
    assert all(o["tiny"] == (o["clean_bbox"][2] * o["clean_bbox"][3] < hi) for o in objects)
    assert all(o["distance_m"] > 0 for o in objects)


def _written(paths: DemoPaths) -> dict[str, bytes]:
    root = paths.annotations.parent
    return {str(f.relative_to(root)): f.read_bytes() for f in sorted(root.rglob("*")) if f.is_file()}


def test_same_seed_same_bytes_other_seed_differs(tmp_path):
    a, b, c = (generate_demo(tmp_path / name, scenario="streetcam", num_images=3, seed=seed, max_side=640,
                             progress=False) for name, seed in (("a", 11), ("b", 11), ("c", 12)))
    first, again, other = _written(a), _written(b), _written(c)
    assert len(first) == 3 + 2 and first == again
    assert first["annotations.json"] != other["annotations.json"]
    coco = json.loads(first["annotations.json"])
    assert max(max(img["width"], img["height"]) for img in coco["images"]) <= 640


def test_bad_options_are_refused(tmp_path):
    with pytest.raises(ValueError, match="unknown fault kind"):
        streetcam.generate(tmp_path, num_images=1, fault_rates={"swapped": 0.1}, progress=False)
    with pytest.raises(ValueError, match="max_side"):
        streetcam.generate(tmp_path, num_images=1, max_side=100, progress=False)
