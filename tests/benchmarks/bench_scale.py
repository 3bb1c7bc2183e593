"""Scale benchmark: decode, cache, train, analyse and report on a generated set of 10,000 JPEGs of mixed sizes.

The set is COCO-like: 640x480 to 1920x1080 frames in both orientations, 8% camera stills of 4000x3000, 4% of an
odd 1000x667 (no JPEG reduction divides it); 80 classes with Zipf frequencies (the first about a fifth of the
boxes); 1-40 boxes per image (mean about 7), sides log-normal around 8% of the longer image side, down to 4 px.
It is generated once into ``--data`` (about 2 GB for 10,000 images; reruns reuse it, a larger ``--num-images``
adds the missing files) with numpy/OpenCV drawing and OpenCV's JPEG encoder, two processes.

Each measurement runs in a fresh child process (its own peak RSS, ``ru_maxrss``, decode workers counted
apart) and is printed beside the current path of the same run; the machine is shared, so read the ratios:
- decode + cache img/s with ``--workers`` processes: reduced JPEG decoding (``data.reduced_decode``, the default)
  against full decoding (the path before it), on a sample of the whole set, on its 4000 px images and on its
  640x480 ones; the whole set once with the default path (it feeds the later steps); two ranks decoding one
  shard each then joined (the torchrun path) against one process with two workers;
- cache bytes per image (view + crops) and JPEG bytes, raw rows against JPEG rows (``data.cache_codec: jpeg``, the
  whole set decoded a second time into that cache: its decode + encode img/s beside the raw build's);
- train img/s of a short timed slice (``--train-steps`` steps of 16) read from the memmap with a warm page cache,
  from the memmap with its pages evicted before each batch (``posix_fadvise DONTNEED``: what a cache larger than
  RAM gives), from an in-RAM copy of the same rows, and from the JPEG rows, the same batch through each in turn;
  a crop-model training step on the raw and on the JPEG crops;
- analysis (on a synthetic 4-epoch log: training the whole set is not the point here), CSV tables alone against
  CSV + Parquet copies, and the HTML report with thumbnails;
- a linear projection of each to 118k images;
- with ``--audit-epochs N``: a whole ``detdiff audit`` of the set with ``N`` detector epochs, one crop-model
  epoch and a training budget of :data:`AUDIT_BUDGET_MINUTES` for the tiles (the time goal is on the plan, not on
  training length), its plan's projected seconds per stage beside the
  measured ones (``run.json["plan_seconds"]``) against the goal measured / projected within 0.75-1.25.

Run: ``python tests/benchmarks/bench_scale.py [--data DIR] [--num-images N] [--image-size S] [--work DIR]``
(about 15 minutes on 2 cores for 10,000 images once the set exists; ``--num-images 2000`` for a quick look).
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import cv2
import numpy as np

HERE = Path(__file__).resolve().parent
#: (width, height, share of the images)
SIZES = [(640, 480, 0.30), (480, 640, 0.08), (800, 600, 0.08), (1024, 768, 0.08), (1280, 720, 0.12),
         (1000, 667, 0.04), (1920, 1080, 0.18), (1080, 1920, 0.04), (4000, 3000, 0.06), (3000, 4000, 0.02)]
NUM_CLASSES = 80
COCO_IMAGES, COCO_BOXES = 118_287, 860_001     # COCO train2017 (from memory)
GENERATOR_VERSION = 1
#: Training budget of the --audit-epochs audit: the recipe fits its tiles into it (80 classes of boxes down to 4 px
#: would otherwise tile most images for a budget of 0.6 s per image).
AUDIT_BUDGET_MINUTES = 8


def image_record(seed: int, i: int) -> tuple[int, int, np.ndarray, np.ndarray]:
    """Width, height, boxes ``[n, 4]`` xywh and labels ``[n]`` of image ``i`` (its own random stream)."""
    rng = np.random.default_rng([seed, i, 0])
    w, h, _ = SIZES[rng.choice(len(SIZES), p=[s[2] for s in SIZES])]
    n = int(np.clip(rng.negative_binomial(1.5, 1.5 / (1.5 + 7.0)), 1, 40))
    side = np.clip(max(w, h) * np.exp(rng.normal(np.log(0.08), 0.9, n)), 4.0, 0.9 * min(w, h))
    aspect = np.exp(rng.normal(0.0, 0.5, n))
    bw = np.clip(np.round(side * np.sqrt(aspect)), 4, w - 1)
    bh = np.clip(np.round(side / np.sqrt(aspect)), 4, h - 1)
    x, y = np.floor(rng.random(n) * (w - bw)), np.floor(rng.random(n) * (h - bh))
    freq = 1.0 / np.arange(1, NUM_CLASSES + 1)
    labels = rng.choice(NUM_CLASSES, n, p=freq / freq.sum())
    return w, h, np.stack([x, y, bw, bh], axis=1), labels


def draw_image(job: tuple[int, int, str]) -> int:
    """Draw image ``i`` (a blurred colour field with a gradient, class-coloured shapes) and write it as JPEG 90."""
    seed, i, path = job
    if os.path.exists(path) and os.path.getsize(path) > 0:
        return 0
    w, h, boxes, labels = image_record(seed, i)
    rng = np.random.default_rng([seed, i, 1])
    small = rng.integers(40, 220, (max(2, h // 64), max(2, w // 64), 3), dtype=np.uint8)
    pixels = cv2.resize(small, (w, h), interpolation=cv2.INTER_CUBIC)
    pixels = cv2.add(pixels, rng.integers(0, 12, (h, w, 1), dtype=np.uint8).repeat(3, axis=2))  # sensor grain
    hues = (labels * 180 // NUM_CLASSES).astype(np.uint8)
    colours = cv2.cvtColor(np.stack([hues, np.full_like(hues, 200), rng.integers(90, 250, len(hues), dtype=np.uint8)],
                                    axis=1)[None], cv2.COLOR_HSV2BGR)[0]
    for (x, y, bw, bh), colour, shape in zip(boxes.astype(int), colours.tolist(), rng.integers(0, 2, len(boxes))):
        if shape:
            cv2.rectangle(pixels, (x, y), (x + bw - 1, y + bh - 1), colour, -1)
        else:
            cv2.ellipse(pixels, (x + bw // 2, y + bh // 2), (max(1, bw // 2), max(1, bh // 2)), 0, 0, 360, colour, -1)
    ok, data = cv2.imencode(".jpg", pixels, [cv2.IMWRITE_JPEG_QUALITY, 90])
    tmp = path + ".tmp"
    with open(tmp, "wb") as fh:
        fh.write(data.tobytes())
    os.replace(tmp, path)
    return 1


def ensure_dataset(data: Path, num_images: int, seed: int, workers: int) -> tuple[Path, Path, float, int]:
    """The generated set's annotation file and image folder (drawing only missing files); generation seconds."""
    images = data / "images"
    images.mkdir(parents=True, exist_ok=True)
    ann = data / f"annotations_{num_images}_s{seed}_v{GENERATOR_VERSION}.json"
    jobs = [(seed, i, str(images / f"{i:06d}.jpg")) for i in range(num_images)]
    start = time.perf_counter()
    with multiprocessing.get_context("fork").Pool(workers) as pool:
        drawn = sum(pool.imap_unordered(draw_image, jobs, chunksize=16))
    if not ann.exists():
        recs, anns = [], []
        for i in range(num_images):
            w, h, boxes, labels = image_record(seed, i)
            recs.append({"id": i + 1, "file_name": f"{i:06d}.jpg", "width": w, "height": h})
            anns += [{"id": len(anns) + k + 1, "image_id": i + 1, "category_id": int(c) + 1, "bbox": b.tolist(),
                      "area": float(b[2] * b[3]), "iscrowd": 0} for k, (b, c) in enumerate(zip(boxes, labels))]
        cats = [{"id": k + 1, "name": f"class{k:02d}", "supercategory": ""} for k in range(NUM_CLASSES)]
        ann.write_text(json.dumps({"images": recs, "annotations": anns, "categories": cats}))
    return ann, images, time.perf_counter() - start, drawn


