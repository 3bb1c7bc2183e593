"""Analysis at COCO train2017 scale: 118k images, 860k boxes, a few-epoch training log.

Box descriptors only (no pixel descriptors, no pooled features). The dataset and log are synthetic and
written first; the analysis then runs in a fresh child process so its peak memory (``ru_maxrss``) is its
own. Goals: analyze_run <= 60 s and <= 4 GB. Also prints, side by side in the same run, the vectorised
same-image pair pass against a per-image loop over ``torchvision.ops.box_iou`` on a sample of images, and the
time to read the objects table back as the Python API does, from the CSV and from its Parquet copy (each in a
fresh process, the best of three: a notebook opening a run pays the first read).

Run: ``.venv/bin/python tests/benchmarks/bench_analysis_scale.py [--images N --boxes N --epochs N]``
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

from detdiff.data.coco import CocoDataset
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLogWriter

GOAL_SECONDS = 60.0
GOAL_BYTES = 4 * 1024 ** 3
MAX_BOXES_PER_IMAGE = 100      # COCO train2017 tops out a little below 100 boxes per image (from memory)


def synthetic_dataset(num_images: int, num_boxes: int, seed: int = 0) -> CocoDataset:
    """COCO-like arrays: boxes per image negative-binomial (mean ~7.3, long tail to 100), 80 classes with skewed
    frequencies, ~1% crowd, boxes inside 640x480-ish images."""
    rng = np.random.default_rng(seed)
    mean = num_boxes / num_images
    counts = np.minimum(rng.negative_binomial(1.3, 1.3 / (1.3 + mean), num_images), MAX_BOXES_PER_IMAGE)
    while counts.sum() != num_boxes:              # top up (or trim) random images to the exact total
        step = int(np.sign(num_boxes - counts.sum()))
        room = np.flatnonzero(counts < MAX_BOXES_PER_IMAGE if step > 0 else counts > 0)
        picks = rng.choice(room, min(len(room), abs(num_boxes - int(counts.sum()))), replace=False)
        counts[picks] += step
    widths = rng.choice([640, 500, 480, 427], num_images)
    heights = rng.choice([480, 375, 640, 333], num_images)
    img = np.repeat(np.arange(num_images), counts)
    w = np.minimum(np.exp(rng.normal(3.5, 1.1, num_boxes)), widths[img] - 1.0)
    h = np.minimum(w * np.exp(rng.normal(0, 0.5, num_boxes)), heights[img] - 1.0)
    x = rng.uniform(0, 1, num_boxes) * (widths[img] - w)
    y = rng.uniform(0, 1, num_boxes) * (heights[img] - h)
    freq = 1.0 / np.arange(1, 81) ** 0.8
    labels = rng.choice(80, num_boxes, p=freq / freq.sum())
    return CocoDataset(
        image_ids=np.arange(1, num_images + 1) * 3, file_names=[f"{i:012d}.jpg" for i in range(num_images)],
        widths=widths.astype(np.int64), heights=heights.astype(np.int64), category_ids=np.arange(1, 81) + 10,
        category_names=[f"class{c}" for c in range(80)], supercategories=[""] * 80,
        ann_ids=np.arange(1, num_boxes + 1), ann_image_index=img, labels=labels.astype(np.int64),
        boxes=np.stack([x, y, w, h], axis=1), areas=w * h * 0.7, iscrowd=rng.random(num_boxes) < 0.01)


def write_log(log_dir: Path, ds: CocoDataset, epochs: int, seed: int = 1) -> None:
    """A synthetic log, one ``process`` call per epoch for all rows (the writer memmaps every field)."""
    rng = np.random.default_rng(seed)
    num_i, num_a = ds.num_images, ds.num_annotations
    writer = LossLogWriter(log_dir, num_i, num_a)
    trained = ~ds.iscrowd
    persistent_images = np.flatnonzero(rng.random(num_i) < 0.02)
    for epoch in range(epochs):
        writer.reset(epoch)
        obj = {name: np.full((num_a, *shape), fill, dtype=dt) for name, (dt, shape, fill) in OBJECT_FIELDS.items()}
        obj["num_anchors"][trained] = rng.integers(1, 9, trained.sum())
        obj["loc_sum"][trained] = rng.gamma(2.0, 0.3, trained.sum()) * obj["num_anchors"][trained]
        obj["cls_sum"][trained] = rng.gamma(2.0, 0.2, trained.sum()) * obj["num_anchors"][trained]
        obj["logit_label"][trained] = rng.normal(epoch, 1.0, trained.sum())
        obj["logit_other"][trained] = rng.normal(-2.0, 1.0, trained.sum())
        obj["other_label"][trained] = rng.integers(0, 80, trained.sum())
        obj["pred_iou"][trained] = rng.beta(12, 2, trained.sum())
        obj["pred_box"][trained] = ds.boxes[trained] * rng.uniform(0.9, 1.1, (trained.sum(), 4))
        obj["pred_label"][trained] = np.where(rng.random(trained.sum()) < 0.97, ds.labels[trained],
                                              rng.integers(0, 80, trained.sum()))
        obj["pred_score"][trained] = rng.uniform(0, 1, trained.sum())
        obj["detected"][trained] = rng.random(trained.sum()) < 0.4 + 0.15 * epoch
        image = {name: np.full(num_i, fill, dtype=dt) for name, (dt, _, fill) in IMAGE_FIELDS.items()}
        image["num_pos"][:] = np.bincount(ds.ann_image_index[trained], weights=obj["num_anchors"][trained],
                                          minlength=num_i)
        image["loc_sum"][:] = np.bincount(ds.ann_image_index[trained], weights=obj["loc_sum"][trained],
                                          minlength=num_i)
        image["pos_sum"][:] = np.bincount(ds.ann_image_index[trained], weights=obj["cls_sum"][trained],
                                          minlength=num_i)
        image["neg_sum"][:] = rng.gamma(3.0, 1.0, num_i)
        # one-off detections on a random quarter of the images, plus a persistent one on 2% of them
        one_off = np.flatnonzero(rng.random(num_i) < 0.25)
        boxes = np.concatenate([rng.uniform(0, 300, (len(one_off), 2)), rng.uniform(10, 80, (len(one_off), 2))], 1)
        extra = np.concatenate([one_off, persistent_images])
        boxes = np.concatenate([boxes, np.tile([50.0, 60.0, 40.0, 30.0], (len(persistent_images), 1))
                                + rng.normal(0, 2, (len(persistent_images), 4))])
        unmatched = {"image_index": extra.astype(np.int64), "box": boxes.astype(np.float32),
                     "score": rng.uniform(0.3, 0.9, len(extra)).astype(np.float32),
                     "label": np.r_[rng.integers(0, 80, len(one_off)), np.full(len(persistent_images), 7)]
                     .astype(np.int32)}
        writer.process(np.arange(num_i), image, np.arange(num_a), obj, unmatched)
        writer.finalize()


def _save_dataset(ds: CocoDataset, path: Path) -> None:
    np.savez(path, **{k: getattr(ds, k) for k in ("image_ids", "widths", "heights", "category_ids", "ann_ids",
                                                    "ann_image_index", "labels", "boxes", "areas", "iscrowd")})


def _load_dataset(path: Path) -> CocoDataset:
    with np.load(path) as d:
        arrays = {k: d[k] for k in d.files}
    num_i, num_c = len(arrays["image_ids"]), len(arrays["category_ids"])
    return CocoDataset(file_names=[f"{i:012d}.jpg" for i in range(num_i)],
                       category_names=[f"class{c}" for c in range(num_c)], supercategories=[""] * num_c, **arrays)


def analyze_child(rundir: Path) -> dict:
    """In the child process: analyze_run, then write_tables; timings and this process's peak RSS."""
    from detdiff.analysis.tables import analyze_run, parquet_available, write_tables
    from detdiff.config import load_config

    ds = _load_dataset(rundir / "dataset.npz")
    config = load_config()
    config["analysis"]["pixel_descriptors"] = False
    start = time.perf_counter()
    tables = analyze_run(rundir, ds, config)
    analyze_s = time.perf_counter() - start
    start = time.perf_counter()
    write_tables(tables, rundir, ds)
    write_s = time.perf_counter() - start
    start = time.perf_counter()
    tables.objects.round(6).to_parquet(rundir / "objects.again.parquet", index=False)
    parquet_s = time.perf_counter() - start if parquet_available() else float("nan")
    return {"analyze_s": analyze_s, "write_s": write_s, "objects_parquet_s": parquet_s, "suspects": len(tables.suspects),
            "causes_rows": len(tables.causes), "peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}


READ_MODES = ("csv", "parquet", "parquet_2_columns")


def read_child(path: Path, mode: str) -> float:
    """In a fresh process: seconds to read ``objects`` as ``AuditRun.objects`` / ``.table`` do, from the CSV or its
    Parquet copy."""
    from detdiff.report import run_folder

    if mode == "csv":
        run_folder.parquet_copy = lambda csv: None
    start = time.perf_counter()
    run_folder.read_table(path, only=["annotation_id", "pos_score"] if mode == "parquet_2_columns" else None)
    return time.perf_counter() - start


def read_times(rundir: Path, repeats: int = 3) -> dict[str, float]:
    """Best of ``repeats`` fresh-process reads of objects.csv per :data:`READ_MODES`, interleaved."""
    best = {mode: float("inf") for mode in READ_MODES}
    for _ in range(repeats):
        for mode in READ_MODES:
            done = subprocess.run([sys.executable, __file__, "--read-child", str(rundir / "objects.csv"), mode],
                                  capture_output=True, text=True, check=True)
            best[mode] = min(best[mode], float(done.stdout.strip().splitlines()[-1]))
    return best


def pair_pass_vs_loop(ds: CocoDataset, sample: int = 3000) -> tuple[float, float, int]:
    """Seconds of the vectorised max-IoU pass and of a per-image torchvision loop on the same images."""
    import torch
    from torchvision.ops import box_iou

    from detdiff.analysis.descriptors import pairwise_overlap

    sub = ds.subset_images(np.arange(sample))
    start = time.perf_counter()
    fast = pairwise_overlap(sub).max_iou
    fast_s = time.perf_counter() - start
    xyxy = torch.from_numpy(sub.boxes_xyxy())
    slow = np.zeros(sub.num_annotations)
    start = time.perf_counter()
    for i in range(sub.num_images):
        s = sub.ann_slice(i)
        if s.stop - s.start > 1:
            iou = box_iou(xyxy[s], xyxy[s])
            iou.fill_diagonal_(0)
            keep = ~torch.from_numpy(sub.iscrowd[s])
            slow[s] = (iou[:, keep].max(dim=1).values if keep.any() else torch.zeros(s.stop - s.start)).numpy()
    slow_s = time.perf_counter() - start
    assert np.allclose(fast, slow), "vectorised max IoU differs from the torchvision loop"
    return fast_s, slow_s, sub.num_annotations


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=118_000)
    parser.add_argument("--boxes", type=int, default=860_000)
    parser.add_argument("--epochs", type=int, default=4)
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--read-child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(analyze_child(args.child)))
        return 0
    if args.read_child:
        print(read_child(Path(args.read_child[0]), args.read_child[1]))
        return 0
    with tempfile.TemporaryDirectory(prefix="bench_analysis_") as tmp:
        rundir = Path(tmp)
        start = time.perf_counter()
        ds = synthetic_dataset(args.images, args.boxes)
        write_log(rundir / "log", ds, args.epochs)
        _save_dataset(ds, rundir / "dataset.npz")
        setup_s = time.perf_counter() - start
        pairs = int((np.diff(ds.image_offsets) ** 2).sum())
        print(f"dataset: {ds.num_images} images, {ds.num_annotations} boxes, {pairs:,} same-image pairs, "
              f"max {np.diff(ds.image_offsets).max()} boxes/image; log: {args.epochs} epochs (setup {setup_s:.1f} s)")
        done = subprocess.run([sys.executable, __file__, "--child", str(rundir)], capture_output=True, text=True,
                              check=True)
        res = json.loads(done.stdout.strip().splitlines()[-1])
        reads = read_times(rundir) if (rundir / "objects.parquet").exists() else None
        fast_s, slow_s, sample_boxes = pair_pass_vs_loop(ds)
    gib = res["peak_rss_bytes"] / 1024 ** 3
    print(f"analyze_run: {res['analyze_s']:.1f} s = {res['analyze_s'] / GOAL_SECONDS:.2f} x the 60 s goal; "
          f"peak RSS {gib:.2f} GiB = {res['peak_rss_bytes'] / GOAL_BYTES:.2f} x the 4 GiB goal")
    print(f"write_tables (5 CSVs, 2 Parquet copies, review.json): {res['write_s']:.1f} s = "
          f"{res['write_s'] / res['analyze_s']:.2f} x analyze_run; {res['suspects']} suspects, "
          f"{res['causes_rows']} causes rows; objects.parquet alone {res['objects_parquet_s']:.1f} s = "
          f"{res['objects_parquet_s'] / res['write_s']:.2f} of write_tables")
    if reads is None:
        print("objects table read: pyarrow not installed, CSV only")
    else:
        print(f"objects table read by the API (fresh process, best of 3): CSV {reads['csv']:.2f} s, Parquet "
              f"{reads['parquet']:.2f} s = {reads['csv'] / reads['parquet']:.1f}x faster; two columns of the "
              f"Parquet {reads['parquet_2_columns']:.3f} s = {reads['csv'] / reads['parquet_2_columns']:.0f}x")
    print(f"same-image max IoU on {sample_boxes} boxes: vectorised {fast_s * 1e3:.0f} ms vs per-image "
          f"torchvision loop {slow_s * 1e3:.0f} ms = {slow_s / fast_s:.1f}x faster")
    ok = res["analyze_s"] <= GOAL_SECONDS and res["peak_rss_bytes"] <= GOAL_BYTES
    print("goals met" if ok else "GOALS MISSED")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
