"""Build the image cache with several processes, on one machine or several: each rank decodes its share.

Launched by torchrun, every rank decodes a contiguous share of the dataset's images (:func:`shard_bounds`) into its
own shard folder ``cache/shards/<rank>-of-<world>/``, a complete cache of those images made by the resumable
:func:`detdiff.data.image_cache.build_image_cache` (so a killed rank reuses its finished shard, and goes on with an
unfinished one where it stopped), and flushes it to disk. The main rank then joins the shards into ``cache/``
(:func:`merge_cache_shards`): the files are byte for byte those a single process writes (rows are contiguous:
images, then their annotations' crops).

The run folder must be on a filesystem that every machine mounts at the same path (NFS, Lustre, a cloud
file share), and so must the images. Each rank writes only its own files and the main rank reads them after
a barrier, once they were fsync'ed: the close-to-open consistency NFS gives. Ranks never write into one shared
file, because two machines writing memory-mapped pages of one NFS file can overwrite each other's neighbouring
bytes. Joining copies the other ranks' shards once, shard by shard, each deleted once appended, so the disk
holds at most the cache plus its largest shard. The joined maps are written as ``images.u8.tmp-<pid>`` /
``crops.u8.tmp-<pid>`` (listed in :mod:`detdiff.leftovers`) and renamed into place with the fingerprint last; a
join killed half-way has already deleted some shards' maps, so the next run decodes those shards again.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np

from detdiff.crossfit.crops import CROPS_FILE, crop_bytes
from detdiff.data.coco import CocoDataset
from detdiff.data.image_cache import (ENCODED_FILES, FINGERPRINT_FILE, IMAGES_FILE, META_FILE, PROBLEMS_FILE,
                                      TILES_FILE, ImageCache, _clear_for_build, _fingerprint, _publish, _tile_options,
                                      build_image_cache, cache_bytes, draft_reductions, encoded_meta, stored_names,
                                      tile_meta)
from detdiff.data.views import plan_tiles

SHARDS_DIR = "shards"
#: Decode work of one image besides decoding its pixels (crops, view, descriptors, writing), in decoded pixels.
FIXED_PIXELS = 300_000
COPY_CHUNK = 64 << 20


def decode_work(dataset: CocoDataset, image_size: int, reduced_decode: bool) -> np.ndarray:
    """Estimated decode work per image (float64 ``[I]``): the pixels decoded (fewer for a JPEG that will be decoded
    reduced, :func:`draft_reductions`, judged from its name) plus :data:`FIXED_PIXELS`."""
    pixels = dataset.widths.astype(np.float64) * dataset.heights
    if reduced_decode:
        smallest = np.full(dataset.num_images, np.inf)
        np.minimum.at(smallest, dataset.ann_image_index, dataset.boxes[:, 2:].min(axis=1))
        jpeg = np.array([name.lower().endswith((".jpg", ".jpeg")) for name in dataset.file_names], dtype=bool)
        reduction = np.where(jpeg, draft_reductions(dataset.widths, dataset.heights, smallest, image_size), 1)
        pixels = pixels / reduction.astype(np.float64) ** 2
    return pixels + FIXED_PIXELS


def shard_bounds(dataset: CocoDataset, world_size: int, image_size: int, reduced_decode: bool = True) -> np.ndarray:
    """``int64 [world_size + 1]``: rank ``k`` decodes image rows ``bounds[k]:bounds[k + 1]``, contiguous shares of
    about equal :func:`decode_work`."""
    work = np.cumsum(decode_work(dataset, image_size, reduced_decode))
    total = work[-1] if len(work) else 0.0
    cuts = np.searchsorted(work, total * np.arange(1, world_size) / world_size, side="left") + 1
    return np.concatenate([[0], np.minimum(cuts, dataset.num_images), [dataset.num_images]]).astype(np.int64)


def shard_dir(cache_dir: str | Path, rank: int, world_size: int) -> Path:
    """The folder of rank ``rank``'s shard."""
    return Path(cache_dir) / SHARDS_DIR / f"{rank:03d}-of-{world_size:03d}"


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def build_cache_shard(dataset: CocoDataset, cache_dir: str | Path, image_size: int, rank: int, world_size: int,
                      **options: Any) -> Path:
    """Decode rank ``rank``'s share of ``dataset`` into its shard folder (reused when complete), written through to
    disk before returning; ``options`` are those of :func:`build_image_cache`."""
    bounds = shard_bounds(dataset, world_size, image_size, bool(options.get("reduced_decode", True)))
    folder = shard_dir(cache_dir, rank, world_size)
    part = dataset.subset_images(np.arange(bounds[rank], bounds[rank + 1]))
    build_image_cache(part, folder, image_size, **options)
    for name in (IMAGES_FILE, CROPS_FILE, TILES_FILE, *ENCODED_FILES.values(), META_FILE, PROBLEMS_FILE,
                 FINGERPRINT_FILE):
        if (folder / name).is_file():
            _fsync(folder / name)
    _fsync(folder)
    return folder


def _append(source: Path, target) -> None:
    """Append the bytes of ``source`` to the open file ``target`` (in-kernel copy where the OS offers one)."""
    with open(source, "rb") as fin:
        size = os.fstat(fin.fileno()).st_size
        copied = 0
        try:
            while copied < size:
                n = os.copy_file_range(fin.fileno(), target.fileno(), min(COPY_CHUNK, size - copied))
                if n == 0:
                    break
                copied += n
        except (AttributeError, OSError):
            pass
        if copied < size:
            fin.seek(copied)
            shutil.copyfileobj(fin, target, COPY_CHUNK)


