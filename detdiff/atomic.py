"""Write files so that a reader never sees half of one (temporary name, then rename); reserve room for memory maps."""

from __future__ import annotations

import errno
import json
import os
from pathlib import Path
from typing import Any


def write_text_atomic(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` through ``<path>.tmp-<pid>`` and ``os.replace``."""
    path = Path(path)
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def write_json_atomic(path: str | Path, data: Any, *, sort_keys: bool = False, indent: int | None = 1) -> Path:
    """JSON (``indent`` 1 unless given; paths and other non-JSON values as strings) written atomically."""
    return write_text_atomic(path, json.dumps(data, indent=indent, sort_keys=sort_keys, default=str) + "\n")


def reserve(path: str | Path) -> None:
    """Reserve the disk blocks of the whole of ``path`` now (``posix_fallocate``).

    A memory map of a sparse file gets its blocks when its pages are first written; on a full disk that
    write kills the process with SIGBUS instead of raising. Reserved first, a full disk raises ``OSError``
    (ENOSPC) here. A no-op where the call or the file system lacks it.
    """
    if not hasattr(os, "posix_fallocate"):
        return
    fd = os.open(path, os.O_RDWR)
    try:
        size = os.fstat(fd).st_size
        if size:
            os.posix_fallocate(fd, 0, size)
    except OSError as exc:
        if exc.errno not in (errno.EINVAL, errno.EOPNOTSUPP, errno.ENODEV, errno.ENOSYS):
            raise
    finally:
        os.close(fd)


def allocate(path: str | Path, num_bytes: int) -> Path:
    """Create ``path`` with ``num_bytes`` zero bytes, its blocks reserved (see :func:`reserve`), for a memory map."""
    path = Path(path)
    with open(path, "wb") as fh:
        if num_bytes:
            fh.seek(num_bytes - 1)
            fh.write(b"\0")
    reserve(path)
    return path
