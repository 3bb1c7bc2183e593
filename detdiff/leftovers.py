"""Temporary files of interrupted runs: every temporary name detdiff writes, listed here, found and removed.

Every writer of a run folder writes a temporary name and renames it into place, so a run killed or stopped
by a full disk leaves only such names behind (never a half-written file under a final name). An audit
(fresh or ``--resume``) removes them before it starts and says how much space that gave back. Only names in
:data:`TEMP_NAMES` are touched, each in the one folder where its writer puts it; a name that carries a
process id is left alone while that process is alive (another detdiff writing there now). A folder given as a
glob pattern (``cache/shards/*``: the image-cache shards of a torchrun audit) stands for every folder it matches.
The resumable state of an interrupted image-cache build (``cache/*.partial``, ``cache/decode-progress.npz``, the
same in a shard folder) is not a temporary file: :func:`detdiff.data.image_cache.build_image_cache` goes on from
it or removes it.
"""

from __future__ import annotations

import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

from detdiff.stages import size_text

_PID = r"(?P<pid>\d+)"
#: The shard folders of a torchrun image cache (detdiff.data.cache_shards: ``cache/shards/<k>-of-<n>/``).
SHARD_FOLDERS = "cache/shards/*-of-*"


@dataclass(frozen=True)
class TempName:
    """A temporary name: the folder under RUNDIR it lives in, the full-name pattern, and the module writing it."""

    folder: str
    pattern: str
    writer: str

    def matches(self, name: str) -> re.Match[str] | None:
        return re.fullmatch(self.pattern, name)


#: Every temporary name written into a run folder (tests/test_faults.py checks that the code has no other).
TEMP_NAMES: tuple[TempName, ...] = (
    TempName("", rf"\.write-probe-{_PID}", "detdiff/pipeline.py"),
    TempName("", rf"[\w.-]+\.(?:json|yaml)\.tmp-{_PID}", "detdiff/atomic.py"),
    TempName("", rf"checkpoint\.pt\.tmp-{_PID}", "detdiff/train/checkpoint.py"),
    TempName("", rf"object_features\.npy\.tmp-{_PID}", "detdiff/train/evaluate.py"),
    TempName("", r"[\w.-]+\.(?:csv|json|parquet)\.tmp", "detdiff/analysis/tables.py"),
    TempName("", r"dataset\.npz\.tmp\.npz", "detdiff/data/coco.py"),
    TempName("cache", rf"\.write-probe-{_PID}", "detdiff/data/image_cache.py"),
    TempName("cache", rf"(?:images|crops|tiles)\.(?:u8|jpgrows)\.tmp-{_PID}", "detdiff/data/cache_shards.py"),
    TempName("cache", rf"(?:meta|decode-progress)\.tmp-{_PID}\.npz", "detdiff/data/image_cache.py"),
    TempName("cache", rf"(?:problems|fingerprint)\.json\.tmp-{_PID}", "detdiff/atomic.py"),
    TempName(SHARD_FOLDERS, rf"\.write-probe-{_PID}", "detdiff/data/image_cache.py"),
    TempName(SHARD_FOLDERS, rf"(?:meta|decode-progress)\.tmp-{_PID}\.npz", "detdiff/data/image_cache.py"),
    TempName(SHARD_FOLDERS, rf"(?:problems|fingerprint)\.json\.tmp-{_PID}", "detdiff/atomic.py"),
    TempName("log", rf"epoch_\d{{4}}(?:\.rank\d+)?\.tmp-{_PID}", "detdiff/train/loss_log.py"),
    TempName("log", r"epoch_\d{4}\.rank\d+", "detdiff/train/loss_log.py"),
    TempName("crossfit", rf"(?:fold_\d+|predictions)\.tmp-{_PID}\.npz", "detdiff/crossfit/folds.py"),
    TempName("crossfit", rf"places\.tmp-{_PID}\.npy", "detdiff/crossfit/places.py"),
    TempName("report", rf"\.index\.html\.tmp-{_PID}", "detdiff/report/html.py"),
    TempName("plots", rf"[\w.-]+\.png\.tmp-{_PID}", "detdiff/report/plots.py"),
)


def _alive(pid: int) -> bool:
    """Whether process ``pid`` exists (and is not this one)."""
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _size(path: Path) -> int:
    """Bytes on disk of a file or of a folder's files (allocated blocks where known: a sparse file counts what
    it holds)."""
    paths = [path] if not path.is_dir() else [p for p in path.rglob("*") if p.is_file()]
    total = 0
    for p in paths:
        try:
            st = p.lstat()
        except OSError:
            continue
        total += st.st_blocks * 512 if hasattr(st, "st_blocks") else st.st_size
    return total


def _folders(rundir: Path, folder: str) -> list[Path]:
    """The folders ``folder`` (a path under ``rundir``, or a glob pattern of such paths) names that exist."""
    if any(c in folder for c in "*?["):
        return sorted(p for p in rundir.glob(folder) if p.is_dir() and not p.is_symlink())
    where = rundir / folder if folder else rundir
    return [where] if where.is_dir() else []


def find_leftovers(rundir: str | Path) -> list[Path]:
    """Temporary files and folders in ``rundir`` left by runs that are no longer running, sorted."""
    rundir = Path(rundir)
    found = []
    for folder in sorted({t.folder for t in TEMP_NAMES}):
        names = [t for t in TEMP_NAMES if t.folder == folder]
        for where in _folders(rundir, folder):
            for path in where.iterdir():
                match = next((m for t in names if (m := t.matches(path.name))), None)
                if match is None or path.is_symlink():
                    continue
                pid = match.groupdict().get("pid")
                if pid is not None and _alive(int(pid)):
                    continue
                found.append(path)
    return sorted(found)


def remove_leftovers(rundir: str | Path) -> tuple[int, int]:
    """Remove :func:`find_leftovers`; returns (how many, bytes given back)."""
    count = freed = 0
    for path in find_leftovers(rundir):
        size = _size(path)
        try:
            if path.is_dir():
                shutil.rmtree(path)
            else:
                path.unlink()
        except FileNotFoundError:
            continue
        count, freed = count + 1, freed + size
    return count, freed


def leftovers_line(rundir: str | Path, count: int, freed: int) -> str:
    """One line telling the user what :func:`remove_leftovers` did."""
    files = "file" if count == 1 else "files"
    return (f"detdiff: removed {count} temporary {files} of an interrupted run from {rundir} "
            f"({size_text(freed)} reclaimed)")
