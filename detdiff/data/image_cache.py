"""Decode every image once into the training view: a uint8 memmap that every epoch reads without decoding.

Training view (DEVELOPERS.md "Training view"): each image is letterboxed to ``S x S`` with
``scale = S / max(declared width, declared height)``, resized, placed at the top-left corner and padded
with grey 114. A COCO box maps to the view as ``xyxy_view = xyxy_orig * scale``. The declared size (the
COCO ``width`` / ``height``, i.e. the displayed image) sets the geometry, so boxes always land where the
annotation says, even when the file on disk has another size (that case is recorded as a warning).

Files in ``cache_dir``::

    images.u8        uint8 [I, S, S, 3] RGB, raw memmap (shape in meta.npz)
    meta.npz         scale float64 [I], usable bool [I], pixel float32 [I, 4] (PIXEL_DESCRIPTOR_NAMES,
                     NaN where unusable), image_ids int64 [I], image_size int, reduction uint8 [I] (JPEG
                     decode reduction, below; 1 = full resolution or not decoded), tile_image int64 [T],
                     tile_origin float64 [T, 2], tile_scale float64 [T], tile_owner int64 [A] (the tiles,
                     :mod:`detdiff.data.views`)
    tiles.u8         uint8 [T, S, S, 3] the tiles where small boxes need them (cut from the same decoded pixels as
                     the view); absent when there are none
    problems.json    [{index, image_id, file_name, reason, usable, level}]: level "error" = unusable
                     (not trained on), "warning" = usable with a note (e.g. size differs from the file)
    crops.u8         uint8 [A, 64, 64, 3] one crop per annotation at the original resolution, for the
                     cross-fitted crop models (:mod:`detdiff.crossfit.crops`); only when built ``with_crops``
    *.jpgrows        with codec "jpeg" (``data.cache_codec``), in place of the three ``.u8`` maps: every row of
                     images / tiles / crops as one JPEG (:mod:`detdiff.data.encoded_rows`), where each lies in
                     meta.npz (``images_offsets`` / ``images_lengths`` ... and ``codec``); written by the parent
                     process as the workers hand the rows back, so an interrupted build cuts the file back to the
                     end its saved progress names and goes on from there
    fingerprint.json written last: its presence marks a complete cache; it names the dataset, the view
                     size and the image files' sizes and times, so a cache is reused only for the same input

The memory maps are built as ``images.u8.partial`` / ``crops.u8.partial`` (their blocks reserved up front,
so a full disk fails at once with ENOSPC instead of killing a decode worker with SIGBUS later), with
``decode-progress.npz`` saving which images are done every couple of seconds; they are renamed into place at
the end, fingerprint last, so a killed build never leaves a cache that looks complete, and the next build
of the same cache decodes only the images not yet done. Decode workers ignore Ctrl-C (the parent stops them)
and end with their parent. Pixel descriptors (blur, brightness, contrast, clutter) and object crops are
taken from the decoded pixels while they are in memory, so each image is read once overall.

Reduced decoding (``reduced_decode``): a JPEG is decoded straight from the file at 1/2, 1/4 or 1/8 of its size
(libjpeg's DCT scaling through Pillow's ``Image.draft``) when the reduction (:func:`draft_reduction`) divides both
sides, leaves the longer side at least twice ``S`` (the letterbox then still averages 2x2 px or more into each view
px: :data:`VIEW_OVERSAMPLE`) and leaves every box of the image at least :data:`MIN_CROP_SIDE` px on its shorter
side (its crop keeps full stored resolution). A 4000x3000 photo with no box under 64 px decodes at 1000x750 for a
320 px view; an image with one small box keeps full resolution. Box geometry is unchanged (``scale`` refers to the
declared size). Pixel descriptors are then measured on the training view (the letterboxed image without its
padding, boxes ``* scale``), so they do not depend on which reduction an image got: at full resolution an image
decoded whole because of one small box would look blurrier and less cluttered than its reduced neighbours
(Laplacian variance and edge density both grow as an image shrinks), and the causes analysis would read that as a
property of hard images. Without ``reduced_decode`` every image is decoded whole and measured at full resolution.
"""

from __future__ import annotations

import contextlib
import ctypes
import hashlib
import json
import multiprocessing
import os
import shutil
import signal
import sys
import threading
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError
from tqdm import tqdm

from detdiff.atomic import allocate, write_text_atomic
from detdiff.crossfit.crops import CONTEXT, CROPS_FILE, STORE, crop_bytes, object_crops
from detdiff.data.coco import CocoDataset, UnsafeImagePath, resolve_image_path
from detdiff.data.encoded_rows import CODECS, EncodedRows, RowAppender, encode_rows
from detdiff.data.pixel_descriptors import PIXEL_DESCRIPTOR_NAMES, pixel_descriptors
from detdiff.data.views import TileGrid, plan_tiles, tile_pixels
from detdiff.stages import DISK_FULL_ERRNOS, InsufficientSpaceError  # noqa: F401  (re-exported)

