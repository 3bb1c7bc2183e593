"""The training log: three loss streams per image and per object, every epoch, on disk.

Layout (one folder per finished epoch, each field one ``.npy`` file, rows in dataset order)::

    RUNDIR/log/epoch_0003/
        image.<field>.npy     [I]      or [I, ...]   rows = CocoDataset image index (sums over the image's views)
        object.<field>.npy    [A]      or [A, 4]     rows = CocoDataset annotation index
        unmatched.<field>.npy [U]      or [U, 4]     confident detections that match no annotation
        covered.npy           bool [I] images that were trained on in this epoch

An epoch is written into ``epoch_0003.tmp-<pid>/`` through memory maps (so the writer holds no copy of the
arrays in RAM), then renamed to ``epoch_0003/`` in one step: a folder without the ``.tmp`` suffix is always
complete. With several processes each rank writes ``epoch_0003.rank<k>/`` and rank 0 merges them (adding up the
image fields of an image whose views were trained by several ranks). Each
memory-mapped file has its disk blocks reserved as it is created, so a full disk raises ENOSPC there
instead of SIGBUS when a page is first written.

Stream normalisation: every ``*_sum`` field is a raw sum over anchors; ``image.num_pos`` and
``object.num_anchors`` are the counts. The training objective of an image is
``(loc_sum + pos_sum + neg_sum) / max(1, num_pos)`` (per image, never by batch history), and the
per-object sums of an image without tiles add up to its ``loc_sum`` / ``pos_sum`` exactly. An image with tiles
(``detdiff.data.views``) gets the sums over all its views, and each object's fields come from its owner view only. ``object.loc_kept`` /
``object.cls_kept`` are the losses of one anchor per object, the one whose box is ``pred_box``.
"""

from __future__ import annotations

import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from detdiff.atomic import reserve

#: name -> (dtype, trailing shape, fill value for rows not seen this epoch)
IMAGE_FIELDS: dict[str, tuple[str, tuple[int, ...], float]] = {
    "loc_sum": ("float32", (), np.nan),   # smooth L1 over positive anchors (box regression stream)
    "pos_sum": ("float32", (), np.nan),   # classification loss over positive anchors (positive-class stream)
    "neg_sum": ("float32", (), np.nan),   # classification loss over background anchors (background-class stream)
    "num_pos": ("int32", (), -1),         # positive anchors in the image
}
OBJECT_FIELDS: dict[str, tuple[str, tuple[int, ...], float]] = {
    "loc_sum": ("float32", (), np.nan),       # smooth L1 of the anchors matched to this object
    "cls_sum": ("float32", (), np.nan),       # classification loss of the anchors matched to this object
    "num_anchors": ("int32", (), -1),         # anchors matched to this object
    "loc_kept": ("float32", (), np.nan),      # smooth L1 at the kept anchor (the matched one of top class score)
    "cls_kept": ("float32", (), np.nan),      # classification loss at the kept anchor
    "logit_label": ("float32", (), np.nan),   # mean over matched anchors of the labelled-class logit
    "logit_other": ("float32", (), np.nan),   # largest other-class mean logit
    "other_label": ("int32", (), -1),         # category index of that strongest other class
    "pred_box": ("float32", (4,), np.nan),    # kept anchor's decoded box, xywh original px
    "pred_iou": ("float32", (), np.nan),      # IoU of pred_box with the annotated box
    "pred_label": ("int32", (), -1),          # class of the kept anchor's top score
    "pred_score": ("float32", (), np.nan),    # that score (sigmoid probability)
    "detected": ("bool", (), False),          # pred_label == label, pred_iou >= detect_iou, score >= detect_score
}
UNMATCHED_FIELDS: dict[str, tuple[str, tuple[int, ...], float]] = {
    "image_index": ("int64", (), -1),
    "box": ("float32", (4,), np.nan),         # xywh original px
    "score": ("float32", (), np.nan),
    "label": ("int32", (), -1),
}

_EPOCH_DIR = re.compile(r"^epoch_(\d{4})$")


def epoch_dir(log_dir: Path, epoch: int, rank: int | None = None) -> Path:
    suffix = "" if rank is None else f".rank{rank}"
    return Path(log_dir) / f"epoch_{epoch:04d}{suffix}"


def finished_epochs(log_dir: str | Path) -> list[int]:
    """Epoch numbers whose folders are complete (renamed from their temporary name), ascending."""
    log_dir = Path(log_dir)
    if not log_dir.is_dir():
        return []
    found = [int(m.group(1)) for p in log_dir.iterdir() if p.is_dir() and (m := _EPOCH_DIR.match(p.name))]
    return sorted(found)


