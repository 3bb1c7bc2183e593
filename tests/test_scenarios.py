"""The held-out demo scenarios (aerial, digits) and the fault-planter options they use.

Checked against pycocotools, torchvision, OpenCV, scipy and scikit-learn's bundled digits; the
warehouse's bytes are pinned so that the options added for these scenes cannot move it.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
from pathlib import Path
from unittest import mock

import cv2
import numpy as np
import pytest
import torch
from pycocotools.coco import COCO
from scipy.stats import chisquare
from torchvision.ops import box_convert, box_iou

from detdiff import cli
from detdiff.data.scenarios import SCENARIOS, aerial, digits, generate_demo
from detdiff.data.scenarios.faults import HELD_OUT_FAULT_RATES, look_alike_confusions, plant_faults

HIGH_RATES = {"wrong_class": 0.12, "missing_box": 0.06, "loose_box": 0.08, "duplicate_box": 0.03}
MODULES = {"aerial": aerial, "digits": digits}


def _load(paths) -> tuple[dict, dict]:
    return json.loads(paths.annotations.read_text()), json.loads(paths.truth.read_text())


def _xyxy(boxes: list[list[float]]) -> torch.Tensor:
    # COCO bbox is [x, y, width, height] (COCO data format, cocodataset.org); torchvision converts it
    return box_convert(torch.tensor(boxes, dtype=torch.float64).reshape(-1, 4), "xywh", "xyxy")


def _scene(tmp_path_factory: pytest.TempPathFactory, name: str):
    paths = generate_demo(tmp_path_factory.mktemp(name), scenario=name, num_images=10, seed=5,
                          fault_rates=HIGH_RATES, progress=False)
    return name, paths, *_load(paths)


@pytest.fixture(scope="module")
def aerial_scene(tmp_path_factory: pytest.TempPathFactory):
    return _scene(tmp_path_factory, "aerial")


@pytest.fixture(scope="module")
def digits_scene(tmp_path_factory: pytest.TempPathFactory):
    return _scene(tmp_path_factory, "digits")


@pytest.fixture(params=["aerial", "digits"])
def scene(request: pytest.FixtureRequest):
    return request.getfixturevalue(f"{request.param}_scene")


@pytest.mark.parametrize("name", ["aerial", "digits"])
def test_same_seed_same_bytes_other_seed_differs(tmp_path: Path, name: str) -> None:
    a = generate_demo(tmp_path / "a", scenario=name, num_images=3, seed=11, progress=False)
    b = generate_demo(tmp_path / "b", scenario=name, num_images=3, seed=11, progress=False)
    c = generate_demo(tmp_path / "c", scenario=name, num_images=3, seed=12, progress=False)
    assert a.annotations.read_bytes() == b.annotations.read_bytes()
    assert a.truth.read_bytes() == b.truth.read_bytes()
    names = sorted(p.name for p in a.images_dir.iterdir())
    assert names == sorted(p.name for p in b.images_dir.iterdir()) and len(names) == 3
    assert all((a.images_dir / n).read_bytes() == (b.images_dir / n).read_bytes() for n in names)
    assert a.truth.read_bytes() != c.truth.read_bytes()


def test_warehouse_bytes_are_pinned(tmp_path: Path) -> None:
    # the held-out scenes added options to the shared fault planter; the warehouse must not move
    # (regenerate these digests only for a deliberate change of the warehouse scene)
    paths = generate_demo(tmp_path, num_images=4, seed=3, progress=False)
    digests = [hashlib.sha256(p.read_bytes()).hexdigest()[:16] for p in (paths.annotations, paths.truth)]
    assert digests == ["521115258fd8d6a0", "2c613f4a4a9c2a2b"]


def test_coco_file_loads_and_boxes_lie_inside_their_images(scene) -> None:
    name, paths, coco, truth = scene
    with contextlib.redirect_stdout(io.StringIO()):   # source: pycocotools coco.py (COCO.createIndex)
        api = COCO(str(paths.annotations))
    assert len(api.imgs) == truth["counts"]["images"] == 10
    assert len(api.anns) == truth["counts"]["annotations"] == len(coco["annotations"])
    assert len(api.cats) == len(MODULES[name].CATEGORIES)
    sizes = set()
    for img in api.imgs.values():
        pixels = cv2.imread(str(paths.images_dir / img["file_name"]))   # source: OpenCV JPEG decode
        assert pixels.shape[:2] == (img["height"], img["width"])
        sizes.add((img["width"], img["height"]))
    assert sizes <= set(MODULES[name].IMAGE_SIZES) and len(sizes) > 1
    for ann in api.anns.values():
        x, y, w, h = ann["bbox"]
        img = api.imgs[ann["image_id"]]
        assert w > 0 and h > 0 and x >= 0 and y >= 0, ann
        assert x + w <= img["width"] + 1e-9 and y + h <= img["height"] + 1e-9, ann
        assert ann["area"] == pytest.approx(w * h) and ann["iscrowd"] == 0


def test_truth_and_written_file_agree_on_faults(scene) -> None:
    name, _, coco, truth = scene
    by_id = {a["id"]: a for a in coco["annotations"]}
    objects = truth["objects"]
    for kind, rate in HIGH_RATES.items():
        assert truth["counts"][kind] == sum(f["kind"] == kind for f in truth["faults"]) == round(rate * len(objects))
    written = [o for o in objects if o["annotation_id"] is not None]
    assert len(written) == len(objects) - truth["counts"]["missing_box"]
    assert len(coco["annotations"]) == len(written) + truth["counts"]["duplicate_box"]
    for o in written:
        ann = by_id[o["annotation_id"]]
        if o["fault"] == "wrong_class":
            assert ann["category_id"] != o["category_id"]
        else:
            assert ann["category_id"] == o["category_id"]
        if o["fault"] != "loose_box":
            assert ann["bbox"] == o["clean_bbox"]
    loose = [f for f in truth["faults"] if f["kind"] == "loose_box"]
    iou = box_iou(_xyxy([by_id[f["annotation_id"]]["bbox"] for f in loose]),
                  _xyxy([f["clean_bbox"] for f in loose])).diagonal()   # source: torchvision.ops.box_iou
    lo, hi = MODULES[name].LOOSE_BOXES.iou
    assert truth["loose_box_iou_range"] == [lo, hi]
    assert torch.all((iou >= lo) & (iou <= hi)), iou


def test_wrong_classes_stay_in_the_look_alike_group(scene) -> None:
    name, _, _, truth = scene
    module = MODULES[name]
    name_of = {c: n for c, n, _ in module.CATEGORIES}
    group_of = {member: group for group in module.LOOK_ALIKE_GROUPS for member in group}
    wrong = [f for f in truth["faults"] if f["kind"] == "wrong_class"]
    assert wrong
    for f in wrong:
        true_name, written = name_of[f["true_category_id"]], name_of[f["written_category_id"]]
        assert written != true_name
        if true_name in group_of:
            assert written in group_of[true_name], f
    table = truth["wrong_class_weights"]
    assert set(table) == set(module.NAMES)


def test_written_class_follows_class_frequency_within_the_group() -> None:
    # plant_faults on many stand-in objects (no pixels): written classes per true class against the
    # frequency-proportional expectation, by Pearson's chi-square (scipy.stats.chisquare)
    names, freq = digits.NAMES, digits.CLASS_FREQUENCY
    table = look_alike_confusions(names, freq, digits.LOOK_ALIKE_GROUPS)
    rng = np.random.default_rng(0)
    labels = rng.choice(len(names), 30000, p=freq / freq.sum())
    objects = [{"category": int(c), "bbox": [10.0, 10.0, 20.0, 30.0]} for c in labels]
    categories = [(i, n, "digit") for i, n in enumerate(names)]
    rates = {"wrong_class": 0.6, "missing_box": 0.0, "loose_box": 0.0, "duplicate_box": 0.0}
    faults = plant_faults(np.random.default_rng(1), objects, [(100, 100)] * len(objects), rates, categories, table)
    for true in ("digit_1", "digit_0"):
        options = list(table[true])
        t = names.index(true)
        written = [names[v] for i, (_, v) in faults.items() if labels[i] == t]
        observed = np.array([written.count(o) for o in options])
        expected = np.array([freq[names.index(o)] for o in options])
        assert chisquare(observed, expected / expected.sum() * observed.sum()).pvalue > 0.001


@pytest.mark.parametrize("module", [aerial, digits])
def test_written_class_is_no_rarity_cue(module) -> None:
    # expected share of annotations written as class c that are wrong-class faults, relative to the overall
    # rate: sum over true classes t of f_t * P(c | t) / f_c. Drawn uniformly from the same groups (the
    # warehouse's rule) rare written classes collect several times the overall rate; drawn in proportion
    # to frequency within groups of similar frequency they stay within a factor of three of each other
    freq = module.CLASS_FREQUENCY / module.CLASS_FREQUENCY.sum()
    table = look_alike_confusions(module.NAMES, freq, module.LOOK_ALIKE_GROUPS)
    uniform = {true: {w: 1 / len(options) for w in options} for true, options in table.items()}
    index = {n: i for i, n in enumerate(module.NAMES)}
    grouped = np.array([any(n in g for g in module.LOOK_ALIKE_GROUPS) for n in module.NAMES])

    def spread(rule: dict[str, dict[str, float]]) -> float:
        share = np.zeros(len(freq))
        for t, true in enumerate(module.NAMES):
            for written, p in rule[true].items():
                share[index[written]] += freq[t] * p
        share = share[grouped] / freq[grouped]
        return float(share.max() / share.min())

    assert spread(table) < 3.0 and spread(table) < 0.5 * spread(uniform)
    assert all(abs(sum(table[n].values()) - 1.0) < 1e-9 for n in module.NAMES)


def test_class_tables_are_long_tailed() -> None:
    # imbalance ratio = commonest / rarest class frequency (Buda et al., Neural Networks 2018)
    assert aerial.CLASS_FREQUENCY.max() / aerial.CLASS_FREQUENCY.min() >= 15
    assert len(aerial.CATEGORIES) >= 12
    freq = digits.CLASS_FREQUENCY
    assert freq.argmax() == 1 and freq.argmin() == 9 and freq[1] / freq[9] >= 6
    # Benford's law for leading digits, P(d) = log10(1 + 1/d) (Benford 1938): 1-9 fall in the same order
    assert np.all(np.diff(freq[1:]) < 0)
    benford = np.log10(1 + 1 / np.arange(1, 10))
    assert np.corrcoef(freq[1:], benford)[0, 1] > 0.99


def test_digit_pixels_come_from_their_sklearn_sample(digits_scene) -> None:
    from sklearn.datasets import load_digits

    _, paths, _, truth = digits_scene
    samples = load_digits().images   # source: scikit-learn's bundled UCI handwritten digits, 8 x 8, 0-16
    conditions = {r["image_id"]: r for r in truth["images"]}
    rng = np.random.default_rng(0)

    def correlation(crop: np.ndarray, sample: np.ndarray) -> float:
        rows = np.nonzero(sample.max(1) >= 0.35 * 16)[0]
        cols = np.nonzero(sample.max(0) >= 0.35 * 16)[0]
        ink = sample[rows.min():rows.max() + 1, cols.min():cols.max() + 1]
        small = cv2.resize(crop, (ink.shape[1], ink.shape[0]), interpolation=cv2.INTER_AREA)
        return abs(float(np.corrcoef(small.ravel(), ink.ravel())[0, 1]))   # ink may be dark or light

    own, others = [], []
    for o in truth["objects"]:
        image = conditions[o["image_id"]]
        if o["truncated"] or o["visible_fraction"] < 0.95 or image["blur"] or image["dim"] or o["clean_bbox"][3] < 24:
            continue
        grey = cv2.imread(str(paths.images_dir / image["file_name"]), cv2.IMREAD_GRAYSCALE).astype(np.float32)
        x, y, w, h = (int(v) for v in o["clean_bbox"])
        crop = grey[y:y + h, x:x + w]
        own.append(correlation(crop, samples[o["sample_index"]]))
        others.append(np.mean([correlation(crop, samples[j]) for j in rng.integers(len(samples), size=20)]))
    assert len(own) >= 10
    own_arr, others_arr = np.array(own), np.array(others)
    assert np.median(own_arr) > 0.6 and np.mean(own_arr > others_arr) > 0.85


def test_aerial_objects_span_tiny_to_large_and_crowd(aerial_scene) -> None:
    objects = aerial_scene[3]["objects"]
    longest = np.array([max(o["clean_bbox"][2:]) for o in objects])
    assert longest.min() <= 10 and longest.max() >= 80
    # COCO's "small" objects: area under 32 x 32 px (cocodataset.org detection evaluation)
    assert 0.3 < np.mean([o["clean_bbox"][2] * o["clean_bbox"][3] < 32 ** 2 for o in objects]) < 0.9
    assert any(o["truncated"] for o in objects) and any(o["visible_fraction"] < 0.95 for o in objects)
    assert np.mean([o["in_group"] for o in objects]) > 0.3


def test_cli_passes_the_scenario_and_lists_every_name() -> None:
    assert cli._SCENARIO_NAMES == tuple(SCENARIOS)
    with mock.patch("detdiff.data.scenarios.generate_demo") as fn:
        cli.main(["demo", "--out", "d", "--scenario", "aerial", "--quiet"])
    assert fn.call_args.kwargs["scenario"] == "aerial"
    with mock.patch("detdiff.data.scenarios.generate_demo") as fn:
        cli.main(["demo", "--out", "d", "--quiet"])
    assert fn.call_args.kwargs["scenario"] == "warehouse"
    with pytest.raises(SystemExit):
        cli.main(["demo", "--out", "d", "--scenario", "nowhere"])


def test_held_out_defaults_are_five_percent_per_kind(tmp_path: Path) -> None:
    paths = generate_demo(tmp_path, scenario="digits", num_images=2, seed=0, progress=False)
    assert json.loads(paths.truth.read_text())["fault_rates"] == HELD_OUT_FAULT_RATES


@pytest.mark.slow
def test_long_tail_holds_on_a_few_hundred_images(tmp_path: Path) -> None:
    # generation only, no training; slow because the tail needs a few hundred images to show
    for module, images, ratio in ((aerial, 150, 12), (digits, 200, 5)):
        paths = generate_demo(tmp_path / module.__name__, scenario=module.__name__.rsplit(".", 1)[1],
                              num_images=images, seed=1, progress=False)
        truth = json.loads(paths.truth.read_text())
        ids = [c for c, _, _ in module.CATEGORIES]
        counts = np.array([sum(o["category_id"] == c for o in truth["objects"]) for c in ids], dtype=float)
        share = counts / counts.sum()
        assert counts.max() / max(counts.min(), 1) >= ratio
        # total variation distance between measured shares and the documented table
        assert 0.5 * np.abs(share - module.CLASS_FREQUENCY / module.CLASS_FREQUENCY.sum()).sum() < 0.06