PAD_VALUE = 114
CACHE_FORMAT_VERSION = 3
IMAGES_FILE = "images.u8"
TILES_FILE = "tiles.u8"
#: The rows of each kind as JPEGs, one file each (codec "jpeg", :mod:`detdiff.data.encoded_rows`).
ENCODED_FILES = {"images": "images.jpgrows", "tiles": "tiles.jpgrows", "crops": "crops.jpgrows"}
META_FILE = "meta.npz"
PROBLEMS_FILE = "problems.json"
FINGERPRINT_FILE = "fingerprint.json"
PARTIAL = ".partial"
PROGRESS_FILE = "decode-progress.npz"
#: Least seconds between two saves of the decode progress (a save writes about 30 bytes per image).
PROGRESS_EVERY_S = 2.0
_PR_SET_PDEATHSIG = 1                         # prctl option of Linux <sys/prctl.h>
#: JPEG decode reductions tried, largest first (libjpeg scales by 1/2, 1/4 and 1/8 while decoding).
DRAFT_REDUCTIONS = (8, 4, 2)
#: A reduced image keeps at least this many px per view px on its longer side. At 1-2 the view came out softer
#: than from a full decode (Laplacian variance 0.6-0.75x, two box filters in a row); at >= 2 it was 0.87-1.0x
#: (scikit-image's photos enlarged to 4000x3000 and 1920x1080 with sensor noise, views of 320 and 512 px).
VIEW_OVERSAMPLE = 2
#: A box keeps a full-resolution crop when its shorter side is at least this many decoded px: a stored crop
#: covers CONTEXT box sides in STORE px.
MIN_CROP_SIDE = STORE / CONTEXT



def check_folder_room(folder: str | Path, needed_bytes: int, what: str) -> None:
    """Create ``folder`` if needed and make sure a file can be written there and ``needed_bytes`` fit.

    Checked by writing a probe file (permission bits alone say nothing when running as root).
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        probe = folder / f".write-probe-{os.getpid()}"
        probe.write_bytes(b"0")
        probe.unlink()
    except OSError as exc:
        if exc.errno in DISK_FULL_ERRNOS:
            raise                               # the disk is full: said as such by detdiff.stages
        raise InsufficientSpaceError(f"{folder}: cannot write {what} there ({exc.strerror or exc}); "
                                     f"choose another output folder") from exc
    free = shutil.disk_usage(folder).free
    if free < needed_bytes:
        raise InsufficientSpaceError(
            f"{folder}: {what} needs about {needed_bytes / 1e6:.1f} MB but only {free / 1e6:.1f} MB are free; "
            f"free some space, choose another output folder or lower data.image_size")


def stored_names(codec: str) -> dict[str, str]:
    """File of each kind of row (images, tiles, crops) in a cache written with ``codec``."""
    if codec not in CODECS:
        raise ValueError(f"data.cache_codec: {codec!r} is not one of {', '.join(CODECS)}")
    return dict(ENCODED_FILES) if codec == "jpeg" else {"images": IMAGES_FILE, "tiles": TILES_FILE,
                                                        "crops": CROPS_FILE}


def cache_bytes(num_images: int, image_size: int) -> int:
    """Bytes of ``images.u8`` for ``num_images`` views of side ``image_size``."""
    return int(num_images) * int(image_size) ** 2 * 3


@dataclass
class ImageCache:
    """The decoded training view of a dataset (see module docstring); rows are dataset image indices."""

    cache_dir: Path
    images: np.ndarray         # uint8 [I, S, S, 3], RGB, read-only (a memmap, or EncodedRows with codec jpeg)
    scale: np.ndarray          # float64 [I]: view px per original px
    usable: np.ndarray         # bool [I]: decoded and trained on
    pixel: np.ndarray          # float32 [I, 4]: PIXEL_DESCRIPTOR_NAMES, NaN where unusable
    problems: list[dict[str, Any]]
    image_size: int
    crops: np.ndarray | None = None   # uint8 [A, STORE, STORE, 3] per annotation row, or None (built without)
    tiles: np.ndarray | None = None   # uint8 [T, S, S, 3] tiles of small boxes (detdiff.data.views), or None
    grid: TileGrid | None = None      # where each tile lies in its image
    tile_owner: np.ndarray | None = None   # int64 [A]: the tile that logs each annotation, -1 = its whole view
    codec: str = "raw"                # how the rows are stored: "raw" memmaps or "jpeg" (EncodedRows)

    @property
    def num_images(self) -> int:
        return int(self.images.shape[0])

    @property
    def num_tiles(self) -> int:
        return 0 if self.grid is None else self.grid.num_tiles

    def view_pixels(self, views: np.ndarray) -> np.ndarray:
        """``uint8 [n, S, S, 3]`` pixels of ``views`` (``v < I``: whole view of image ``v``; else tile ``v - I``)."""
        views = np.asarray(views, np.int64)
        whole = views < self.num_images
        if whole.all():
            return np.ascontiguousarray(self.images[views])
        out = np.empty((len(views), self.image_size, self.image_size, 3), dtype=np.uint8)
        out[whole] = self.images[views[whole]]
        out[~whole] = self.tiles[views[~whole] - self.num_images]
        return out

    def view_of(self, view: int) -> np.ndarray:
        """The ``[S, S, 3]`` pixels of one view (a memmap slice, not a copy, with codec raw)."""
        return self.images[view] if view < self.num_images else self.tiles[view - self.num_images]

    @property
    def usable_indices(self) -> np.ndarray:
        """Dataset image indices that can be trained on, ascending (int64)."""
        return np.flatnonzero(self.usable).astype(np.int64)

    @classmethod
    def open(cls, cache_dir: str | Path) -> ImageCache:
        """Open a complete cache; raise ``FileNotFoundError`` if it is missing or was never finished."""
        cache_dir = Path(cache_dir)
        if not (cache_dir / FINGERPRINT_FILE).is_file():
            raise FileNotFoundError(f"{cache_dir}: no complete image cache here ({FINGERPRINT_FILE} missing); "
                                    f"build it with build_image_cache")
        with np.load(cache_dir / META_FILE) as meta:
            scale, usable, pixel = meta["scale"], meta["usable"], meta["pixel"]
            size = int(meta["image_size"])
            grid = TileGrid(meta["tile_image"], meta["tile_origin"], meta["tile_scale"], size)
            tile_owner = meta["tile_owner"]
            codec = str(meta["codec"]) if "codec" in meta else "raw"
            rows = {kind: (meta[f"{kind}_offsets"], meta[f"{kind}_lengths"]) for kind in ENCODED_FILES
                    if f"{kind}_offsets" in meta}
        problems = json.loads((cache_dir / PROBLEMS_FILE).read_text())
        if codec == "jpeg":
            stored = {kind: EncodedRows.open(cache_dir / ENCODED_FILES[kind], *rows[kind], row_shape,
                                             PAD_VALUE if kind != "crops" else 0)
                      for kind, row_shape in (("images", (size, size, 3)), ("tiles", (size, size, 3)),
                                              ("crops", (STORE, STORE, 3))) if kind in rows}
            return cls(cache_dir, stored["images"], scale, usable, pixel, problems, size, stored.get("crops"),
                       stored.get("tiles") if grid.num_tiles else None, grid, tile_owner, codec)
        shape = (len(scale), size, size, 3)
        expected = cache_bytes(len(scale), size)
        actual = (cache_dir / IMAGES_FILE).stat().st_size
        if actual != expected:
            raise FileNotFoundError(f"{cache_dir / IMAGES_FILE}: {actual} bytes, expected {expected} for {shape}; "
                                    f"the cache is damaged, delete {cache_dir} and rebuild")
        images = (np.memmap(cache_dir / IMAGES_FILE, dtype=np.uint8, mode="r", shape=shape) if expected
                  else np.zeros(shape, dtype=np.uint8))
        crops = None
        if (cache_dir / CROPS_FILE).is_file():
            count = (cache_dir / CROPS_FILE).stat().st_size // crop_bytes(1)
            crops = (np.memmap(cache_dir / CROPS_FILE, dtype=np.uint8, mode="r", shape=(count, STORE, STORE, 3))
                     if count else np.zeros((0, STORE, STORE, 3), np.uint8))
        tiles = None
        if grid.num_tiles:
            tiles_shape = (grid.num_tiles, size, size, 3)
            if (cache_dir / TILES_FILE).stat().st_size != cache_bytes(grid.num_tiles, size):
                raise FileNotFoundError(f"{cache_dir / TILES_FILE}: not {cache_bytes(grid.num_tiles, size)} bytes "
                                        f"for {tiles_shape}; the cache is damaged, delete {cache_dir} and rebuild")
            tiles = np.memmap(cache_dir / TILES_FILE, dtype=np.uint8, mode="r", shape=tiles_shape)
        return cls(cache_dir, images, scale, usable, pixel, problems, size, crops, tiles, grid, tile_owner)


def _image_root(dataset: CocoDataset) -> Path:
    return dataset.images_dir if dataset.images_dir is not None else Path(".")


def _fingerprint(dataset: CocoDataset, image_size: int, max_pixels: int, with_pixels: bool,
                 with_crops: bool, reduced_decode: bool, tiles: dict[str, float] | None = None,
                 codec: str = "raw") -> dict[str, Any]:
    """What the cache depends on: dataset records, boxes (for clutter), view size, and the files' stat."""
    root = _image_root(dataset).resolve()
    digest = hashlib.sha256()
    for arr in (dataset.image_ids, dataset.widths, dataset.heights, dataset.ann_image_index, dataset.boxes):
        digest.update(np.ascontiguousarray(arr).tobytes())
    digest.update("\0".join(dataset.file_names).encode("utf-8", "surrogatepass"))
    stats = np.full((dataset.num_images, 2), -1, dtype=np.int64)
    for i, name in enumerate(dataset.file_names):
        try:
            st = os.stat(root / name)
            stats[i] = (st.st_size, st.st_mtime_ns)
        except (OSError, ValueError):
            pass
    digest.update(stats.tobytes())
    return {"version": CACHE_FORMAT_VERSION, "image_size": int(image_size), "max_pixels": int(max_pixels),
            "pixel_descriptors": bool(with_pixels), "crops": bool(with_crops), "reduced_decode": bool(reduced_decode),
            "tiles": _tile_options(tiles), "codec": codec, "num_images": int(dataset.num_images),
            "image_root": str(root), "digest": digest.hexdigest()}


