"""The training log: epochs commit atomically, rank shards merge, the views of an image add up."""

from __future__ import annotations

import numpy as np
import pytest

from detdiff.train.loss_log import (IMAGE_FIELDS, OBJECT_FIELDS, LossLog, LossLogWriter, discard_epochs_after,
                                    finished_epochs, merge_rank_epochs)


def _batch(image_index: np.ndarray, object_index: np.ndarray, value: float):
    image = {k: np.full(len(image_index), value, dtype=dt) for k, (dt, shape, _) in IMAGE_FIELDS.items()}
    objects = {k: np.full((len(object_index), *shape), value, dtype=dt)
               for k, (dt, shape, _) in OBJECT_FIELDS.items()}
    unmatched = {"image_index": image_index.astype(np.int64), "box": np.ones((len(image_index), 4), np.float32),
                 "score": np.full(len(image_index), 0.9, np.float32), "label": np.zeros(len(image_index), np.int32)}
    return image, objects, unmatched


def test_epoch_is_invisible_until_finalized(tmp_path) -> None:
    w = LossLogWriter(tmp_path, num_images=4, num_objects=6)
    w.reset(0)
    image, objects, unmatched = _batch(np.array([0, 2]), np.array([1, 5]), 2.0)
    w.process(np.array([0, 2]), image, np.array([1, 5]), objects, unmatched)
    assert finished_epochs(tmp_path) == []          # only a .tmp folder exists so far
    w.finalize()
    assert finished_epochs(tmp_path) == [0]
    log = LossLog.open(tmp_path)
    loc = log.image_field("loc_sum")
    assert loc.shape == (1, 4)
    assert loc[0, 0] == 2.0 and np.isnan(loc[0, 1])
    assert log.object_field("pred_box").shape == (1, 6, 4)
    assert len(log.unmatched(0)["score"]) == 2
    assert log.covered()[0].tolist() == [True, False, True, False]


def test_discard_after_resume_point(tmp_path) -> None:
    w = LossLogWriter(tmp_path, 2, 2)
    for e in range(3):
        w.reset(e)
        w.finalize()
    (tmp_path / "epoch_0003.tmp-1").mkdir()
    discard_epochs_after(tmp_path, 1)
    assert finished_epochs(tmp_path) == [0, 1]
    assert not (tmp_path / "epoch_0003.tmp-1").exists()


def test_rank_merge_covers_each_image_once(tmp_path) -> None:
    shards = [np.array([0, 3]), np.array([1, 2])]
    obj_of_image = np.array([0, 1, 2, 2])       # object j belongs to image obj_of_image[j]
    for rank, imgs in enumerate(shards):
        w = LossLogWriter(tmp_path, 4, 4, rank=rank)
        w.reset(0)
        objs = np.flatnonzero(np.isin(obj_of_image, imgs))
        image, objects, unmatched = _batch(imgs, objs, float(rank + 1))
        w.process(imgs, image, objs, objects, unmatched)
        w.finalize()
    merge_rank_epochs(tmp_path, 0, world_size=2)
    log = LossLog.open(tmp_path)
    assert log.covered()[0].all()
    assert log.image_field("loc_sum")[0].tolist() == [1.0, 2.0, 2.0, 1.0]
    assert log.object_field("cls_sum")[0].tolist() == [1.0, 2.0, 2.0, 2.0]
    assert len(log.unmatched(0)["score"]) == 4


def test_views_of_one_image_add_up_within_a_batch_across_batches_and_across_ranks(tmp_path) -> None:
    # An image with tiles is trained in several views (detdiff.data.views): its image fields are their sums, whether
    # the views share a batch, come in later batches, or went to other ranks; images not trained stay unfilled.
    for rank, views in enumerate([[np.array([0, 0]), np.array([0])], [np.array([0, 1])]]):
        w = LossLogWriter(tmp_path, 3, 0, rank=rank)
        w.reset(0)
        for imgs in views:
            image, objects, unmatched = _batch(imgs, np.array([], dtype=int), float(rank + 1))
            w.process(imgs, image, np.array([], dtype=int), objects, unmatched)
        w.finalize()
    merge_rank_epochs(tmp_path, 0, world_size=2)
    log = LossLog.open(tmp_path)
    loc = log.image_field("loc_sum")[0]
    assert loc[:2].tolist() == [3 * 1.0 + 2.0, 2.0] and np.isnan(loc[2])
    assert log.image_field("num_pos")[0].tolist() == [5, 2, -1]
    assert log.covered()[0].tolist() == [True, True, False]


def test_field_missing_from_an_older_log_is_named(tmp_path) -> None:
    w = LossLogWriter(tmp_path, num_images=2, num_objects=2)
    for epoch in (0, 1):
        w.reset(epoch)
        image, objects, unmatched = _batch(np.array([0, 1]), np.array([0, 1]), 1.0)
        w.process(np.array([0, 1]), image, np.array([0, 1]), objects, unmatched)
        w.finalize()
    (tmp_path / "epoch_0001" / "object.loc_kept.npy").unlink()     # as a log written before the field existed
    log = LossLog.open(tmp_path)
    with pytest.raises(FileNotFoundError, match=r"epoch_0001.*object\.loc_kept.*run the audit again"):
        log.object_field("loc_kept")
    assert log.object_field("loc_sum").shape == (2, 2)              # the other fields still read