def _peak() -> dict[str, int]:
    return {"rss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
            "children_rss": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024}


def _dataset(args: dict):
    from detdiff.data.coco import build_dataset, read_coco_json

    ds = build_dataset(read_coco_json(args["ann"]), images_dir=args["images"])
    return ds if args.get("rows") is None else ds.subset_images(np.asarray(args["rows"]))


def phase_decode(args: dict) -> dict:
    """Build a cache of the given rows with one path; seconds and peak memory."""
    from detdiff.data.cache_shards import build_cache_shard, merge_cache_shards
    from detdiff.data.image_cache import build_image_cache

    ds = _dataset(args)
    options = dict(max_pixels=10**8, with_crops=True, reduced_decode=args["reduced"], codec=args.get("codec", "raw"))
    if args.get("merge"):
        start = time.perf_counter()
        merge_cache_shards(ds, args["cache"], args["size"], args["world"], **options)
        return {"seconds": time.perf_counter() - start, **_peak()}
    for name in ds.file_names:                                    # the files come from the page cache in each path
        (Path(args["images"]) / name).read_bytes()
    start = time.perf_counter()
    if "rank" in args:
        build_cache_shard(ds, args["cache"], args["size"], args["rank"], args["world"], workers=args["workers"],
                          progress=False, **options)
    else:
        build_image_cache(ds, args["cache"], args["size"], workers=args["workers"], progress=False, **options)
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "images": ds.num_images, "boxes": ds.num_annotations, **_peak()}