def _tile_options(tiles: dict[str, float] | None) -> dict[str, float]:
    """The tile settings a cache is built with: ``scale`` (the cap of tile scales, 0 = no tiles) and
    ``min_object_px`` (:func:`detdiff.data.views.plan_tiles`)."""
    tiles = tiles or {}
    return {"scale": float(tiles.get("scale") or 0.0), "min_object_px": float(tiles.get("min_object_px") or 16.0)}


def _to_rgb8(im: Image.Image) -> np.ndarray:
    """Any PIL mode -> uint8 RGB ``[H, W, 3]``.

    Alpha is composited over the padding grey (transparent areas look like padding, not like black);
    integer images deeper than 8 bits are scaled from their 16-bit range (``/ 257``: 65535 -> 255);
    float images are taken as 0..1 when their maximum is at most 1, else clipped to 0..255.
    """
    mode = im.mode
    if mode in ("I;16", "I;16L", "I;16B", "I;16N", "I"):
        arr = np.asarray(im).astype(np.float64)
        if mode == "I" and arr.max(initial=0) <= 255:
            gray = arr
        else:
            gray = arr / 257.0
        gray = np.clip(np.rint(gray), 0, 255).astype(np.uint8)
        return np.repeat(gray[:, :, None], 3, axis=2)
    if mode == "F":
        arr = np.asarray(im).astype(np.float64)
        finite_max = np.nanmax(arr) if arr.size else 0.0
        gray = arr * 255.0 if finite_max <= 1.0 else arr
        gray = np.clip(np.nan_to_num(np.rint(gray)), 0, 255).astype(np.uint8)
        return np.repeat(gray[:, :, None], 3, axis=2)
    has_alpha = mode in ("RGBA", "LA", "PA", "La", "RGBa") or (mode == "P" and "transparency" in im.info)
    if has_alpha:
        rgba = np.asarray(im.convert("RGBA")).astype(np.float32)
        alpha = rgba[:, :, 3:4] / 255.0
        rgb = rgba[:, :, :3] * alpha + PAD_VALUE * (1.0 - alpha)
        return np.clip(np.rint(rgb), 0, 255).astype(np.uint8)
    return np.asarray(im if mode == "RGB" else im.convert("RGB"))      # convert("RGB") of RGB copies


