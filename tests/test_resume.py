"""Kill a training run mid-epoch, resume it, and get the log of an uninterrupted run, field for field."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from detdiff.config import ConfigError, load_config, save_config
from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.scenarios import generate_demo
from detdiff.data.image_cache import ImageCache, build_image_cache
from detdiff.train import hooks, loop
from detdiff.train.checkpoint import load_checkpoint
from detdiff.train.loss_log import IMAGE_FIELDS, OBJECT_FIELDS, LossLog, finished_epochs
from detdiff.train.loop import train_and_log

EPOCHS = 4

CHILD = textwrap.dedent("""
    import sys, time
    import yaml
    from detdiff.data.coco import build_dataset, read_coco_json
    from detdiff.data.image_cache import ImageCache
    from detdiff.train import loop

    def main():
        ann, images, cache_dir, config_path, rundir = sys.argv[1:6]
        real = loop.compute_loss_streams

        def slow(*args, **kwargs):          # same values, slower steps: the parent can kill inside an epoch
            time.sleep(0.15)
            return real(*args, **kwargs)

        loop.compute_loss_streams = slow
        dataset = build_dataset(read_coco_json(ann), images_dir=images)
        config = yaml.safe_load(open(config_path))
        loop.train_and_log(dataset, ImageCache.open(cache_dir), config, rundir, progress=False)

    if __name__ == "__main__":
        main()
""")


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("resume")
    paths = generate_demo(root / "demo", num_images=24, seed=5, width=128, height=96, progress=False)
    dataset = build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)
    build_image_cache(dataset, root / "cache", 64, max_pixels=10**8, progress=False, workers=1)
    config = load_config("ci", {"data": {"image_size": 64},
                                "train": {"epochs": EPOCHS, "batch_size": 8, "threads": 1, "device": "cpu"}})
    reference = root / "reference"
    train_and_log(dataset, ImageCache.open(root / "cache"), config, reference, progress=False)
    return paths, dataset, config, root, reference


def _assert_same_log(run, reference):
    a, b = LossLog.open(run / "log"), LossLog.open(reference / "log")
    assert a.epochs == b.epochs == list(range(EPOCHS))
    for name in IMAGE_FIELDS:
        assert np.array_equal(a.image_field(name), b.image_field(name), equal_nan=True), f"image.{name}"
    for name in OBJECT_FIELDS:
        assert np.array_equal(a.object_field(name), b.object_field(name), equal_nan=True), f"object.{name}"
    assert np.array_equal(a.covered(), b.covered())
    for e in a.epochs:
        ua, ub = a.unmatched(e), b.unmatched(e)
        for name in ua:
            assert np.array_equal(ua[name], ub[name], equal_nan=True), f"unmatched.{name} epoch {e}"
    assert not [p for p in (run / "log").iterdir() if ".tmp" in p.name or ".rank" in p.name]


def test_sigkill_during_an_epoch_then_resume_equals_uninterrupted_run(setup, tmp_path):
    paths, dataset, config, root, reference = setup
    (tmp_path / "child.py").write_text(CHILD)
    save_config(config, tmp_path / "config.yaml")
    run = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, str(tmp_path / "child.py"), str(paths.annotations),
                             str(paths.images_dir), str(root / "cache"), str(tmp_path / "config.yaml"), str(run)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    log_dir, killed_with_tmp = run / "log", []
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            done = finished_epochs(log_dir)
            tmp = [p.name for p in log_dir.glob("epoch_*.tmp-*")] if log_dir.is_dir() else []
            if done and (run / "checkpoint.pt").is_file() and tmp and max(done) < EPOCHS - 1:
                os.kill(proc.pid, signal.SIGKILL)
                killed_with_tmp = tmp
                break
            time.sleep(0.01)
    finally:
        if proc.poll() is None and not killed_with_tmp:
            proc.kill()
        output = proc.communicate(timeout=30)[0].decode(errors="replace")
    assert killed_with_tmp, f"the child finished or failed before it could be killed mid-epoch:\n{output}"
    assert proc.returncode == -signal.SIGKILL

    # a killed epoch leaves its temporary folder behind; it is never read as an epoch
    done = finished_epochs(log_dir)
    assert (log_dir / killed_with_tmp[0]).is_dir() or len(done) > 1
    assert LossLog.open(log_dir).epochs == done and all(".tmp" not in str(e) for e in done)
    checkpoint_epoch = load_checkpoint(run / "checkpoint.pt")["epoch"]
    assert checkpoint_epoch in (max(done), max(done) - 1) and checkpoint_epoch < EPOCHS - 1

    result = train_and_log(dataset, ImageCache.open(root / "cache"), config, run, resume=True, progress=False)
    assert result.resumed_from == checkpoint_epoch
    _assert_same_log(run, reference)


def test_log_ahead_of_checkpoint_is_redone_on_resume(setup, tmp_path, monkeypatch):
    """A stop between an epoch's log rename and its checkpoint: the log epoch is discarded and redone."""
    paths, dataset, config, root, reference = setup
    real_save = hooks.save_checkpoint

    def stop_at_epoch_one(path, **kwargs):
        if kwargs["epoch"] == 1:
            raise KeyboardInterrupt
        return real_save(path, **kwargs)

    monkeypatch.setattr(hooks, "save_checkpoint", stop_at_epoch_one)
    with pytest.raises(KeyboardInterrupt):
        train_and_log(dataset, ImageCache.open(root / "cache"), config, tmp_path, progress=False)
    monkeypatch.setattr(hooks, "save_checkpoint", real_save)
    assert finished_epochs(tmp_path / "log") == [0, 1]
    assert load_checkpoint(tmp_path / "checkpoint.pt")["epoch"] == 0
    result = train_and_log(dataset, ImageCache.open(root / "cache"), config, tmp_path, resume=True, progress=False)
    assert result.resumed_from == 0
    _assert_same_log(tmp_path, reference)


def test_resume_with_a_changed_config_is_refused(setup, tmp_path):
    paths, dataset, config, root, reference = setup
    short = load_config("ci", {"data": {"image_size": 64},
                               "train": {"epochs": 1, "batch_size": 8, "threads": 1, "device": "cpu"}})
    train_and_log(dataset, ImageCache.open(root / "cache"), short, tmp_path, progress=False)
    changed = load_config("ci", {"data": {"image_size": 64},
                                 "train": {"epochs": 1, "batch_size": 8, "threads": 1, "lr": 0.01}})
    with pytest.raises(ConfigError, match="train.lr"):         # the CLI prints a ConfigError as one line
        train_and_log(dataset, ImageCache.open(root / "cache"), changed, tmp_path, resume=True, progress=False)
    # cross-fit settings act after training (its folds carry their own key): a run resumes across them
    later = load_config("ci", {"data": {"image_size": 64}, "crossfit": {"places_per_image": 4},
                               "train": {"epochs": 1, "batch_size": 8, "threads": 1, "device": "cpu"}})
    assert train_and_log(dataset, ImageCache.open(root / "cache"), later, tmp_path, resume=True,
                         progress=False).resumed_from == 0       # epoch 0, the only one, was finished
