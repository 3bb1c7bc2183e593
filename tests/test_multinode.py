"""Several machines: the image cache decoded in shards (one per rank) and joined, and a whole audit run by two local
torchrun agents posing as two machines (``--nnodes 2``, c10d rendezvous on 127.0.0.1)."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from detdiff.config import load_saved_config
from detdiff.data.cache_shards import SHARDS_DIR, build_cache_shard, merge_cache_shards, shard_bounds
from detdiff.data.coco import build_dataset, load_saved_dataset, read_coco_json
from detdiff.data.image_cache import CROPS_FILE, ENCODED_FILES, IMAGES_FILE, TILES_FILE, build_image_cache, stored_names
from detdiff.data.scenarios import generate_demo
from detdiff.plan import tile_options
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLog
from fault_injection import DecodeInterrupt

CACHE_FILES = (IMAGES_FILE, CROPS_FILE, TILES_FILE, "problems.json", "fingerprint.json")


def _demo_with_a_broken_image(root: Path):
    """A small demo set plus one empty file near the end (an unusable image in the last shard)."""
    paths = generate_demo(root / "demo", num_images=24, seed=2, width=128, height=96, progress=False)
    coco = read_coco_json(paths.annotations)
    (paths.images_dir / "broken.jpg").write_bytes(b"")
    coco["images"].append({"id": 99999, "file_name": "broken.jpg", "width": 128, "height": 96})
    paths.annotations.write_text(json.dumps(coco))
    return paths


def _assert_same_cache(a: Path, b: Path) -> None:
    for name in (*CACHE_FILES, *ENCODED_FILES.values()):
        assert (a / name).is_file() == (b / name).is_file(), name
        if (a / name).is_file():
            assert (a / name).read_bytes() == (b / name).read_bytes(), name
    with np.load(a / "meta.npz") as x, np.load(b / "meta.npz") as y:
        assert sorted(x.files) == sorted(y.files)
        assert all(np.array_equal(x[k], y[k], equal_nan=x[k].dtype.kind == "f") for k in x.files)


def test_shards_joined_equal_the_cache_of_one_process(tmp_path):
    paths = _demo_with_a_broken_image(tmp_path)
    ds = build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)
    options = dict(max_pixels=10**8, with_crops=True, progress=False, workers=1,
                   tiles={"scale": 2.0, "min_object_px": 16})        # 128 px images in a 64 px view: tiles too
    single = build_image_cache(ds, tmp_path / "single", 64, **options)
    assert single.num_tiles > 0
    for rank in range(3):                                  # what three ranks do, one after the other
        build_cache_shard(ds, tmp_path / "joined", 64, rank, 3, **options)
    options.pop("progress"), options.pop("workers")
    joined = merge_cache_shards(ds, tmp_path / "joined", 64, 3, **options)
    _assert_same_cache(single.cache_dir, joined.cache_dir)
    assert not (tmp_path / "joined" / SHARDS_DIR).exists()
    assert [p["file_name"] for p in joined.problems] == ["broken.jpg"]
    assert joined.problems[0]["index"] == ds.file_names.index("broken.jpg")
    reused = build_image_cache(ds, tmp_path / "joined", 64, **options, workers=1, progress=False)
    assert reused.images.filename == joined.images.filename              # same fingerprint: reused as is


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _audit_args(paths, rundir: Path) -> list[str]:
    return ["-m", "detdiff", "audit", str(paths.annotations), "--images", str(paths.images_dir), "--out", str(rundir),
            "--config", "ci", "--epochs", "2", "--image-size", "64", "--threads", "1", "--device", "cpu",
            "--no-report", "--quiet"]


@pytest.mark.slow
def test_two_machines_give_the_results_of_one_machine_with_two_processes(tmp_path):
    paths = _demo_with_a_broken_image(tmp_path)
    env = {**os.environ, "GLOO_SOCKET_IFNAME": "lo", "PYTHONPATH": os.pathsep.join(sys.path)}
    torchrun = [sys.executable, "-m", "torch.distributed.run"]
    port = _free_port()
    # the README's multi-machine command, both "machines" on this one, every address loopback
    nodes = [subprocess.Popen(torchrun + ["--nnodes", "2", "--nproc_per_node", "1", "--rdzv_backend", "c10d",
                                          "--rdzv_endpoint", f"127.0.0.1:{port}", "--rdzv_id", "detdiff-test",
                                          "--local_addr", "127.0.0.1"] + _audit_args(paths, tmp_path / "nodes"),
                              env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
             for _ in range(2)]
    outputs = [node.communicate(timeout=600)[0] for node in nodes]
    assert all(node.returncode == 0 for node in nodes), "\n".join(o[-3000:] for o in outputs)
    one = subprocess.run(torchrun + ["--standalone", "--nproc_per_node", "2"] + _audit_args(paths, tmp_path / "one"),
                         env=env, capture_output=True, text=True, timeout=600)
    assert one.returncode == 0, one.stdout[-3000:] + one.stderr[-3000:]

    nodes_run, one_run = tmp_path / "nodes", tmp_path / "one"
    assert json.loads((nodes_run / "run.json").read_text())["world_size"] == 2
    _assert_same_cache(nodes_run / "cache", one_run / "cache")
    assert not (nodes_run / "cache" / SHARDS_DIR).exists()
    # and the cache is the one a single process builds (reference: build_image_cache in this process)
    config = load_saved_config(nodes_run / "config.yaml")
    single = build_image_cache(load_saved_dataset(nodes_run / "dataset.npz"), tmp_path / "single", 64,
                               max_pixels=int(config["data"]["max_pixels"]), with_crops=True, progress=False,
                               workers=1, tiles=tile_options(config))
    _assert_same_cache(nodes_run / "cache", single.cache_dir)
    a, b = LossLog.open(nodes_run / "log"), LossLog.open(one_run / "log")
    assert a.epochs == b.epochs == [0, 1]
    for name in IMAGE_FIELDS:
        assert np.array_equal(a.image_field(name), b.image_field(name), equal_nan=True), name
    for name in OBJECT_FIELDS:
        assert np.array_equal(a.object_field(name), b.object_field(name), equal_nan=True), name
    for table in ("images", "objects", "suspects", "classes", "causes"):
        pd.testing.assert_frame_equal(pd.read_csv(nodes_run / f"{table}.csv"), pd.read_csv(one_run / f"{table}.csv"))


@pytest.mark.parametrize("codec", ["raw", "jpeg"])
def test_a_killed_rank_goes_on_with_its_shard_and_the_join_equals_one_process(tmp_path, monkeypatch, codec):
    paths = _demo_with_a_broken_image(tmp_path)
    ds = build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)
    options = dict(max_pixels=10**8, with_crops=True, progress=False, workers=1, codec=codec,
                   tiles={"scale": 2.0, "min_object_px": 16})        # 128 px images in a 64 px view: tiles too
    single = build_image_cache(ds, tmp_path / "single", 64, **options)
    assert single.num_tiles > 0
    bounds = shard_bounds(ds, 2, 64)
    decode = DecodeInterrupt(monkeypatch, stop_after=4)
    with pytest.raises(KeyboardInterrupt):                 # rank 1 is killed part-way through its shard
        build_cache_shard(ds, tmp_path / "joined", 64, 1, 2, **options)
    shard = tmp_path / "joined" / SHARDS_DIR / "001-of-002"
    names = stored_names(codec)
    assert sorted(p.name for p in shard.iterdir()) == sorted(
        ["decode-progress.npz", *(names[kind] + ".partial" for kind in ("images", "crops", "tiles"))])
    decode.resume()
    build_cache_shard(ds, tmp_path / "joined", 64, 1, 2, **options)
    assert decode.calls == list(range(4, int(bounds[2] - bounds[1])))          # only the rest of its shard
    build_cache_shard(ds, tmp_path / "joined", 64, 0, 2, **options)
    options.pop("progress"), options.pop("workers")
    joined = merge_cache_shards(ds, tmp_path / "joined", 64, 2, **options)
    _assert_same_cache(single.cache_dir, joined.cache_dir)


def test_temporary_files_of_a_killed_join_or_shard_build_are_leftovers(tmp_path):
    from detdiff.leftovers import find_leftovers, remove_leftovers

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    temp = [f"cache/images.u8.tmp-{dead.pid}", f"cache/crops.u8.tmp-{dead.pid}",
            f"cache/shards/000-of-002/meta.tmp-{dead.pid}.npz",
            f"cache/shards/001-of-002/decode-progress.tmp-{dead.pid}.npz",
            f"cache/shards/001-of-002/fingerprint.json.tmp-{dead.pid}",
            f"cache/shards/001-of-002/.write-probe-{dead.pid}"]
    keep = ["cache/shards/000-of-002/images.u8.partial", "cache/shards/000-of-002/decode-progress.npz",
            "cache/shards/001-of-002/images.u8", "cache/shards/001-of-002/fingerprint.json",
            f"cache/shards/notashard/meta.tmp-{dead.pid}.npz"]
    for rel in temp + keep:
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_bytes(b"x" * 100)
    assert [p.relative_to(tmp_path).as_posix() for p in find_leftovers(tmp_path)] == sorted(temp)
    assert remove_leftovers(tmp_path)[0] == len(temp)
    assert all((tmp_path / rel).exists() for rel in keep)