class Refused(Exception):
    """An image that cannot be used; the message is the reason recorded in problems.json."""


def draft_reductions(widths: np.ndarray, heights: np.ndarray, smallest_box_sides: np.ndarray,
                     image_size: int) -> np.ndarray:
    """Per image, the largest of :data:`DRAFT_REDUCTIONS` that divides both sides, keeps the longer side at least
    :data:`VIEW_OVERSAMPLE` x ``image_size`` and the shorter side of the image's smallest box (``inf`` without
    boxes) at least :data:`MIN_CROP_SIDE` px; else 1 (int64 ``[I]``).

    Dividing both sides keeps the reduced pixel grid the original's (pixel ``i`` covers original pixels
    ``r*i .. r*i + r - 1``), so a box maps back exactly by ``* r``.
    """
    w, h = np.asarray(widths, dtype=np.int64), np.asarray(heights, dtype=np.int64)
    smallest = np.asarray(smallest_box_sides, dtype=np.float64)
    out = np.ones(len(w), dtype=np.int64)
    for r in sorted(DRAFT_REDUCTIONS):              # each allowed r also allows every smaller one
        ok = ((w % r == 0) & (h % r == 0) & (np.maximum(w, h) >= VIEW_OVERSAMPLE * image_size * r)
              & (smallest >= MIN_CROP_SIDE * r))
        out[ok] = r
    return out


def draft_reduction(width: int, height: int, boxes_xywh: np.ndarray, image_size: int) -> int:
    """:func:`draft_reductions` of one ``width x height`` image with ``boxes_xywh`` in its pixels."""
    boxes = np.asarray(boxes_xywh, dtype=np.float64).reshape(-1, 4)
    smallest = float(boxes[:, 2:].min()) if len(boxes) else np.inf
    return int(draft_reductions(np.array([width]), np.array([height]), np.array([smallest]), image_size)[0])