def discard_epochs_after(log_dir: str | Path, epoch: int) -> None:
    """Remove epoch folders later than ``epoch`` and every temporary folder (used when resuming)."""
    log_dir = Path(log_dir)
    if not log_dir.is_dir():
        return
    for p in log_dir.iterdir():
        m = _EPOCH_DIR.match(p.name)
        if ".tmp" in p.name or ".rank" in p.name or (m and int(m.group(1)) > epoch):
            shutil.rmtree(p, ignore_errors=True)


class LossLogWriter:
    """Collects one epoch of per-image / per-object records and commits them atomically.

    Three verbs: :meth:`reset` (open a new epoch), :meth:`process` (record one batch), :meth:`finalize`
    (rename the epoch folder into place). Usable without a model, which is how it is tested.
    """

    def __init__(self, log_dir: str | Path, num_images: int, num_objects: int, *, rank: int | None = None,
                 unmatched_capacity: int | None = None) -> None:
        self.log_dir = Path(log_dir)
        self.num_images = num_images
        self.num_objects = num_objects
        self.rank = rank
        self.unmatched_capacity = unmatched_capacity if unmatched_capacity is not None else 3 * num_images
        self.epoch: int | None = None
        self._tmp: Path | None = None
        self._arrays: dict[str, np.memmap] = {}
        self._num_unmatched = 0

    def _open(self, prefix: str, fields: dict, rows: int) -> None:
        for name, (dtype, shape, fill) in fields.items():
            path = self._tmp / f"{prefix}.{name}.npy"
            arr = np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=(rows, *shape))
            reserve(path)
            arr[...] = fill
            self._arrays[f"{prefix}.{name}"] = arr

    def reset(self, epoch: int) -> None:
        """Start recording ``epoch`` into a fresh temporary folder."""
        self.log_dir.mkdir(parents=True, exist_ok=True)
        self.epoch = epoch
        self._tmp = Path(str(epoch_dir(self.log_dir, epoch, self.rank)) + f".tmp-{os.getpid()}")
        shutil.rmtree(self._tmp, ignore_errors=True)
        self._tmp.mkdir(parents=True)
        self._arrays = {}
        self._num_unmatched = 0
        self._open("image", IMAGE_FIELDS, self.num_images)
        self._open("object", OBJECT_FIELDS, self.num_objects)
        self._open("unmatched", UNMATCHED_FIELDS, self.unmatched_capacity)
        cov = np.lib.format.open_memmap(self._tmp / "covered.npy", mode="w+", dtype=bool, shape=(self.num_images,))
        reserve(self._tmp / "covered.npy")
        cov[...] = False
        self._arrays["covered"] = cov

    def process(self, image_index: np.ndarray, image: dict[str, np.ndarray], object_index: np.ndarray,
                objects: dict[str, np.ndarray], unmatched: dict[str, np.ndarray] | None = None) -> None:
        """Record one batch: ``image[field][k]`` belongs to dataset image ``image_index[k]``, likewise objects.

        An image seen in several views (its whole view and tiles, in this batch or another) gets the sum of their
        image fields. ``unmatched`` rows carry their dataset ``image_index`` as a field.
        """
        if self._tmp is None:
            raise RuntimeError("LossLogWriter.process called before reset(epoch)")
        covered = self._arrays["covered"]
        seen, inverse = np.unique(np.asarray(image_index, np.int64), return_inverse=True)
        before = np.asarray(covered[seen])
        for name in IMAGE_FIELDS:
            arr = self._arrays[f"image.{name}"]
            total = np.zeros(len(seen), dtype=arr.dtype)
            np.add.at(total, inverse, np.asarray(image[name], dtype=arr.dtype))
            arr[seen] = np.where(before, arr[seen], 0) + total
        covered[seen] = True
        if len(object_index):
            for name in OBJECT_FIELDS:
                self._arrays[f"object.{name}"][object_index] = objects[name]
        if unmatched is not None and len(unmatched["image_index"]):
            n = len(unmatched["image_index"])
            room = self.unmatched_capacity - self._num_unmatched
            n = min(n, room)
            sl = slice(self._num_unmatched, self._num_unmatched + n)
            for name in UNMATCHED_FIELDS:
                self._arrays[f"unmatched.{name}"][sl] = unmatched[name][:n]
            self._num_unmatched += n

    def finalize(self) -> Path:
        """Flush and rename the epoch folder into place; returns the final folder."""
        if self._tmp is None or self.epoch is None:
            raise RuntimeError("LossLogWriter.finalize called before reset(epoch)")
        for arr in self._arrays.values():
            arr.flush()
        np.save(self._tmp / "num_unmatched.npy", np.array(self._num_unmatched, dtype=np.int64))
        self._arrays = {}
        final = epoch_dir(self.log_dir, self.epoch, self.rank)
        shutil.rmtree(final, ignore_errors=True)
        os.replace(self._tmp, final)
        self._tmp = None
        return final