def merge_cache_shards(dataset: CocoDataset, cache_dir: str | Path, image_size: int, world_size: int, *,
                       max_pixels: int, pixel_stats: bool = True, with_crops: bool = False,
                       reduced_decode: bool = True, tiles: dict[str, float] | None = None,
                       codec: str = "raw") -> ImageCache:
    """Join the ``world_size`` complete shards of ``dataset`` into ``cache_dir`` and open it; the shards are removed.

    The result equals what :func:`build_image_cache` writes for the whole dataset with the same settings
    (same fingerprint, so a later single-process run reuses it).
    """
    cache_dir = Path(cache_dir)
    bounds = shard_bounds(dataset, world_size, image_size, reduced_decode)
    folders = [shard_dir(cache_dir, k, world_size) for k in range(world_size)]
    shards = [ImageCache.open(f) for f in folders]
    for k, shard in enumerate(shards):
        if shard.num_images != bounds[k + 1] - bounds[k] or shard.image_size != image_size:
            raise ValueError(f"{folders[k]}: holds {shard.num_images} images of {shard.image_size} px, expected "
                             f"{bounds[k + 1] - bounds[k]} of {image_size}; delete {cache_dir} and run again")
    largest = max(s.images.nbytes + (s.tiles.nbytes if s.tiles is not None else 0)
                  + (s.crops.nbytes if s.crops is not None else 0) for s in shards)
    _clear_for_build(cache_dir, largest)
    metas = []
    for folder in folders:
        with np.load(folder / META_FILE) as meta:
            metas.append({key: meta[key] for key in meta.files if key in ("scale", "usable", "pixel", "reduction")
                          or key.endswith(("_offsets", "_lengths"))})
    problems = [{**p, "index": int(p["index"]) + int(bounds[k])} for k, s in enumerate(shards) for p in s.problems]
    del shards                                            # their memmaps are about to be deleted
    names = stored_names(codec)
    images_tmp = cache_dir / f"{names['images']}.tmp-{os.getpid()}"
    crops_tmp = cache_dir / f"{names['crops']}.tmp-{os.getpid()}" if with_crops else None
    tile_options = _tile_options(tiles)
    grid, tile_owner = plan_tiles(dataset, image_size, tile_options["scale"], tile_options["min_object_px"])
    tiles_tmp = cache_dir / f"{names['tiles']}.tmp-{os.getpid()}" if grid.num_tiles else None
    rows: dict[str, tuple[np.ndarray, np.ndarray]] = {}        # codec jpeg: where each row lies in the joined file
    try:
        for kind, tmp in (("images", images_tmp), ("crops", crops_tmp), ("tiles", tiles_tmp)):
            if tmp is None:
                continue
            offsets, lengths = [], []
            with open(tmp, "wb", buffering=0) as out:          # unbuffered: copy_file_range writes beside it
                for folder, meta in zip(folders, metas):
                    (folder / FINGERPRINT_FILE).unlink(missing_ok=True)   # the shard is no longer complete
                    if f"{kind}_offsets" in meta:                 # JPEG rows: their offsets move by what is before
                        offsets.append(meta[f"{kind}_offsets"] + os.fstat(out.fileno()).st_size)
                        lengths.append(meta[f"{kind}_lengths"])
                    if (folder / names[kind]).is_file():          # a shard whose images need no tile has none
                        _append(folder / names[kind], out)
                        (folder / names[kind]).unlink()
            if codec != "raw":
                rows[kind] = (np.concatenate(offsets or [np.zeros(0, np.int64)]),
                              np.concatenate(lengths or [np.zeros(0, np.int64)]))
        expected = {"crops": dataset.num_annotations if with_crops else 0, "tiles": grid.num_tiles}
        for kind, tmp, row_bytes in (("crops", crops_tmp, crop_bytes(1)), ("tiles", tiles_tmp,
                                                                            cache_bytes(1, image_size))):
            held = (0 if tmp is None else len(rows[kind][0]) if codec != "raw"
                    else tmp.stat().st_size // row_bytes)
            if held != expected[kind]:
                raise ValueError(f"{cache_dir}: the shards hold {held} rows of {kind}, expected {expected[kind]}; "
                                 f"delete {cache_dir} and run again")
    except BaseException:
        for tmp in (images_tmp, crops_tmp, tiles_tmp):
            if tmp is not None:
                tmp.unlink(missing_ok=True)
        raise
    joined = {key: np.concatenate([m[key] for m in metas]) for key in ("scale", "usable", "pixel", "reduction")}
    meta = {"scale": joined["scale"], "usable": joined["usable"], "pixel": joined["pixel"],
            "image_ids": dataset.image_ids, "image_size": np.int64(image_size), "reduction": joined["reduction"]}
    meta |= tile_meta(grid, tile_owner) | encoded_meta(codec, rows)
    fingerprint = _fingerprint(dataset, image_size, max_pixels, pixel_stats, with_crops, reduced_decode, tiles,
                               codec)
    maps = ({names["images"]: images_tmp} | ({names["crops"]: crops_tmp} if crops_tmp is not None else {})
            | ({names["tiles"]: tiles_tmp} if tiles_tmp is not None else {}))
    cache = _publish(cache_dir, maps, meta, problems, fingerprint)
    shutil.rmtree(cache_dir / SHARDS_DIR, ignore_errors=True)
    return cache