def decode_full(path: Path, max_pixels: int,
                 reduce: Callable[[int, int], int] | None = None) -> tuple[np.ndarray, int]:
    """Read one file into uint8 RGB, EXIF orientation applied; returns (pixels, reduction); raise ``Refused``.

    ``reduce(width, height) -> r`` (header size, before EXIF rotation) asks for a JPEG decoded at ``1/r`` of
    its size (``Image.draft``); other formats and ``reduce=None`` decode at full resolution (reduction 1).
    """
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        raise Refused("file not found") from None
    except OSError as exc:
        raise Refused(f"cannot read file: {exc.strerror or exc}") from None
    if size == 0:
        raise Refused("empty file (0 bytes)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            with Image.open(path) as im:
                w, h = im.size                      # from the header; nothing is decoded yet
                if w * h > max_pixels:
                    raise Refused(f"{w}x{h} = {w * h} pixels exceeds data.max_pixels = {max_pixels}; "
                                   f"refused before decoding")
                reduction = reduce(w, h) if reduce is not None and im.format in ("JPEG", "MPO") else 1
                if reduction > 1:
                    drafted = im.draft("RGB", (w // reduction, h // reduction))
                    reduction = 1 if drafted is None else int(round(w / drafted[1][2]))
                im.load()
                ImageOps.exif_transpose(im, in_place=True)    # COCO sizes are of the displayed image
                return _to_rgb8(im), reduction
    except Refused:
        raise
    except Image.DecompressionBombError as exc:
        raise Refused(f"refused before decoding by Pillow's decompression-bomb limit ({exc})") from None
    except UnidentifiedImageError:
        raise Refused("not an image (no known image format)") from None
    except (OSError, SyntaxError, ValueError, TypeError, EOFError, MemoryError) as exc:
        raise Refused(f"corrupt or truncated image ({type(exc).__name__}: {exc})") from None


def view_extent(declared_w: int, declared_h: int, image_size: int) -> tuple[int, int]:
    """Width and height of the image inside its ``S x S`` view (the rest is padding)."""
    scale = image_size / max(declared_w, declared_h)
    return (min(image_size, max(1, int(round(declared_w * scale)))),
            min(image_size, max(1, int(round(declared_h * scale)))))


def letterbox(image_rgb: np.ndarray, declared_w: int, declared_h: int, image_size: int) -> tuple[np.ndarray, float]:
    """Resize ``image_rgb [h, w, 3]`` to the declared size's view and pad to ``[S, S, 3]``; returns (view, scale)."""
    scale = image_size / max(declared_w, declared_h)
    new_w, new_h = view_extent(declared_w, declared_h, image_size)
    h, w = image_rgb.shape[:2]
    shrinking = new_w * new_h < w * h
    resized = cv2.resize(image_rgb, (new_w, new_h), interpolation=cv2.INTER_AREA if shrinking else cv2.INTER_LINEAR)
    view = np.full((image_size, image_size, 3), PAD_VALUE, dtype=np.uint8)
    view[:new_h, :new_w] = resized
    return view, scale


# Per-process state of the decode workers (set by _init_worker; the parent sets it for in-process decoding).
_WORKER: dict[str, Any] = {}


def _init_worker(images_path: str, shape: tuple[int, ...], max_pixels: int, with_pixels: bool,
                 crops_path: str | None, num_crops: int, reduced_decode: bool, tiles_path: str | None = None,
                 num_tiles: int = 0, codec: str = "raw") -> None:
    """Set the worker's state. With codec "raw" rows are written into the ``.partial`` memmaps at these paths; with
    "jpeg" they go back to the parent encoded (:func:`_store`) and the paths only say which kinds are built."""
    if cv2.getNumThreads() != 1:     # in a forked worker the parent already made it 1 (see build_image_cache)
        cv2.setNumThreads(1)
    raw = codec == "raw"
    _WORKER["codec"], _WORKER["view_size"] = codec, shape[1]
    _WORKER["images"] = np.memmap(images_path, dtype=np.uint8, mode="r+", shape=shape) if raw else "encoded"
    _WORKER["crops"] = ((np.memmap(crops_path, dtype=np.uint8, mode="r+", shape=(num_crops, STORE, STORE, 3))
                         if raw else "encoded") if crops_path and num_crops else None)
    _WORKER["tiles"] = ((np.memmap(tiles_path, dtype=np.uint8, mode="r+", shape=(num_tiles, *shape[1:]))
                         if raw else "encoded") if tiles_path and num_tiles else None)
    _WORKER["max_pixels"] = max_pixels
    _WORKER["with_pixels"] = with_pixels
    _WORKER["reduced_decode"] = reduced_decode


def _exit_with_parent(parent: int) -> None:
    """End this worker (quietly, no traceback) as soon as the process that started it ends."""
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)
    else:
        def watch() -> None:
            while os.getppid() == parent:
                time.sleep(0.5)
            os._exit(0)

        threading.Thread(target=watch, daemon=True).start()
    if os.getppid() != parent:                  # the parent ended before the line above took effect
        os._exit(0)


def _init_pool_worker(parent: int, *init_args: Any) -> None:
    """Initialise a pool worker: Ctrl-C is the parent's to handle, and the worker ends with its parent."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _exit_with_parent(parent)
    _init_worker(*init_args)


def _store(out: dict[str, Any], kind: str, first: int, count: int, pixels: np.ndarray | None) -> None:
    """Rows ``first .. first + count`` of ``kind`` (images, tiles, crops) get ``pixels`` (None: a refused image,
    grey): written into the worker's memmap (codec raw) or encoded into ``out["encoded"][kind]`` for the parent."""
    if _WORKER["codec"] == "raw":
        _WORKER[kind][first:first + count] = PAD_VALUE if pixels is None else pixels
    else:
        out.setdefault("encoded", {})[kind] = (first, encode_rows(pixels, count))


def _decode_task(task: tuple[int, str | None, str | None, int, int, np.ndarray, int, int, TileGrid]) -> dict[str, Any]:
    """Decode image ``index`` into row ``index`` of the memmap (its boxes' crops into the crop rows from
    ``first_ann``, its tiles ``grid`` into the tile rows from ``first_tile``); return its scale, descriptors and
    notes."""
    index, path, refusal, declared_w, declared_h, boxes_xywh, first_ann, first_tile, grid = task
    size = _WORKER["view_size"]
    out: dict[str, Any] = {"index": index, "scale": size / max(declared_w, declared_h), "usable": False,
                           "pixel": np.full(len(PIXEL_DESCRIPTOR_NAMES), np.nan, dtype=np.float32), "notes": [],
                           "reduction": 1}

    def reduce(file_w: int, file_h: int) -> int:
        if sorted((file_w, file_h)) != sorted((declared_w, declared_h)):
            return 1                                # size disagrees with the annotation: decode it all
        reduction = draft_reduction(file_w, file_h, boxes_xywh, size)
        while grid.num_tiles and reduction > 1 and reduction * float(grid.scale.max()) > 1:
            reduction //= 2                         # tiles keep at least one decoded px per tile px
        return reduction

    try:
        if refusal is not None:
            raise Refused(refusal)
        full, reduction = decode_full(Path(path), _WORKER["max_pixels"],
                                       reduce if _WORKER["reduced_decode"] else None)
    except Refused as exc:
        _store(out, "images", index, 1, None)
        if grid.num_tiles:
            _store(out, "tiles", first_tile, grid.num_tiles, None)
        out["notes"].append(("error", str(exc)))
        return out
    out["reduction"] = reduction
    h, w = full.shape[:2]
    file_w, file_h = w * reduction, h * reduction
    if (file_w, file_h) != (declared_w, declared_h):
        hint = (" (the declared size is this one turned by 90 degrees: was the EXIF orientation ignored "
                "when it was annotated?)" if (file_h, file_w) == (declared_w, declared_h) else "")
        out["notes"].append(("warning", f"decoded size {file_w}x{file_h} differs from the declared "
                                        f"{declared_w}x{declared_h}; resized to the declared size{hint}"))
    try:
        view, scale = letterbox(full, declared_w, declared_h, size)
        boxes_here = np.asarray(boxes_xywh, dtype=np.float64) * np.array([w / declared_w, h / declared_h] * 2)
        if _WORKER["with_pixels"] and _WORKER["reduced_decode"]:     # on the view: the same whatever the reduction
            new_w, new_h = view_extent(declared_w, declared_h, size)
            out["pixel"] = pixel_descriptors(view[:new_h, :new_w], np.asarray(boxes_xywh, dtype=np.float64) * scale)
        elif _WORKER["with_pixels"]:
            out["pixel"] = pixel_descriptors(full, boxes_here)
        if _WORKER["crops"] is not None and len(boxes_here):
            _store(out, "crops", first_ann, len(boxes_here), object_crops(full, boxes_here))
        if grid.num_tiles:
            _store(out, "tiles", first_tile, grid.num_tiles,
                   tile_pixels(full, declared_w, declared_h, grid, size, PAD_VALUE))
    except (cv2.error, ValueError, MemoryError) as exc:
        _store(out, "images", index, 1, None)
        if grid.num_tiles:
            _store(out, "tiles", first_tile, grid.num_tiles, None)
        out["notes"] = [("error", f"decoded but could not be resized or measured ({type(exc).__name__}: {exc})")]
        return out
    _store(out, "images", index, 1, view)
    out["scale"], out["usable"] = scale, True
    return out


def tile_meta(grid: TileGrid, tile_owner: np.ndarray) -> dict[str, np.ndarray]:
    """The tile arrays saved in ``meta.npz``."""
    return {"tile_image": grid.image, "tile_origin": grid.origin, "tile_scale": grid.scale, "tile_owner": tile_owner}


def encoded_meta(codec: str, rows: dict[str, tuple[np.ndarray, np.ndarray]]) -> dict[str, np.ndarray]:
    """The arrays saved in ``meta.npz`` for codec jpeg: where each kind's rows lie in its file (none for raw)."""
    if codec == "raw":
        return {}
    meta = {"codec": np.array(codec)}
    for kind, (offsets, lengths) in rows.items():
        meta |= {f"{kind}_offsets": np.asarray(offsets, np.int64), f"{kind}_lengths": np.asarray(lengths, np.int64)}
    return meta


def _pool_context() -> multiprocessing.context.BaseContext:
    """``fork`` where the OS has it: workers need no ``if __name__ == "__main__"`` guard in the caller's script
    and start in milliseconds; they only run PIL/OpenCV (one OpenCV thread each), never torch."""
    methods = multiprocessing.get_all_start_methods()
    return multiprocessing.get_context("fork" if "fork" in methods else "spawn")


def _tasks(dataset: CocoDataset, grid: TileGrid):
    """One task per image: path (or the reason it is refused), declared size, its boxes and its tiles."""
    root = _image_root(dataset)
    tile_first = np.searchsorted(grid.image, np.arange(dataset.num_images + 1), side="left")
    for i in range(dataset.num_images):
        refusal, path = None, None
        try:
            path = str(resolve_image_path(root, dataset.file_names[i]))
        except UnsafeImagePath as exc:
            refusal = f"unsafe file_name: {exc}"
        except (OSError, ValueError) as exc:
            refusal = f"unreadable file_name: {exc}"
        rows = dataset.ann_slice(i)
        tiles = np.arange(tile_first[i], tile_first[i + 1])
        yield (i, path, refusal, int(dataset.widths[i]), int(dataset.heights[i]), dataset.boxes[rows], rows.start,
               int(tile_first[i]), grid.take(tiles))


class _DecodeProgress:
    """What an interrupted build had decoded (``decode-progress.npz``), so a new build decodes only the rest.

    Saved every :data:`PROGRESS_EVERY_S` seconds (or 50 times as long as a save takes: at most 2% of the
    build's time; about 30 ms for 100k images) and when the build stops on an error, always after
    the rows it marks done are in the ``.partial`` memory maps (a worker returns a row's result only after
    writing its pixels; the kernel keeps what a killed process wrote to a shared map).
    """

    def __init__(self, cache_dir: Path, fingerprint: dict[str, Any], num: int) -> None:
        self.path, self.key = cache_dir / PROGRESS_FILE, json.dumps(fingerprint, sort_keys=True)
        self.done = np.zeros(num, dtype=bool)
        self.scale = np.full(num, np.nan, dtype=np.float64)
        self.usable = np.zeros(num, dtype=bool)
        self.pixel = np.full((num, len(PIXEL_DESCRIPTOR_NAMES)), np.nan, dtype=np.float32)
        self.reduction = np.ones(num, dtype=np.uint8)
        self.problems: list[dict[str, Any]] = []
        self.saved_at, self.every = time.monotonic(), PROGRESS_EVERY_S
        self.appenders: dict[str, RowAppender] = {}    # codec jpeg: where each kind's rows lie, saved with the rest
        self.saved_rows: dict[str, tuple[np.ndarray, np.ndarray, int]] = {}   # (offsets, lengths, end) as loaded

    def load(self) -> bool:
        """Take over a saved progress of the same build; False when there is none (or it is of another build)."""
        try:
            with np.load(self.path) as saved:
                if str(saved["key"]) != self.key or len(saved["done"]) != len(self.done):
                    return False
                self.done, self.scale, self.usable = saved["done"], saved["scale"], saved["usable"]
                self.pixel, self.reduction = saved["pixel"], saved["reduction"]
                self.problems = json.loads(str(saved["problems"]))
                self.saved_rows = {kind: (saved[f"{kind}_offsets"], saved[f"{kind}_lengths"], int(saved[f"{kind}_end"]))
                                   for kind in ENCODED_FILES if f"{kind}_end" in saved}
        except (OSError, ValueError, KeyError):
            return False
        return True

    def save(self) -> None:
        """Write the progress atomically; the next save waits 50 times as long as this one took, 2 s at least."""
        started = time.monotonic()
        tmp = self.path.with_name(f"decode-progress.tmp-{os.getpid()}.npz")
        rows = {f"{kind}_end": np.int64(appender.end) for kind, appender in self.appenders.items()}
        if self.appenders:
            rows |= encoded_meta("jpeg", {kind: (a.offsets, a.lengths) for kind, a in self.appenders.items()})
        with open(tmp, "wb") as fh:
            np.savez(fh, key=np.array(self.key), done=self.done, scale=self.scale, usable=self.usable,
                     pixel=self.pixel, reduction=self.reduction, problems=np.array(json.dumps(self.problems)), **rows)
        os.replace(tmp, self.path)
        now = time.monotonic()
        self.saved_at, self.every = now, max(PROGRESS_EVERY_S, 50 * (now - started))


def _resumable(cache_dir: Path, sizes: dict[str, int | None], progress: _DecodeProgress,
               kinds: dict[str, str]) -> bool:
    """Whether an interrupted build of this same cache can be gone on with: its progress and its maps, full size
    (a size of None: a file of JPEG rows of kind ``kinds[name]``, at least as long as the saved progress says)."""
    for name, size in sizes.items():
        partial = cache_dir / (name + PARTIAL)
        if not partial.is_file() and (cache_dir / name).is_file():
            os.replace(cache_dir / name, partial)       # stopped while renaming the finished maps into place
        if not partial.is_file() or (size is not None and partial.stat().st_size != size):
            return False
    if not progress.load():
        return False
    return all(kinds[name] in progress.saved_rows
               and (cache_dir / (name + PARTIAL)).stat().st_size >= progress.saved_rows[kinds[name]][2]
               for name, size in sizes.items() if size is None)


def current_cache(dataset: CocoDataset, cache_dir: str | Path, image_size: int, *, max_pixels: int,
                  pixel_stats: bool = True, with_crops: bool = False, reduced_decode: bool = True,
                  tiles: dict[str, float] | None = None, codec: str = "raw") -> ImageCache | None:
    """The complete cache in ``cache_dir`` when it was built from this dataset, these files and settings, else None."""
    cache_dir = Path(cache_dir)
    fp_path = cache_dir / FINGERPRINT_FILE
    if not fp_path.is_file():
        return None
    fingerprint = _fingerprint(dataset, image_size, max_pixels, pixel_stats, with_crops, reduced_decode, tiles,
                               codec)
    try:
        if json.loads(fp_path.read_text()) == fingerprint:
            return ImageCache.open(cache_dir)
    except (OSError, ValueError, KeyError, FileNotFoundError):
        pass
    return None


def _clear_for_build(cache_dir: Path, needed_bytes: int) -> None:
    """Check that ``needed_bytes`` fit (counting what an outdated cache or an abandoned partial build frees), then
    remove them, fingerprint first (from then on no complete cache is claimed)."""
    outdated = [cache_dir / (n + end) for n in (IMAGES_FILE, CROPS_FILE, TILES_FILE, *ENCODED_FILES.values())
                for end in ("", PARTIAL)]
    reclaimable = sum(f.stat().st_size for f in outdated if f.is_file())
    check_folder_room(cache_dir, max(0, needed_bytes - reclaimable) + 1_000_000, "the image cache")
    (cache_dir / FINGERPRINT_FILE).unlink(missing_ok=True)
    for stale in (*outdated, cache_dir / PROGRESS_FILE):
        stale.unlink(missing_ok=True)                     # an outdated cache only takes room


def _publish(cache_dir: Path, maps: dict[str, Path], meta: dict[str, Any], problems: list[dict[str, Any]],
             fingerprint: dict[str, Any]) -> ImageCache:
    """Write meta and problems atomically, rename the finished memory maps (final name -> where they were
    written) into place, then the fingerprint, last; the decode progress is no longer needed."""
    meta_tmp = cache_dir / f"meta.tmp-{os.getpid()}.npz"
    with open(meta_tmp, "wb") as fh:
        np.savez(fh, **meta)
    os.replace(meta_tmp, cache_dir / META_FILE)
    write_text_atomic(cache_dir / PROBLEMS_FILE, json.dumps(problems, indent=1))
    for name, written in maps.items():
        os.replace(written, cache_dir / name)
    write_text_atomic(cache_dir / FINGERPRINT_FILE, json.dumps(fingerprint, indent=1))
    (cache_dir / PROGRESS_FILE).unlink(missing_ok=True)
    return ImageCache.open(cache_dir)


def build_image_cache(dataset: CocoDataset, cache_dir: str | Path, image_size: int, *, max_pixels: int,
                      progress: bool = True, workers: int = 2, pixel_stats: bool = True,
                      with_crops: bool = False, reduced_decode: bool = True,
                      tiles: dict[str, float] | None = None, codec: str = "raw") -> ImageCache:
    """Decode every image of ``dataset`` once into ``cache_dir`` (see module docstring) and open it.

    A complete cache for the same dataset, files and view size is reused as is; an interrupted build of
    that same cache is gone on with (only the images it had not decoded are decoded). Images that cannot be
    used (corrupt, empty, not an image, too many pixels, unsafe path) are marked unusable with a reason
    in ``problems.json`` and the build goes on. ``workers`` > 1 decodes in a process pool of that size.
    ``pixel_stats`` = False skips the descriptors (``analysis.pixel_descriptors`` off): ``pixel`` is NaN.
    ``with_crops`` also stores one crop per annotation (``crops.u8``) for the cross-fitted crop models.
    ``reduced_decode`` decodes large JPEGs at reduced size where views and crops allow (module docstring).
    ``tiles`` (``{"scale": cap, "min_object_px": px}``) also cuts the tiles of :func:`detdiff.data.views.plan_tiles`
    into ``tiles.u8`` (none when ``scale`` is 0 or absent). ``codec`` "jpeg" stores every row as a JPEG instead
    (``*.jpgrows``, :mod:`detdiff.data.encoded_rows`): a tenth to a twentieth of the bytes, decoded on reading.
    """
    cache_dir = Path(cache_dir)
    reusable = current_cache(dataset, cache_dir, image_size, max_pixels=max_pixels, pixel_stats=pixel_stats,
                             with_crops=with_crops, reduced_decode=reduced_decode, tiles=tiles, codec=codec)
    if reusable is not None:
        return reusable
    fingerprint = _fingerprint(dataset, image_size, max_pixels, pixel_stats, with_crops, reduced_decode, tiles,
                               codec)
    fp_path = cache_dir / FINGERPRINT_FILE
    num = dataset.num_images
    num_crops = dataset.num_annotations if with_crops else 0
    shape = (num, image_size, image_size, 3)
    options = _tile_options(tiles)
    grid, tile_owner = plan_tiles(dataset, image_size, options["scale"], options["min_object_px"])
    names = stored_names(codec)
    rows = {"images": num} | ({"crops": num_crops} if with_crops else {}) | (
        {"tiles": grid.num_tiles} if grid.num_tiles else {})
    raw_sizes = {"images": cache_bytes(num, image_size), "crops": crop_bytes(num_crops),
                 "tiles": cache_bytes(grid.num_tiles, image_size)}
    sizes = {names[kind]: raw_sizes[kind] if codec == "raw" else None for kind in rows}
    kind_of = {names[kind]: kind for kind in rows}
    state = _DecodeProgress(cache_dir, fingerprint, num)
    if cache_dir.is_dir() and _resumable(cache_dir, sizes, state, kind_of):
        check_folder_room(cache_dir, 1_000_000, "the image cache")
        fp_path.unlink(missing_ok=True)
    else:
        state = _DecodeProgress(cache_dir, fingerprint, num)     # a progress whose rows file fell short is no use
        _clear_for_build(cache_dir, sum(size or 0 for size in sizes.values()))
        for name, size in sizes.items():
            if size is not None:
                allocate(cache_dir / (name + PARTIAL), size)
    if codec != "raw":
        for kind, count in rows.items():
            offsets, lengths, end = state.saved_rows.get(kind, (None, None, 0))
            state.appenders[kind] = RowAppender(cache_dir / (names[kind] + PARTIAL), count, end, offsets, lengths)
    partial = {kind: str(cache_dir / (names[kind] + PARTIAL)) if kind in rows else None for kind in names}
    init_args = (partial["images"], shape, int(max_pixels), bool(pixel_stats), partial["crops"], num_crops,
                 bool(reduced_decode), partial["tiles"], grid.num_tiles, codec)
    todo = int((~state.done).sum())
    bar = tqdm(total=num, initial=num - todo, desc="decode images", unit="img", disable=not progress, leave=False)

    def collect(result: dict[str, Any]) -> None:
        i = result["index"]
        state.scale[i], state.usable[i], state.pixel[i], state.reduction[i] = (
            result["scale"], result["usable"], result["pixel"], result["reduction"])
        for level, reason in result["notes"]:
            state.problems.append({"index": int(i), "image_id": int(dataset.image_ids[i]),
                                   "file_name": dataset.file_names[i], "reason": reason,
                                   "usable": level != "error", "level": level})
        for kind, (first, encoded) in result.get("encoded", {}).items():
            state.appenders[kind].put(first, encoded)
        state.done[i] = True
        if time.monotonic() - state.saved_at > state.every:
            state.save()
        bar.update(1)

    tasks = (task for task in _tasks(dataset, grid) if not state.done[task[0]])
    try:
        if todo == 0:
            pass
        elif workers <= 1 or todo < 4 * workers:
            saved = dict(_WORKER)
            try:
                _init_worker(*init_args)
                for task in tasks:
                    collect(_decode_task(task))
                for name in ("images", "crops", "tiles"):
                    if isinstance(_WORKER[name], np.memmap):
                        _WORKER[name].flush()
            finally:
                _WORKER.clear()
                _WORKER.update(saved)
        else:
            # OpenCV's thread pool must be stopped before the fork: a forked worker that reconfigures the pool
            # it inherited from a parent that used it waits forever in pthread_cond_destroy
            opencv_threads = cv2.getNumThreads()
            cv2.setNumThreads(1)
            try:
                with _pool_context().Pool(workers, _init_pool_worker, (os.getpid(), *init_args)) as pool:
                    for result in pool.imap_unordered(_decode_task, tasks, chunksize=8):
                        collect(result)
            finally:
                cv2.setNumThreads(opencv_threads)
    except BaseException:
        with contextlib.suppress(OSError):
            state.save()                                  # finished rows are kept for the next build
        raise
    finally:
        bar.close()
        for appender in state.appenders.values():
            appender.close()

    problems = sorted(state.problems, key=lambda p: (p["index"], p["level"]))
    meta = {"scale": state.scale, "usable": state.usable, "pixel": state.pixel, "image_ids": dataset.image_ids,
            "image_size": np.int64(image_size), "reduction": state.reduction} | tile_meta(grid, tile_owner)
    meta |= encoded_meta(codec, {kind: (a.offsets, a.lengths) for kind, a in state.appenders.items()})
    return _publish(cache_dir, {name: cache_dir / (name + PARTIAL) for name in sizes}, meta, problems, fingerprint)
