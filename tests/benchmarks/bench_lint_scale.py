"""Lint speed and memory at COCO-train scale (118,287 images, 860,001 boxes, 80 classes).

Generates a synthetic COCO file (octagon polygons inside each box, a few crowd RLE masks, a handful of
planted faults) in a child process, then times reading it and ``lint_coco`` without ``verify_images``
side by side in this process (best of 2, wall and CPU) and prints seconds, the lint / read ratio and
peak RSS. Unless ``--no-files``, an empty file per image is created and lint with the image-folder
existence check is timed too.

    .venv/bin/python tests/benchmarks/bench_lint_scale.py [--images 118287] [--boxes 860001] [--no-files]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

PLANTED = {"box_nonpositive_size": 50, "unknown_category": 20, "duplicate_box": 30, "box_exceeds_image": 40}


def _peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0   # ru_maxrss is KiB on Linux


def _timed(fn, *args, repeats: int = 2, **kwargs) -> tuple[object, float, float]:
    """Last result, best wall and best CPU seconds of ``repeats`` calls (CPU time is steadier when shared)."""
    wall, cpu, result = [], [], None
    for _ in range(repeats):
        result = None                  # free the previous result first: peak RSS is one result's
        t0, c0 = time.perf_counter(), time.process_time()
        result = fn(*args, **kwargs)
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return result, min(wall), min(cpu)


def generate(path: Path, num_images: int, num_boxes: int, seed: int = 0) -> None:
    """Write the synthetic COCO file: arrays drawn at once, records built from ``tolist()``, one json.dump."""
    from pycocotools import mask as mask_utils

    rng = np.random.default_rng(seed)
    widths = rng.choice([640, 500, 480, 427], num_images)
    heights = rng.choice([480, 375, 640, 333], num_images)
    category_ids = np.setdiff1d(np.arange(1, 91), [12, 26, 29, 30, 45, 66, 68, 69, 71, 83])   # 80 ids with gaps
    image_of = np.sort(rng.integers(0, num_images, num_boxes))
    w = np.round(rng.uniform(0.02, 0.5, num_boxes) * widths[image_of], 2)
    h = np.round(rng.uniform(0.02, 0.5, num_boxes) * heights[image_of], 2)
    x = np.round(rng.uniform(0, 1, num_boxes) * (widths[image_of] - w), 2)
    y = np.round(rng.uniform(0, 1, num_boxes) * (heights[image_of] - h), 2)
    cats = rng.choice(category_ids, num_boxes)
    crowd = rng.random(num_boxes) < 0.001
    # octagon: the box with its corners cut at 1/4 of each side, area = 7/8 * w * h
    fx = np.array([0.25, 0.75, 1, 1, 0.75, 0.25, 0, 0])
    fy = np.array([0, 0, 0.25, 0.75, 1, 1, 0.75, 0.25])
    px = np.round(x[:, None] + fx * w[:, None], 2)
    py = np.round(y[:, None] + fy * h[:, None], 2)
    polygons = np.stack([px, py], axis=2).reshape(num_boxes, 16)
    area = np.round(0.875 * w * h, 2)

    bad = rng.choice(num_boxes, sum(PLANTED.values()), replace=False)
    cut = np.cumsum([0] + list(PLANTED.values()))
    planted = {k: bad[cut[i]:cut[i + 1]] for i, k in enumerate(PLANTED)}
    w[planted["box_nonpositive_size"]] = 0.0
    cats[planted["unknown_category"]] = 1000
    x[planted["box_exceeds_image"]] = widths[image_of[planted["box_exceeds_image"]]] - 1.0

    images = [{"id": i + 1, "file_name": f"{i + 1:012d}.jpg", "width": wi, "height": hi}
              for i, (wi, hi) in enumerate(zip(widths.tolist(), heights.tolist()))]
    annotations = [{"id": j + 1, "image_id": i + 1, "category_id": c, "bbox": [bx, by, bw, bh], "area": a,
                    "iscrowd": 0, "segmentation": [poly]}
                   for j, (i, c, bx, by, bw, bh, a, poly) in enumerate(zip(
                       image_of.tolist(), cats.tolist(), x.tolist(), y.tolist(), w.tolist(), h.tolist(),
                       area.tolist(), polygons.tolist()))]
    for j in np.flatnonzero(crowd).tolist():
        ih, iw = int(heights[image_of[j]]), int(widths[image_of[j]])
        rle = mask_utils.merge(mask_utils.frPyObjects(annotations[j]["segmentation"], ih, iw))
        annotations[j].update(iscrowd=1, area=float(mask_utils.area(rle)),
                              segmentation={"size": [ih, iw], "counts": rle["counts"].decode("ascii")})
    for j in planted["duplicate_box"].tolist():
        annotations.append(dict(annotations[j], id=len(annotations) + 1))
    categories = [{"id": c, "name": f"class_{c}", "supercategory": "thing"} for c in category_ids.tolist()]
    with open(path, "w") as fh:
        json.dump({"images": images, "annotations": annotations, "categories": categories}, fh)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=118_287)
    parser.add_argument("--boxes", type=int, default=860_001)
    parser.add_argument("--no-files", action="store_true", help="skip the image-folder existence check")
    parser.add_argument("--generate", type=Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate is not None:
        generate(args.generate, args.images, args.boxes)
        return

    from detdiff.data.coco import read_coco_json
    from detdiff.data.lint import lint_coco

    with tempfile.TemporaryDirectory(prefix="detdiff-lint-bench-") as tmp:
        ann = Path(tmp) / "instances.json"
        t0 = time.perf_counter()
        subprocess.run([sys.executable, __file__, "--generate", str(ann), "--images", str(args.images),
                        "--boxes", str(args.boxes)], check=True)
        print(f"generated {args.images} images / {args.boxes} boxes: {ann.stat().st_size / 2**20:.0f} MiB "
              f"in {time.perf_counter() - t0:.1f} s (child process)")
        rss0 = _peak_rss_mib()
        data, read_s, read_cpu = _timed(read_coco_json, ann)
        rss_read = _peak_rss_mib()
        report, lint_s, lint_cpu = _timed(lint_coco, ann, data=data)
        rss_lint = _peak_rss_mib()
        codes: dict[str, int] = {}
        for f in report.findings:
            codes[f.code] = codes.get(f.code, 0) + 1
        print(f"read JSON      {read_s:6.2f} s wall {read_cpu:6.2f} s CPU   peak RSS {rss_read:6.0f} MiB "
              f"(before: {rss0:.0f})")
        print(f"lint_coco      {lint_s:6.2f} s wall {lint_cpu:6.2f} s CPU   peak RSS {rss_lint:6.0f} MiB "
              f"(+{rss_lint - rss_read:.0f} over read)")
        print(f"lint / read    {lint_cpu / read_cpu:6.2f} (CPU time; best of 2 each)")
        print(f"findings: {codes}")
        for code, planted in PLANTED.items():
            print(f"  planted {code}: {planted}, found {codes.get(code, 0)}")
        if not args.no_files:
            images_dir = Path(tmp) / "images"
            images_dir.mkdir()
            for rec in data["images"]:
                (images_dir / rec["file_name"]).touch()
            _, files_s, files_cpu = _timed(lint_coco, ann, images_dir, data=data)
            extra = (files_cpu - lint_cpu) / len(data["images"]) * 1e6
            print(f"lint + files   {files_s:6.2f} s wall {files_cpu:6.2f} s CPU   "
                  f"(with files / without {files_cpu / lint_cpu:.2f}; about {extra:.1f} us CPU a file)")
        print(f"peak RSS       {_peak_rss_mib():7.0f} MiB")


if __name__ == "__main__":
    main()
