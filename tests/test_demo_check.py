"""`detdiff check` on the demo reports exactly the planted duplicates, and pycocotools agrees on counts."""

from __future__ import annotations

import json

import pytest
from pycocotools.coco import COCO

from detdiff.data.scenarios import generate_demo
from detdiff.data.lint import lint_coco


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return generate_demo(tmp_path_factory.mktemp("demo"), num_images=60, seed=3, progress=False,
                         fault_rates={"duplicate_box": 0.05})


def test_check_reports_exactly_the_planted_duplicates(demo) -> None:
    truth = json.loads(demo.truth.read_text())
    pairs = [frozenset((f["annotation_id"], f["duplicate_of"])) for f in truth["faults"]
             if f["kind"] == "duplicate_box"]
    assert pairs
    report = lint_coco(demo.annotations, demo.images_dir)
    flagged = [f for f in report.findings if f.code in ("duplicate_box", "near_duplicate_box")]
    covered = [next(p for p in pairs if f.record_id in p) for f in flagged if any(f.record_id in p for p in pairs)]
    assert len(flagged) == len(pairs), [f.record_id for f in flagged]
    assert sorted(map(sorted, covered)) == sorted(map(sorted, pairs))


def test_lint_counts_agree_with_pycocotools(demo) -> None:
    coco = COCO(str(demo.annotations))  # reference index: pycocotools coco.py
    counts = lint_coco(demo.annotations, demo.images_dir).counts
    assert counts["images"] == len(coco.imgs)
    assert counts["annotations"] == len(coco.anns)
    assert counts["categories"] == len(coco.cats)
