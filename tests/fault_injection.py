"""Fault injection for whole audits: run ``detdiff audit`` in a child process with ``DETDIFF_FAULT`` set, then
resume it, and compare every output with an uninterrupted run (shared by tests/test_faults.py and
tests/benchmarks/bench_faults.py).

What "the same outputs" means (:func:`compare_runs`):

- the same set of files, none more (no temporary file left) and none fewer, and at most :data:`SIZE_SLACK`
  more bytes in all than the uninterrupted run (run.json's timing digits);
- byte-identical: every file not named below, i.e. config.yaml, findings.json, probes.json, metrics.json,
  detections.json, object_features.npy, the five CSV tables, review.json, cache/images.u8, cache/crops.u8,
  cache/problems.json, cache/fingerprint.json, every log/epoch_XXXX/*.npy, plots/*.png, report/thumbs/*.jpg;
- array-identical (``.npz`` zip members carry write times): dataset.npz, cache/meta.npz, crossfit/*.npz
  without the ``seconds`` timing;
- tensor-identical: checkpoint.pt (model, optimizer, scheduler, epoch, RNG states);
- identical but for timings: run.json without ``timings``, ``train_seconds``, ``images_per_second``,
  ``data_loading_share`` and keys ending in ``_seconds``; self_check.json without keys ending in
  ``_seconds``; recipe.json without ``estimate_seconds`` (times measured on the machine); plan.json without
  its measured times, memory, free and already-written bytes (:data:`PLAN_JSON_MEASURED`);
  report/index.html with the training-time and images-per-second cells masked.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

class DecodeInterrupt:
    """Stands in for ``image_cache._decode_task`` in a one-process cache build (``workers=1``): records the image
    index of every task, and after ``stop_after`` images raises KeyboardInterrupt as a Ctrl-C would; after
    :meth:`resume` it records without stopping (to see which images a resumed build decodes)."""

    def __init__(self, monkeypatch: Any, stop_after: int) -> None:
        from detdiff.data import image_cache

        self.real, self.calls, self.stop_after = image_cache._decode_task, [], stop_after
        monkeypatch.setattr(image_cache, "_decode_task", self)

    def __call__(self, task: tuple) -> dict[str, Any]:
        if self.stop_after is not None and len(self.calls) == self.stop_after:
            raise KeyboardInterrupt
        self.calls.append(task[0])
        return self.real(task)

    def resume(self) -> None:
        self.calls.clear()
        self.stop_after = None


#: The stages of detdiff.stages, in the order an audit runs them.
STAGES = ("check", "decode", "train", "evaluate", "crossfit", "summary", "analysis", "tables", "report")
REPO = Path(__file__).resolve().parent.parent
SIZE_SLACK = 512
RUN_JSON_TIMINGS = ("timings", "train_seconds", "images_per_second", "data_loading_share")
#: What plan.json holds of this machine and moment: the warm-up's measurements, memory, free and already-written
#: bytes (its time_seconds go with the _seconds suffix).
PLAN_JSON_MEASURED = ("warmup", "memory_bytes", "free", "on_disk", "more")
_HTML_TIMINGS = re.compile(r"(<td>(?:training time|views per second \(whole views and tiles\))</td>\s*<td>)[^<]*(</td>)")


@dataclass
class Launch:
    """One child ``detdiff audit``: its fault, exit status, output and seconds."""

    fault: str | None
    returncode: int
    stdout: str
    stderr: str
    seconds: float

    @property
    def tracebacks(self) -> int:
        return (self.stdout + self.stderr).count("Traceback (most recent call last)")


@dataclass
class Audit:
    """How to run the small audit of a test: its dataset, config name and extra arguments."""

    annotations: Path
    images: Path
    extra: list[str] = field(default_factory=lambda: ["--config", "ci", "--quiet"])

    def child_env(self, fault: str | None = None) -> dict[str, str]:
        """The environment of a child audit: this checkout first on the path, ``DETDIFF_FAULT=fault`` if given."""
        env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]))
        env.pop("DETDIFF_FAULT", None)
        if fault:
            env["DETDIFF_FAULT"] = fault
        return env

    def launch(self, rundir: Path, *, fault: str | None = None, resume: bool = False,
               timeout: float = 600) -> Launch:
        """Run the audit into ``rundir`` in a child process (``DETDIFF_FAULT=fault`` when given)."""
        env = self.child_env(fault)
        cmd = [sys.executable, "-m", "detdiff", "audit", str(self.annotations), "--images", str(self.images),
               "--out", str(rundir), *self.extra, *(["--resume"] if resume else [])]
        start = time.perf_counter()
        proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout, check=False)
        return Launch(fault, proc.returncode, proc.stdout, proc.stderr, time.perf_counter() - start)

    def trace(self, rundir: Path) -> tuple[Launch, dict[str, dict[str, float]]]:
        """An uninterrupted run with the trace hook: per stage (first time it runs) seconds, write-opens, disk use."""
        trace_file = rundir.parent / f"{rundir.name}.trace.jsonl"
        trace_file.unlink(missing_ok=True)
        launch = self.launch(rundir, fault=f"trace:{trace_file}")
        stages: dict[str, dict[str, float]] = {}
        for line in trace_file.read_text().splitlines():
            row = json.loads(line)
            stages.setdefault(row.pop("stage"), row)
        trace_file.unlink()
        return launch, stages


def fault_spec(stage: str, kind: str, fraction: float, stats: dict[str, float]) -> str:
    """``DETDIFF_FAULT`` value for a fault ``fraction`` (0-1) of the way into ``stage`` (time or write-opens)."""
    if kind == "kill":
        return f"{stage}:kill:{fraction * stats['seconds']:.4f}"
    opens = int(stats["write_opens"])
    return f"{stage}:enospc:{1 + min(opens - 1, int(fraction * opens)) if opens else 1}"


def check_launch(launch: Launch, kind: str) -> list[str]:
    """What is wrong with a faulted launch's ending: a kill ends by SIGKILL, a full disk with one line, exit 2."""
    problems = []
    if launch.tracebacks:
        problems.append(f"{launch.tracebacks} traceback(s)")
    if kind == "kill" and launch.returncode != -signal.SIGKILL:
        problems.append(f"exit status {launch.returncode}, not killed")
    if kind == "enospc":
        lines = [ln for ln in launch.stderr.splitlines() if ln.strip()]
        last = lines[-1] if lines else ""
        if launch.returncode != 2:
            problems.append(f"exit status {launch.returncode}, not 2")
        if "the disk is full" not in last or "--resume" not in last:
            problems.append(f"last line is not the disk-full line: {last!r}")
        if len([ln for ln in lines if ln.startswith("detdiff: ") and "disk is full" in ln]) != 1:
            problems.append("not exactly one disk-full line")
    return problems


