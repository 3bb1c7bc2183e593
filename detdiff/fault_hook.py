"""Test hook: ``DETDIFF_FAULT`` kills the audit, or fills the disk, inside a named stage (fault-injection tests).

Unset (always, outside tests) it costs one dictionary look-up per stage. Set, it takes one of::

    DETDIFF_FAULT=<stage>:kill:<seconds>   SIGKILL this process <seconds> after <stage> starts, or as the
                                           stage ends if it ends sooner (so the kill is always inside it)
    DETDIFF_FAULT=<stage>:enospc:<k>       the disk is full from the k-th file that <stage> opens for writing
                                           in the run folder on (k >= 1): that open and every later one (any
                                           stage) gets a file on /dev/full, so the library doing the write
                                           meets a real ENOSPC from the kernel; a stage that opens fewer than
                                           k files fills the disk as it ends (its last write fails)
    DETDIFF_FAULT=trace:<path>             append one JSON line per stage to <path>: name, seconds, and how
                                           many files it opened for writing in the run folder (to choose
                                           <seconds> and <k> above)

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
import signal
import threading
import time
from pathlib import Path
from typing import Any

ENV = "DETDIFF_FAULT"
FULL_DEVICE = "/dev/full"

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
                if kind == "enospc" and _state.get("stage") == name and _state["opens"] >= int(value):
                    _state["full"] = True
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
                  start=time.perf_counter())
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
                                 "write_opens": _state["opens"]}) + "\n")
    elif kind == "kill" and stage.name == name:
        _kill_now()
    elif kind == "enospc" and stage.name == name and not _state.get("full"):
        _state["full"] = True
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(Path(stage.rundir)))
    _state["stage"] = None
