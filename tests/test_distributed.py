"""torchrun scale-out on CPU (gloo): two processes share each epoch and the merged log holds every image once."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.scenarios import generate_demo
from detdiff.data.image_cache import build_image_cache
from detdiff.train import distributed as ddp
from detdiff.train.checkpoint import load_checkpoint
from detdiff.train.loss_log import LossLog

EPOCHS = 2

CHILD = textwrap.dedent("""
    import json, os, pathlib, sys
    from detdiff.config import load_config
    from detdiff.data.coco import build_dataset, read_coco_json
    from detdiff.data.image_cache import ImageCache
    from detdiff.train import distributed as ddp
    from detdiff.train.loop import train_and_log

    def main():
        ann, images, cache_dir, rundir, epochs = sys.argv[1:6]
        config = load_config("ci", {"data": {"image_size": 64}, "train": {"epochs": int(epochs), "batch_size": 8,
                                                                          "threads": 1, "device": "cpu"}})
        dataset = build_dataset(read_coco_json(ann), images_dir=images)
        result = train_and_log(dataset, ImageCache.open(cache_dir), config, rundir, progress=False)
        report = {"world_size": result.world_size, "images_per_second": result.images_per_second}
        pathlib.Path(rundir, f"report.rank{os.environ['RANK']}.json").write_text(json.dumps(report))
        ddp.shutdown()

    if __name__ == "__main__":
        main()
""")


def test_rank_batches_partition_every_epoch_with_equal_step_counts():
    for num in (2, 3, 17, 24, 25, 64):
        for world in (1, 2, 3):
            if num < world:
                continue
            order = ddp.epoch_order(np.arange(100, 100 + num), seed=0, epoch=3)
            batches = [ddp.rank_batches(order, 8, r, world) for r in range(world)]
            assert len({len(b) for b in batches}) == 1                       # same number of DDP steps
            assert len(batches[0]) == ddp.steps_per_epoch(num, 8, world)
            flat = np.concatenate([np.concatenate(b) for b in batches])
            assert np.array_equal(np.sort(flat), np.arange(100, 100 + num))  # every image exactly once
    assert np.array_equal(ddp.epoch_order(np.arange(10), 0, 1), ddp.epoch_order(np.arange(10), 0, 1))
    assert not np.array_equal(ddp.epoch_order(np.arange(10), 0, 1), ddp.epoch_order(np.arange(10), 0, 2))
    with pytest.raises(ValueError, match="fewer processes"):
        ddp.rank_batches(np.arange(1), 8, 0, 2)


def test_single_process_needs_no_process_group(monkeypatch):
    for name in ("RANK", "WORLD_SIZE", "LOCAL_RANK"):
        monkeypatch.delenv(name, raising=False)
    info = ddp.init_distributed("cpu")
    assert (info.rank, info.world_size, info.is_main, info.distributed) == (0, 1, True, False)
    ddp.barrier()


def test_two_cpu_processes_with_torchrun_merge_one_log(tmp_path):
    paths = generate_demo(tmp_path / "demo", num_images=25, seed=2, width=128, height=96, progress=False)
    coco = read_coco_json(paths.annotations)
    (paths.images_dir / "broken.jpg").write_bytes(b"")
    coco["images"].append({"id": 88888, "file_name": "broken.jpg", "width": 128, "height": 96})
    paths.annotations.write_text(json.dumps(coco))
    dataset = build_dataset(coco, images_dir=paths.images_dir)
    cache = build_image_cache(dataset, tmp_path / "cache", 64, max_pixels=10**8, progress=False, workers=1)
    (tmp_path / "child.py").write_text(CHILD)
    run = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2",
                           str(tmp_path / "child.py"), str(paths.annotations), str(paths.images_dir),
                           str(tmp_path / "cache"), str(run), str(EPOCHS)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    reports = [json.loads(p.read_text()) for p in sorted(run.glob("report.rank*.json"))]  # one file per rank
    assert len(reports) == 2 and all(r["world_size"] == 2 for r in reports)

    log = LossLog.open(run / "log")
    assert log.epochs == list(range(EPOCHS))
    assert not [p for p in (run / "log").iterdir() if ".rank" in p.name or ".tmp" in p.name]
    covered = log.covered()                                       # [E, I]
    usable = cache.usable
    assert usable.sum() == 25 and not usable[dataset.image_ids.tolist().index(88888)]
    # at least once: covered; at most once: merge_rank_epochs refuses an image trained by two ranks
    assert (covered == usable[None, :]).all()
    assert np.isfinite(log.image_field("loc_sum")[:, usable]).all()
    assert (log.image_field("num_pos")[:, usable] >= 0).all()
    assert (log.object_field("num_anchors") >= 0).all()           # every object of a usable image logged
    assert load_checkpoint(run / "checkpoint.pt")["epoch"] == EPOCHS - 1
