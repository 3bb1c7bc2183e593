"""Stages of an audit and the one place that turns a full disk, in any of them, into one clear line.

:func:`stage` marks the stage now running (check, decode, train, evaluate, crossfit, summary, analysis,
tables, report) with the folder it writes and, where known, the bytes it needs. Every writer of the audit runs
inside one, whatever library does the writing. When the disk fills, the error that escapes is an
``OSError`` with ``errno.ENOSPC`` / ``errno.EDQUOT`` (Python, numpy, pandas, matplotlib, JSON writes),
possibly chained under another exception (``torch.save`` of a file object raises a ``RuntimeError`` whose
``__context__`` is that ``OSError``); the stage tags it with itself on its way out, and
:func:`disk_full_as_one_line` (used once, at the command line's boundary) turns it into an
:class:`InsufficientSpaceError` naming the folder, the bytes needed and free, and the command that continues
the run. Everything an earlier stage finished stays as it was: every writer writes a temporary name and
renames it into place (:mod:`detdiff.leftovers` lists those names and removes what an interrupted run left).

The stages are also where the test hook of :mod:`detdiff.fault_hook` (``DETDIFF_FAULT``) acts.
"""

from __future__ import annotations

import errno
import re
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from detdiff import fault_hook

DISK_FULL_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT})
#: How torch's zip writer reports a failed write when no ``OSError`` is chained (``torch.save`` to a path).
_TORCH_WRITE_FAILED = re.compile(r"inline_container\.cc|PytorchStreamWriter failed|unexpected pos \d+ vs \d+")
#: Below this many free bytes a failed torch write is taken for a full disk.
_NEARLY_FULL = 64 * 2**20

#: What each stage writes, as the one-line message says it.
STAGE_WORDS = {
    "check": "the lint findings, dataset and recipe", "decode": "the image cache",
    "train": "the training log and checkpoint", "evaluate": "the detector's detections and metrics",
    "crossfit": "the cross-fitted predictions", "summary": "the run summary", "analysis": "the analysis",
    "tables": "the analysis tables", "report": "the report, thumbnails and plots",
}


class InsufficientSpaceError(OSError):
    """A folder that must be written is not writable or lacks room for what will be written there."""


@dataclass(frozen=True)
class Stage:
    """A stage of the audit: ``name`` (a key of :data:`STAGE_WORDS`), the run folder and the subfolder written."""

    name: str
    rundir: Path
    where: str = ""
    needed_bytes: int | None = None

    @property
    def folder(self) -> Path:
        return self.rundir / self.where if self.where else self.rundir


@contextmanager
def stage(name: str, rundir: str | Path, where: str = "", needed_bytes: int | None = None) -> Iterator[Stage]:
    """Run the body as stage ``name`` writing ``rundir/where``; a disk-full error leaving it is tagged with it."""
    current = Stage(name, Path(rundir), where, None if needed_bytes is None else int(needed_bytes))
    fault_hook.stage_started(current)
    try:
        try:
            yield current
        finally:
            fault_hook.stage_ended(current)
    except BaseException as exc:
        if getattr(exc, "detdiff_stage", None) is None and is_disk_full(exc, current.folder):
            exc.detdiff_stage = current
        raise


def _chain(exc: BaseException) -> Iterator[BaseException]:
    seen: set[int] = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        yield exc
        exc = exc.__cause__ or exc.__context__


def _free_bytes(folder: Path) -> int | None:
    """Free bytes on the file system of ``folder`` (or of its nearest existing parent)."""
    for candidate in (folder, *folder.parents):
        try:
            return shutil.disk_usage(candidate).free
        except OSError:
            continue
    return None


def is_disk_full(exc: BaseException, folder: Path | None = None) -> bool:
    """True for an out-of-space (or out-of-quota) error anywhere in ``exc``'s chain.

    A torch writer failure without a chained ``OSError`` counts when ``folder`` has under 64 MiB free.
    """
    for link in _chain(exc):
        if isinstance(link, InsufficientSpaceError):
            return False                             # already one line (the up-front room checks)
        if isinstance(link, OSError) and link.errno in DISK_FULL_ERRNOS:
            return True
    if folder is not None and isinstance(exc, RuntimeError) and _TORCH_WRITE_FAILED.search(str(exc)):
        free = _free_bytes(folder)
        return free is not None and free < _NEARLY_FULL
    return False


def size_text(num_bytes: float) -> str:
    """Bytes as kB under 1 MB, MB with one decimal, GB with one decimal from 1 GB on."""
    if num_bytes >= 1e9:
        return f"{num_bytes / 1e9:.1f} GB"
    return f"{num_bytes / 1e6:.1f} MB" if num_bytes >= 1e6 else f"{num_bytes / 1e3:.0f} kB"


def disk_full_error(exc: BaseException, continue_with: str) -> InsufficientSpaceError | None:
    """The one-line error for a full disk (None when ``exc`` is something else)."""
    where: Stage | None = getattr(exc, "detdiff_stage", None)
    if where is None:
        if not is_disk_full(exc):
            return None
        names = [getattr(link, "filename", None) for link in _chain(exc)]
        folder = next((Path(n).parent for n in names if isinstance(n, (str, Path))), Path.cwd())
        what, needed = "its files", None
    else:
        folder, what, needed = where.folder, STAGE_WORDS.get(where.name, where.name), where.needed_bytes
    free = _free_bytes(folder)
    room = [f"about {size_text(needed)} needed" if needed else "", f"{size_text(free)} free" if free is not None
            else ""]
    room_text = ", ".join(r for r in room if r)
    return InsufficientSpaceError(
        f"{folder}: the disk is full, cannot write {what}{f' ({room_text})' if room_text else ''}. "
        f"Finished work is kept; free some space, then continue with: {continue_with}")


@contextmanager
def disk_full_as_one_line(continue_with: str) -> Iterator[None]:
    """Re-raise a full-disk error from the body as :func:`disk_full_error`'s one-line error."""
    try:
        yield
    except BaseException as exc:
        error = disk_full_error(exc, continue_with)
        if error is None:
            raise
        raise error from exc
