"""Rows of pixels stored as one JPEG each in a single append-only file: the compressed image cache.

A raw cache row of a 320 px view takes 307 KB; as a JPEG of quality :data:`JPEG_QUALITY` it takes 12-31 KB (the
generated mixed-size set and scikit-image's photos; PSNR 36 dB against the raw row, OpenCV's ``cv2.PSNR``).
The file is written by one process (the decode workers hand their encoded rows to the parent), row by row in
the order they finish; ``offsets`` / ``lengths`` say where each row lies. A row of length 0 was never decoded
(a refused image) and reads as ``fill``. Reading decodes each requested row with OpenCV: about 0.7 ms per 320 px
view, a few per cent of a training step of 16 views on 2 cores (``tests/benchmarks/bench_scale.py``).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

#: JPEG quality of a stored row (OpenCV's scale, 0-100); 90: PSNR 36 dB on photos, 95 costs 40% more bytes for 38 dB.
JPEG_QUALITY = 90
CODECS = ("raw", "jpeg")


def encode_rows(pixels: np.ndarray | None, count: int) -> list[bytes]:
    """``count`` RGB rows ``uint8 [count, h, w, 3]`` as JPEG bytes; ``None`` (a refused image): ``count`` empty rows."""
    if pixels is None:
        return [b""] * count
    params = [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY]
    out = []
    for row in np.asarray(pixels, dtype=np.uint8).reshape(count, *np.shape(pixels)[-3:]):
        ok, data = cv2.imencode(".jpg", cv2.cvtColor(row, cv2.COLOR_RGB2BGR), params)
        if not ok:
            raise ValueError("OpenCV could not encode a cache row as JPEG")
        out.append(data.tobytes())
    return out


@dataclass
class EncodedRows:
    """Read-only rows ``uint8 [N, h, w, 3]`` decoded on access; indexed like the raw memmap it stands in for."""

    blob: np.ndarray            # uint8 [bytes], a read-only memmap of the file
    offsets: np.ndarray         # int64 [N]: first byte of each row
    lengths: np.ndarray         # int64 [N]: bytes of each row, 0 = never decoded (reads as fill)
    row_shape: tuple[int, int, int]
    fill: int = 0

    @classmethod
    def open(cls, path: str | Path, offsets: np.ndarray, lengths: np.ndarray, row_shape: tuple[int, int, int],
             fill: int = 0) -> EncodedRows:
        """Open ``path``; raise ``FileNotFoundError`` when it is shorter than its rows say (a damaged cache)."""
        path = Path(path)
        offsets, lengths = np.asarray(offsets, np.int64), np.asarray(lengths, np.int64)
        size = path.stat().st_size
        end = int((offsets + lengths).max()) if len(offsets) else 0
        if size < end:
            raise FileNotFoundError(f"{path}: {size} bytes, but its rows end at byte {end}; the cache is damaged, "
                                    f"delete {path.parent} and rebuild")
        blob = np.memmap(path, dtype=np.uint8, mode="r") if size else np.zeros(0, np.uint8)
        return cls(blob, offsets, lengths, tuple(int(s) for s in row_shape), int(fill))

    @property
    def shape(self) -> tuple[int, ...]:
        return (len(self.offsets), *self.row_shape)

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(np.uint8)

    @property
    def nbytes(self) -> int:
        """Bytes on disk (not decoded)."""
        return int(self.blob.size)

    def __len__(self) -> int:
        return len(self.offsets)

    def _row(self, i: int) -> np.ndarray:
        length = int(self.lengths[i])
        if length == 0:
            return np.full(self.row_shape, self.fill, dtype=np.uint8)
        start = int(self.offsets[i])
        bgr = cv2.imdecode(np.asarray(self.blob[start:start + length]), cv2.IMREAD_COLOR)
        if bgr is None or bgr.shape != self.row_shape:
            raise ValueError(f"cache row {i}: bytes {start}-{start + length} do not decode to {self.row_shape}; "
                             f"the cache is damaged, delete it and rebuild")
        return cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)

    def __getitem__(self, key) -> np.ndarray:
        if isinstance(key, (int, np.integer)):
            return self._row(int(key) + (len(self) if key < 0 else 0))
        rows = np.arange(len(self))[key]
        out = np.empty((len(rows), *self.row_shape), dtype=np.uint8)
        for k, i in enumerate(rows):
            out[k] = self._row(int(i))
        return out

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        whole = self[:]
        return whole if dtype is None else whole.astype(dtype)


class RowAppender:
    """Appends encoded rows to one file and records where each lies; resumes a file cut back to ``end``."""

    def __init__(self, path: Path, num_rows: int, end: int = 0, offsets: np.ndarray | None = None,
                 lengths: np.ndarray | None = None) -> None:
        self.path = Path(path)
        self.offsets = np.zeros(num_rows, np.int64) if offsets is None else np.asarray(offsets, np.int64).copy()
        self.lengths = np.zeros(num_rows, np.int64) if lengths is None else np.asarray(lengths, np.int64).copy()
        with open(self.path, "ab") as fh:
            fh.truncate(end)                        # rows written after the last saved progress are written again
        self.end = int(end)
        self._fd = os.open(self.path, os.O_WRONLY | os.O_APPEND)

    def put(self, first_row: int, rows: list[bytes]) -> None:
        """Append ``rows`` as rows ``first_row, first_row + 1, ...``."""
        for k, data in enumerate(rows):
            self.offsets[first_row + k], self.lengths[first_row + k] = self.end, len(data)
            view = memoryview(data)
            while view:
                written = os.write(self._fd, view)
                view = view[written:]
            self.end += len(data)

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1