def phase_train(args: dict) -> dict:
    """Train img/s and data share from the memmap (warm; its pages evicted before each batch), from an in-RAM copy
    of the same rows and from the JPEG rows: the same batch through each in turn, round after round, after two
    untimed rounds; then a crop-model step on raw and on JPEG crops."""
    import dataclasses

    import torch

    from detdiff.config import load_config
    from detdiff.data.image_cache import ImageCache
    from detdiff.model.detector import Detector
    from detdiff.model.losses import compute_loss_streams
    from detdiff.plan_warmup import Warmup, _time_crop_model
    from detdiff.recipe import fit_recipe
    from detdiff.train.batches import BatchMaker
    from detdiff.train.optimizer import build_optimizer

    torch.set_num_threads(args["threads"])
    torch.manual_seed(0)
    ds = _dataset(args)
    cache = ImageCache.open(args["cache"])
    jpeg = ImageCache.open(args["jpeg_cache"])
    config, _ = fit_recipe(ds, load_config(None, {"data": {"image_size": args["size"]}}), measure=False)
    batch = args["batch"]
    index = np.random.default_rng(0).permutation(cache.usable_indices)[:(args["steps"] + 2) * batch]
    rows = np.sort(index)
    in_ram = dataclasses.replace(cache, images=np.ascontiguousarray(cache.images[rows]), scale=cache.scale[rows],
                                 usable=cache.usable[rows], pixel=cache.pixel[rows], crops=None, tiles=None, grid=None,
                                 tile_owner=None)                   # whole views only, as the cache was built
    cpu = torch.device("cpu")
    makers = {"warm": (BatchMaker(ds, cache, cpu, flips="horizontal"), index),
              "evicted": (BatchMaker(ds, cache, cpu, flips="horizontal"), index),
              "in_ram": (BatchMaker(ds.subset_images(rows), in_ram, cpu, flips="horizontal"),
                         np.searchsorted(rows, index)),
              "jpeg": (BatchMaker(ds, jpeg, cpu, flips="horizontal"), index)}
    for make, _ in makers.values():
        make.set_epoch(0)
    model = Detector.from_config(config["model"], ds.num_classes, cache.image_size)
    optimizer = build_optimizer(model, config["train"])
    fd = os.open(cache.cache_dir / "images.u8", os.O_RDONLY)
    os.fsync(fd)
    spent = {name: [0.0, 0.0] for name in makers}                 # [data seconds, step seconds]
    for k in range(args["steps"] + 2):
        for name, (make, idx) in makers.items():
            if name == "evicted":                                 # drop the cache's pages: read from disk
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            start = time.perf_counter()
            b = make(idx[k * batch:(k + 1) * batch])
            loaded = time.perf_counter()
            streams = compute_loss_streams(model(b.images), model.anchors, b.targets, config["loss"], config["log"],
                                           grid=model.anchor_grid)
            optimizer.zero_grad()
            streams.total.backward()
            optimizer.step()
            if k >= 2:
                spent[name][0] += loaded - start
                spent[name][1] += time.perf_counter() - start
    os.close(fd)
    out = {name: (args["steps"] * batch / step_s, data_s / step_s) for name, (data_s, step_s) in spent.items()}
    for name, source in (("crop_raw", cache), ("crop_jpeg", jpeg)) * 2:       # alternated, the faster of two
        warm = Warmup(0, 0.0, 0.0, 0.0)
        _time_crop_model(ds, source, config, warm)
        out[name] = min(out.get(name, np.inf), warm.crop_step_s)
    return {**out, **_peak()}