def _files(root: Path) -> dict[str, Path]:
    return {str(p.relative_to(root)): p for p in sorted(root.rglob("*")) if p.is_file()}


def _drop(data: Any, keys: tuple[str, ...] = (), suffix: str | None = None) -> Any:
    if isinstance(data, dict):
        return {k: _drop(v, keys, suffix) for k, v in data.items()
                if k not in keys and not (suffix and k.endswith(suffix))}
    if isinstance(data, list):
        return [_drop(v, keys, suffix) for v in data]
    return data


def _same_npz(a: Path, b: Path, skip: tuple[str, ...] = ()) -> bool:
    with np.load(a) as x, np.load(b) as y:
        names = sorted(set(x.files) - set(skip))
        return names == sorted(set(y.files) - set(skip)) and all(
            x[n].dtype == y[n].dtype and np.array_equal(x[n], y[n], equal_nan=x[n].dtype.kind in "fc")
            for n in names)


def _same_tensors(a: Any, b: Any) -> bool:
    import torch

    if isinstance(a, torch.Tensor):
        return isinstance(b, torch.Tensor) and a.dtype == b.dtype and torch.equal(a, b)
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_same_tensors(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return isinstance(b, (list, tuple)) and len(a) == len(b) and all(map(_same_tensors, a, b))
    return a == b


def _same_file(rel: str, a: Path, b: Path) -> bool:
    name = Path(rel).name
    if rel in ("dataset.npz", "cache/meta.npz") or rel.startswith("crossfit/"):
        return _same_npz(a, b, skip=("seconds",))
    if rel == "checkpoint.pt":
        import torch

        return _same_tensors(torch.load(a, weights_only=True), torch.load(b, weights_only=True))
    if rel in ("run.json", "self_check.json", "recipe.json", "plan.json"):
        drop = {"run.json": (RUN_JSON_TIMINGS, "_seconds"), "self_check.json": ((), "_seconds"),
                "recipe.json": (("estimate_seconds",), None), "plan.json": (PLAN_JSON_MEASURED, "_seconds")}[rel]
        return _drop(json.loads(a.read_text()), *drop) == _drop(json.loads(b.read_text()), *drop)
    if name == "index.html":
        return _HTML_TIMINGS.sub(r"\1\2", a.read_text()) == _HTML_TIMINGS.sub(r"\1\2", b.read_text())
    return a.read_bytes() == b.read_bytes()


@dataclass
class Comparison:
    """How a resumed run differs from the uninterrupted one."""

    extra: list[str]
    missing: list[str]
    changed: list[str]
    extra_bytes: int

    @property
    def ok(self) -> bool:
        return not (self.extra or self.missing or self.changed) and self.extra_bytes <= SIZE_SLACK

    def __str__(self) -> str:
        return (f"extra files {self.extra}, missing {self.missing}, changed {self.changed}, "
                f"{self.extra_bytes:+d} bytes")


def compare_runs(run: Path, reference: Path) -> Comparison:
    """Compare run folder ``run`` with ``reference`` as the module docstring says."""
    mine, theirs = _files(run), _files(reference)
    common = sorted(set(mine) & set(theirs))
    changed = [rel for rel in common if not _same_file(rel, mine[rel], theirs[rel])]
    size = sum(p.stat().st_size for p in mine.values()) - sum(p.stat().st_size for p in theirs.values())
    return Comparison(sorted(set(mine) - set(theirs)), sorted(set(theirs) - set(mine)), changed, size)


def table_rows_changed(run: Path, reference: Path) -> int:
    """Rows of the five CSV tables that differ from the reference or are missing (a count for the benchmark)."""
    total = 0
    for name in ("images", "objects", "suspects", "classes", "causes"):
        a, b = run / f"{name}.csv", reference / f"{name}.csv"
        ref_rows = b.read_text().splitlines()
        rows = a.read_text().splitlines() if a.is_file() else []
        total += sum(1 for i, row in enumerate(ref_rows) if i >= len(rows) or rows[i] != row)
        total += max(0, len(rows) - len(ref_rows))
    return total
