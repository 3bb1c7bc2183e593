"""Peak memory of training + logging for N and 10N tiny images (same tiny model), and the data-loading share.

Each size runs in a fresh child process (``ru_maxrss`` is a per-process peak). The image cache is built
first; then ``tracemalloc`` (Python heap, numpy arrays included; torch's own allocator is not traced) and
``ru_maxrss`` cover ``train_and_log`` only. The goal is an in-memory part that does not grow with the
dataset: the images are read from the uint8 memmap one batch at a time and the log is written through
memmaps, so the traced peak ratio for 10x the images should stay far below 10. ``ru_maxrss`` also counts
file-backed memmap pages the process touched (the page cache, reclaimable), so it grows with the cache
size; both are printed.

Run: ``.venv/bin/python tests/benchmarks/bench_memory.py [--images N --epochs E]``
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import tracemalloc
from pathlib import Path

import cv2
import numpy as np

IMAGE_SIZE = 64
WIDTH, HEIGHT = 128, 96


def write_tiny_dataset(root: Path, num_images: int, seed: int = 0) -> tuple[Path, Path]:
    """Grey images with 1-4 coloured rectangles (3 classes) and their COCO file; returns (annotations, images)."""
    rng = np.random.default_rng(seed)
    images_dir = root / "images"
    images_dir.mkdir(parents=True, exist_ok=True)
    images, anns = [], []
    colours = [(200, 40, 40), (40, 200, 40), (40, 40, 200)]
    for i in range(num_images):
        pixels = np.full((HEIGHT, WIDTH, 3), 120, np.uint8)
        for _ in range(rng.integers(1, 5)):
            w, h = rng.integers(12, 48, 2)
            x, y = rng.integers(0, WIDTH - w), rng.integers(0, HEIGHT - h)
            label = int(rng.integers(0, 3))
            cv2.rectangle(pixels, (int(x), int(y)), (int(x + w - 1), int(y + h - 1)), colours[label], -1)
            anns.append({"id": len(anns) + 1, "image_id": i + 1, "category_id": label + 1,
                         "bbox": [float(x), float(y), float(w), float(h)], "area": float(w * h), "iscrowd": 0})
        cv2.imwrite(str(images_dir / f"{i:06d}.png"), pixels)
        images.append({"id": i + 1, "file_name": f"{i:06d}.png", "width": WIDTH, "height": HEIGHT})
    ann_path = root / "annotations.json"
    ann_path.write_text(json.dumps({"images": images, "annotations": anns,
                                    "categories": [{"id": k + 1, "name": f"c{k}"} for k in range(3)]}))
    return ann_path, images_dir


def child(root: Path, epochs: int) -> dict:
    """In the child process: build the cache, then measure train_and_log alone."""
    from detdiff.config import load_config
    from detdiff.data.coco import build_dataset, read_coco_json
    from detdiff.data.image_cache import build_image_cache
    from detdiff.train.loop import train_and_log

    dataset = build_dataset(read_coco_json(root / "annotations.json"), images_dir=root / "images")
    cache = build_image_cache(dataset, root / "run" / "cache", IMAGE_SIZE, max_pixels=10**8, progress=False)
    config = load_config("ci", {"data": {"image_size": IMAGE_SIZE},
                                "train": {"epochs": epochs, "batch_size": 16, "threads": 1, "device": "cpu"}})
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    tracemalloc.start()
    result = train_and_log(dataset, cache, config, root / "run", progress=False)
    _, traced_peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return {"images": dataset.num_images, "objects": dataset.num_annotations, "traced_peak": traced_peak,
            "rss_before": rss_before, "rss_peak": rss_peak, "data_share": result.data_share,
            "images_per_second": result.images_per_second}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=30, help="N (the large run uses 10N)")
    parser.add_argument("--epochs", type=int, default=2)
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child, args.epochs)))
        return 0
    results = []
    with tempfile.TemporaryDirectory(prefix="bench_memory_") as tmp:
        for n in (args.images, 10 * args.images):
            root = Path(tmp) / f"n{n}"
            write_tiny_dataset(root, n)
            done = subprocess.run([sys.executable, __file__, "--child", str(root), "--epochs", str(args.epochs)],
                                  capture_output=True, text=True, check=False)
            if done.returncode != 0:
                print(done.stdout[-2000:], done.stderr[-4000:])
                return 1
            results.append(json.loads(done.stdout.strip().splitlines()[-1]))
    small, large = results
    mb = 1024 ** 2
    for r in results:
        print(f"{r['images']:6d} images {r['objects']:6d} objects: traced Python heap peak "
              f"{r['traced_peak'] / mb:7.2f} MB, ru_maxrss {r['rss_peak'] / mb:7.1f} MB "
              f"(+{(r['rss_peak'] - r['rss_before']) / mb:6.1f} MB during training), "
              f"data loading {100 * r['data_share']:.1f}% of epoch time, {r['images_per_second']:.0f} img/s")
    print(f"10x images -> traced heap peak x{large['traced_peak'] / small['traced_peak']:.2f} (goal: far below 10), "
          f"ru_maxrss x{large['rss_peak'] / small['rss_peak']:.2f}, growth during training "
          f"x{max(1, large['rss_peak'] - large['rss_before']) / max(1, small['rss_peak'] - small['rss_before']):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