def phase_analysis(args: dict) -> dict:
    """A synthetic 4-epoch log for the set, then analyze_run, write_tables (CSV; CSV + Parquet) and the report."""
    from bench_analysis_scale import write_log

    from detdiff.analysis import tables as tables_module
    from detdiff.config import load_config
    from detdiff.data.coco import save_dataset
    from detdiff.pipeline import report

    ds = _dataset(args)
    rundir = Path(args["rundir"])
    shutil.rmtree(rundir / "log", ignore_errors=True)
    write_log(rundir / "log", ds, 4)
    save_dataset(ds, rundir / "dataset.npz")
    config = load_config(None, {"data": {"image_size": args["size"]}})
    config["crossfit"]["enabled"] = False
    start = time.perf_counter()
    tables = tables_module.analyze_run(rundir, ds, config)
    out = {"analyze_s": time.perf_counter() - start}
    available = tables_module.parquet_available
    tables_module.parquet_available = lambda: False
    start = time.perf_counter()
    tables_module.write_tables(tables, rundir, ds)
    out["write_csv_s"] = time.perf_counter() - start
    tables_module.parquet_available = available
    start = time.perf_counter()
    tables_module.write_tables(tables, rundir, ds)
    out["write_both_s"] = time.perf_counter() - start
    start = time.perf_counter()
    report(rundir, config=config)
    out["report_s"] = time.perf_counter() - start
    return {**out, **_peak()}


PHASES = {"decode": phase_decode, "train": phase_train, "analysis": phase_analysis}


