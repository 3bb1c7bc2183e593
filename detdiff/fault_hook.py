"""Test hook: ``DETDIFF_FAULT`` kills the audit, or fills the disk, inside a named stage (fault-injection tests).

Unset (always, outside tests) it costs one dictionary look-up per stage. Set, it takes one of::

    DETDIFF_FAULT=<stage>:kill:<seconds>   SIGKILL this process <seconds> after <stage> starts, or as the
                                           stage ends if it ends sooner (so the kill is always inside it)
    DETDIFF_FAULT=<stage>:enospc:<k>       the disk is full from the k-th file that <stage> opens for writing
                                           in the run folder on (k >= 1): that open and every later one (any
                                           stage) gets a file on /dev/full, so the library doing the write
                                           meets a real ENOSPC from the kernel; a stage that opens fewer than
                                           k files fills the disk as it ends (its last write fails)
    DETDIFF_FAULT=<stage>:fill:<k>         another job fills the disk: as <stage> opens its k-th file for
                                           writing in the run folder, a file beside the run folder takes all
                                           the free space of its file system but 16 KiB (on a small file
                                           system such as a tmpfs, so every later write meets the kernel's
                                           own ENOSPC wherever it comes, mid-file included); a stage that
                                           opens fewer than k files fills it as it ends
    DETDIFF_FAULT=trace:<path>             append one JSON line per stage to <path>: name, seconds, how many
                                           files it opened for writing in the run folder (to choose <seconds>
                                           and <k> above), and the run folder's disk use as it began and ended

"Opened for writing" means ``open`` / ``io.open`` (hence ``pathlib``) in a mode with ``w``, ``a`` or ``x``:
every writer of the audit goes through them (numpy, pandas, matplotlib, ``torch.save`` of a file object,
the image-cache and log memory maps when they are created). Files opened before the disk fills keep
working, as on a real disk where their blocks are already reserved (:func:`detdiff.atomic.reserve`).
Linux only (``/dev/full``); the stages are those of :mod:`detdiff.stages`.
"""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import shutil
import signal
import threading
import time
from pathlib import Path
from typing import Any

ENV = "DETDIFF_FAULT"
FULL_DEVICE = "/dev/full"
BALLAST = ".detdiff-fault-ballast"

_state: dict[str, Any] = {}


def _spec() -> tuple[str, str, str] | None:
    raw = os.environ.get(ENV)
    if not raw:
        return None
    if raw.startswith("trace:"):
        return ("*", "trace", raw[len("trace:"):])
    name, kind, value = raw.split(":", 2)
    return (name, kind, value)


def _kill_now() -> None:
    os.kill(os.getpid(), signal.SIGKILL)


def _disk_use(folder: Path) -> int:
    """Bytes of disk blocks the files under ``folder`` hold."""
    return sum(os.lstat(os.path.join(top, name)).st_blocks * 512
               for top, _, names in os.walk(folder) for name in names)


def _fill_disk(path: str) -> None:
    """Write ``path`` so that its file system has 16 KiB free (or a little more: allocation is in blocks)."""
    fd = os.open(path, os.O_CREAT | os.O_WRONLY, 0o644)
    try:
        size = os.fstat(fd).st_size + shutil.disk_usage(os.path.dirname(path)).free - 16384
        while size > 0:
            try:
                os.posix_fallocate(fd, 0, size)
                return
            except OSError as exc:
                if exc.errno != errno.ENOSPC:
                    raise
                size -= 65536
    finally:
        os.close(fd)


def _disk_fills(kind: str) -> None:
    """The disk is full from now on: every later write-open gets /dev/full (enospc), or a file fills it (fill)."""
    if kind == "enospc":
        _state["full"] = True
    else:
        _fill_disk(os.path.join(os.path.dirname(_state["root"]), BALLAST))
    _state["filled"] = True


def _install_open() -> None:
    """Replace ``open`` / ``io.open`` by a wrapper that counts write-opens in the run folder and, once the
    disk is full, opens ``/dev/full`` instead."""
    if "real_open" in _state:
        return
    real_open = _state["real_open"] = builtins.open

    def hooked_open(file: Any, mode: str = "r", *args: Any, **kwargs: Any):
        root = _state.get("root")
        if root and isinstance(file, (str, bytes, os.PathLike)) and any(c in mode for c in "wax"):
            path = os.path.abspath(os.fsdecode(os.fspath(file)))
            if path.startswith(root + os.sep):
                _state["opens"] = _state.get("opens", 0) + 1
                name, kind, value = _state["spec"]
                if kind in ("enospc", "fill") and _state.get("stage") == name and _state["opens"] == int(value):
                    _disk_fills(kind)
                if _state.get("full"):
                    return real_open(FULL_DEVICE, mode.replace("x", "w"), *args, **kwargs)
        return real_open(file, mode, *args, **kwargs)

    builtins.open = io.open = hooked_open


def stage_started(stage: Any) -> None:
    """Called by :func:`detdiff.stages.stage` as a stage begins."""
    spec = _spec()
    if spec is None:
        return
    _state.update(spec=spec, stage=stage.name, root=os.path.abspath(stage.rundir), opens=0,
                  start=time.perf_counter(), disk_start=_disk_use(stage.rundir) if spec[1] == "trace" else 0)
    _install_open()
    name, kind, value = spec
    if kind == "kill" and stage.name == name:
        timer = threading.Timer(float(value), _kill_now)
        timer.daemon = True
        timer.start()
        _state["timer"] = timer


def stage_ended(stage: Any) -> None:
    """Called by :func:`detdiff.stages.stage` as a stage ends (normally or by an error)."""
    spec = _spec()
    if spec is None or _state.get("stage") != stage.name:
        return
    name, kind, value = spec
    if kind == "trace":
        with _state["real_open"](value, "a") as fh:
            fh.write(json.dumps({"stage": stage.name, "seconds": time.perf_counter() - _state["start"],
                                 "write_opens": _state["opens"], "disk_start": _state["disk_start"],
                                 "disk_end": _disk_use(stage.rundir)}) + "\n")
    elif kind == "kill" and stage.name == name:
        _kill_now()
    elif kind in ("enospc", "fill") and stage.name == name and not _state.get("filled"):
        _disk_fills(kind)
        if kind == "enospc":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(Path(stage.rundir)))
    _state["stage"] = None