def merge_rank_epochs(log_dir: str | Path, epoch: int, world_size: int) -> Path:
    """Merge ``epoch_XXXX.rank<k>/`` folders into one ``epoch_XXXX/`` (each image exactly once)."""
    log_dir = Path(log_dir)
    parts = [epoch_dir(log_dir, epoch, r) for r in range(world_size)]
    tmp = Path(str(epoch_dir(log_dir, epoch)) + f".tmp-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    covers = [np.load(p / "covered.npy") for p in parts]
    obj_owner = None
    for prefix, fields in (("image", IMAGE_FIELDS), ("object", OBJECT_FIELDS)):
        for name in fields:
            stacked = [np.load(p / f"{prefix}.{name}.npy", mmap_mode="r") for p in parts]
            out = np.array(stacked[0])
            for k, arr in enumerate(stacked[1:], start=1):
                if prefix == "image":               # views of one image may have gone to several ranks: add up
                    rows = covers[k]
                    both = rows & np.any(covers[:k], axis=0)
                    out[both] += arr[both]
                    rows = rows & ~both
                else:
                    if obj_owner is None:
                        obj_owner = [np.load(p / "object.num_anchors.npy") >= 0 for p in parts]
                    rows = obj_owner[k]
                out[rows] = arr[rows]
            np.save(tmp / f"{prefix}.{name}.npy", out)
    counts = [int(np.load(p / "num_unmatched.npy")) for p in parts]
    for name in UNMATCHED_FIELDS:
        np.save(tmp / f"unmatched.{name}.npy",
                np.concatenate([np.load(p / f"unmatched.{name}.npy")[:n] for p, n in zip(parts, counts)]))
    np.save(tmp / "covered.npy", np.any(covers, axis=0))
    np.save(tmp / "num_unmatched.npy", np.array(sum(counts), dtype=np.int64))
    final = epoch_dir(log_dir, epoch)
    shutil.rmtree(final, ignore_errors=True)
    os.replace(tmp, final)
    for p in parts:
        shutil.rmtree(p, ignore_errors=True)
    return final


@dataclass
class LossLog:
    """Read side of the log. Fields are stacked over epochs on demand: ``[E, rows, ...]``."""

    log_dir: Path
    epochs: list[int]

    @classmethod
    def open(cls, log_dir: str | Path) -> LossLog:
        log_dir = Path(log_dir)
        epochs = finished_epochs(log_dir)
        if not epochs:
            raise FileNotFoundError(f"{log_dir}: no finished epoch in the training log")
        return cls(log_dir, epochs)

    @property
    def num_epochs(self) -> int:
        return len(self.epochs)

    def _stack(self, key: str) -> np.ndarray:
        paths = [epoch_dir(self.log_dir, e) / f"{key}.npy" for e in self.epochs]
        for path in paths:
            if not path.is_file():
                raise FileNotFoundError(f"{path}: field {key!r} is missing from the training log (written by an "
                                        "older detdiff?); run the audit again into a new run folder")
        return np.stack([np.load(path, mmap_mode="r") for path in paths])

    def image_field(self, name: str) -> np.ndarray:
        """``image.<name>`` stacked over epochs: ``[E, I]``."""
        return self._stack(f"image.{name}")

    def object_field(self, name: str) -> np.ndarray:
        """``object.<name>`` stacked over epochs: ``[E, A]`` (``[E, A, 4]`` for boxes)."""
        return self._stack(f"object.{name}")

    def covered(self) -> np.ndarray:
        return self._stack("covered")

    def unmatched(self, epoch: int) -> dict[str, np.ndarray]:
        """Confident unmatched detections of one epoch, each field ``[U]`` (``[U, 4]`` for boxes)."""
        d = epoch_dir(self.log_dir, epoch)
        n = int(np.load(d / "num_unmatched.npy"))
        return {name: np.load(d / f"unmatched.{name}.npy")[:n] for name in UNMATCHED_FIELDS}