def run_phase(name: str, **args) -> dict:
    """Run one phase in a fresh child process; its JSON result."""
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE), *sys.path])}
    done = subprocess.run([sys.executable, __file__, "--phase", name, json.dumps(args, default=str)],
                          capture_output=True, text=True, env=env)
    if done.returncode != 0:
        raise RuntimeError(f"phase {name} failed:\n{done.stdout[-2000:]}\n{done.stderr[-4000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _decode_pair(label: str, base: dict, rows, work: Path, workers: int) -> tuple[float, float]:
    """Decode ``rows`` with the full path, then the reduced one; prints and returns both img/s."""
    full = run_phase("decode", **base, rows=rows, reduced=False, workers=workers, cache=str(work / "c_full"))
    reduced = run_phase("decode", **base, rows=rows, reduced=True, workers=workers, cache=str(work / "c_red"))
    shutil.rmtree(work / "c_full"), shutil.rmtree(work / "c_red")
    a, b = full["images"] / full["seconds"], reduced["images"] / reduced["seconds"]
    print(f"decode + cache, {label} ({full['images']} images, {workers} processes): full decode {a:.1f} img/s, "
          f"reduced {b:.1f} img/s = {b / a:.2f}x; peak RSS of a worker {full['children_rss'] / 2**20:.0f} / "
          f"{reduced['children_rss'] / 2**20:.0f} MiB (with the cache pages it wrote)", flush=True)
    return a, b


def _view_as_jpeg(cache_dir: Path, count: int = 300) -> tuple[float, float]:
    """Mean bytes of ``count`` views encoded as JPEG 90, and their decode rate (img/s, one process)."""
    from detdiff.data.image_cache import ImageCache

    views = ImageCache.open(cache_dir).images
    rows = np.linspace(0, len(views) - 1, min(count, len(views))).astype(int)
    blobs = [cv2.imencode(".jpg", views[i], [cv2.IMWRITE_JPEG_QUALITY, 90])[1] for i in rows]
    start = time.perf_counter()
    for blob in blobs:
        cv2.imdecode(blob, cv2.IMREAD_COLOR)
    return float(np.mean([len(b) for b in blobs])), len(blobs) / (time.perf_counter() - start)


def audit_plan_check(ann: Path, images: Path, work: Path, epochs: int, image_size: int) -> None:
    """A whole audit of the set (default config but ``epochs`` detector epochs, one crop-model epoch): the plan's
    projected seconds per stage beside the measured ones."""
    from bench_validity import print_plan

    config = work / "audit.yaml"
    config.write_text("crossfit:\n  epochs: 1\n")
    rundir = work / "audit"
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "detdiff", "audit", str(ann), "--images", str(images), "--out",
                           str(rundir), "--config", str(config), "--epochs", str(epochs), "--image-size",
                           str(image_size), "--budget", str(AUDIT_BUDGET_MINUTES), "--quiet"], capture_output=True,
                          text=True)
    if done.returncode != 0:
        raise RuntimeError(f"audit failed:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}")
    run_info = json.loads((rundir / "run.json").read_text())
    recipe = json.loads((rundir / "recipe.json").read_text())["settings"]
    print(f"whole audit of the set ({epochs} detector epochs, 1 crop-model epoch, view {image_size} px, tiles "
          f"{recipe.get('data.tile_scale')}, cache {recipe.get('data.cache_codec')}): "
          f"{(time.perf_counter() - start) / 60:.1f} min; {run_info['images_per_second']:.1f} train img/s", flush=True)
    print_plan(run_info.get("plan_seconds") or {})


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, default=Path("bench_out/scale_data"), help="generated set (kept)")
    parser.add_argument("--work", type=Path, default=Path("bench_out/scale_work"), help="caches (removed at the end)")
    parser.add_argument("--num-images", type=int, default=10_000)
    parser.add_argument("--image-size", type=int, default=320)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--sample", type=int, default=1000, help="images decoded by both paths")
    parser.add_argument("--train-steps", type=int, default=12)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--keep", action="store_true", help="keep --work")
    parser.add_argument("--audit-epochs", type=int, default=0,
                        help="also run a whole audit of the set with this many detector epochs (0: none)")
    parser.add_argument("--phase", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.phase:
        print(json.dumps(PHASES[args.phase[0]](json.loads(args.phase[1]))))
        return 0
    from detdiff.data.coco import build_dataset, read_coco_json

    t_all = time.perf_counter()
    ann, images, gen_s, drawn = ensure_dataset(args.data, args.num_images, args.seed, args.workers)
    ds = build_dataset(read_coco_json(ann), images_dir=images)
    jpeg_bytes = sum((images / f).stat().st_size for f in ds.file_names)
    sides = np.minimum(ds.boxes[:, 2], ds.boxes[:, 3])
    print(f"set: {ds.num_images} JPEGs ({drawn} drawn now in {gen_s:.0f} s), {ds.num_annotations} boxes "
          f"({ds.num_annotations / ds.num_images:.2f} per image, {np.mean(sides < 8):.1%} under 8 px, "
          f"{np.mean(sides < 32):.1%} under 32 px), {jpeg_bytes / ds.num_images / 1e3:.0f} KB per JPEG; "
          f"view {args.image_size} px; {os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.1f}", flush=True)
    work = args.work
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    base = dict(ann=str(ann), images=str(images), size=args.image_size)
    rng = np.random.default_rng(1)
    big = np.flatnonzero(np.maximum(ds.widths, ds.heights) >= 4000)
    vga = np.flatnonzero((ds.widths == 640) & (ds.heights == 480))
    sample = np.sort(rng.choice(ds.num_images, min(args.sample, ds.num_images), replace=False))
    try:
        rates = {"sample": _decode_pair("a sample of the set", base, sample.tolist(), work, args.workers),
                 "4000": _decode_pair("its 4000 px stills", base, big[:120].tolist(), work, args.workers),
                 "vga": _decode_pair("its 640x480 frames", base, vga[:600].tolist(), work, args.workers)}
        ranks = [subprocess.Popen([sys.executable, __file__, "--phase", "decode", json.dumps(
            {**base, "rows": sample.tolist(), "reduced": True, "workers": 1, "cache": str(work / "c_shard"),
             "rank": k, "world": 2})], stdout=subprocess.PIPE, text=True,
            env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}) for k in range(2)]
        start = time.perf_counter()
        for proc in ranks:
            proc.communicate()
        shard_s = time.perf_counter() - start
        merge = run_phase("decode", **base, rows=sample.tolist(), reduced=True, merge=True, world=2,
                          cache=str(work / "c_shard"))
        print(f"torchrun path on the sample: 2 ranks x 1 process decode {shard_s:.1f} s + join {merge['seconds']:.1f} "
              f"s = {len(sample) / (shard_s + merge['seconds']):.1f} img/s against {rates['sample'][1]:.1f} img/s "
              f"for one process with 2 workers = {len(sample) / (shard_s + merge['seconds']) / rates['sample'][1]:.2f}x"
              f"; the join is {merge['seconds'] / (shard_s + merge['seconds']):.0%} of it", flush=True)
        shutil.rmtree(work / "c_shard")

        rundir = work / "run"
        whole = run_phase("decode", **base, rows=None, reduced=True, workers=args.workers, cache=str(rundir / "cache"))
        whole_rate = whole["images"] / whole["seconds"]
        with np.load(rundir / "cache" / "meta.npz") as meta:
            reduction = meta["reduction"]
        view_b = args.image_size ** 2 * 3
        crops_b = (rundir / "cache" / "crops.u8").stat().st_size / ds.num_images
        jpeg_view_b, jpeg_view_rate = _view_as_jpeg(rundir / "cache")
        coded = run_phase("decode", **base, rows=None, reduced=True, workers=args.workers, codec="jpeg",
                          cache=str(work / "c_jpeg"))
        coded_rate = coded["images"] / coded["seconds"]
        coded_b = {name: (work / "c_jpeg" / f"{name}.jpgrows").stat().st_size / ds.num_images
                   for name in ("images", "crops")}
        coded_all = sum(p.stat().st_size for p in (work / "c_jpeg").iterdir() if p.is_file()) / ds.num_images
        print(f"whole set, reduced path: {whole_rate:.1f} img/s ({whole['seconds']:.0f} s); reduction 1/2/4/8: "
              + "/".join(f"{np.mean(reduction == r):.1%}" for r in (1, 2, 4, 8))
              + f" of the images; peak RSS {whole['rss'] / 2**20:.0f} MiB main, {whole['children_rss'] / 2**20:.0f} "
              f"MiB a worker (mostly the memmap pages it wrote: file-backed, reclaimable)", flush=True)
        print(f"cache bytes per image at {args.image_size} px: view {view_b / 1e3:.0f} KB + crops {crops_b / 1e3:.0f} KB "
              f"= {(view_b + crops_b) / 1e3:.0f} KB = {(view_b + crops_b) / jpeg_bytes * ds.num_images:.1f}x the JPEG "
              f"files, {(view_b + crops_b) / 30e3:.1f}x the 30 KB goal; the view as JPEG 90 would be "
              f"{jpeg_view_b / 1e3:.1f} KB ({view_b / jpeg_view_b:.0f}x smaller), decoded at {jpeg_view_rate:.0f} "
              f"img/s by one process", flush=True)
        print(f"JPEG rows (data.cache_codec jpeg), whole set: decode + encode {coded_rate:.1f} img/s = "
              f"{coded_rate / whole_rate:.2f}x the raw build; {coded_all / 1e3:.1f} KB per image on disk (view "
              f"{coded_b['images'] / 1e3:.1f} KB + crops {coded_b['crops'] / 1e3:.1f} KB + meta) = "
              f"{(view_b + crops_b) / coded_all:.1f}x smaller than raw, {coded_all / 30e3:.2f}x the 30 KB goal",
              flush=True)

        train = run_phase("train", **base, rows=None, cache=str(rundir / "cache"), steps=args.train_steps, batch=16,
                          threads=args.workers, jpeg_cache=str(work / "c_jpeg"))
        warm, evicted, in_ram, coded_train = (train[k][0] for k in ("warm", "evicted", "in_ram", "jpeg"))
        print(f"train ({args.train_steps} steps of 16 at {args.image_size} px, {args.workers} threads): memmap warm "
              f"{warm:.1f} img/s (data {train['warm'][1]:.0%} of a step), memmap evicted {evicted:.1f} img/s = "
              f"{evicted / warm:.2f}x (data {train['evicted'][1]:.0%}), in RAM {in_ram:.1f} img/s = {in_ram / warm:.2f}x;"
              f" decode (reduced, {args.workers} processes) / train = {whole_rate / warm:.1f}; peak RSS "
              f"{train['rss'] / 2**20:.0f} MiB", flush=True)
        print(f"train from JPEG rows: {coded_train:.1f} img/s = {coded_train / warm:.2f}x the warm memmap (data "
              f"{train['jpeg'][1]:.0%} of a step); a crop-model step (crossfit.batch_size crops): raw {train['crop_raw'] * 1e3:.0f} "
              f"ms, JPEG {train['crop_jpeg'] * 1e3:.0f} ms = {train['crop_raw'] / train['crop_jpeg']:.2f}x the speed",
              flush=True)

        ana = run_phase("analysis", **base, rows=None, rundir=str(rundir))
        print(f"analysis on a 4-epoch log: analyze_run {ana['analyze_s']:.1f} s; tables CSV {ana['write_csv_s']:.1f} s, "
              f"CSV + Parquet {ana['write_both_s']:.1f} s = {ana['write_both_s'] / ana['write_csv_s']:.2f}x; report "
              f"{ana['report_s']:.1f} s = {ana['report_s'] / ana['analyze_s']:.2f}x analyze_run; peak RSS "
              f"{ana['rss'] / 2**20:.0f} MiB", flush=True)

        k = COCO_IMAGES / ds.num_images
        crops_118k = COCO_BOXES * (crops_b * ds.num_images / max(1, ds.num_annotations))
        print(f"projection to {COCO_IMAGES:,} images / {COCO_BOXES:,} boxes (linear in images, this machine): "
              f"decode + cache {COCO_IMAGES / whole_rate / 60:.0f} min reduced against "
              f"{COCO_IMAGES / rates['sample'][0] / 60:.0f} min full (sample rates); cache "
              f"{(view_b * COCO_IMAGES + crops_118k) / 1e9:.0f} GB ({view_b * COCO_IMAGES / 1e9:.0f} views + "
              f"{crops_118k / 1e9:.0f} crops), as JPEG rows {coded_all * COCO_IMAGES / 1e9:.1f} GB; one epoch "
              f"{COCO_IMAGES / warm / 60:.0f} min warm, {COCO_IMAGES / coded_train / 60:.0f} min from JPEG rows, "
              f"{COCO_IMAGES / evicted / 60:.0f} min evicted; analysis + tables + report about "
              f"{(ana['analyze_s'] + ana['write_both_s']) * k / 60 + ana['report_s'] / 60:.0f} min "
              f"(bench_analysis_scale.py measures 118k directly)", flush=True)
        if args.audit_epochs:
            audit_plan_check(ann, images, work, args.audit_epochs, args.image_size)
        print(f"goals: decode + cache of 640x480 JPEGs {rates['vga'][1]:.0f} img/s = {rates['vga'][1] / 300:.2f}x the "
              f"300 img/s goal (full decode {rates['vga'][0] / 300:.2f}x); total {time.perf_counter() - t_all:.0f} s")
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
