"""Python API: the same pipeline as the CLI, returning pandas DataFrames with the CSV columns.

>>> import detdiff
>>> run = detdiff.audit("ann.json", images="imgs/", out="runs/a", config="fast")   # doctest: +SKIP
>>> run.objects.sort_values("pos_score", ascending=False).head()                    # doctest: +SKIP
>>> run.suspects[run.suspects.kind == "wrong_class"]                                # doctest: +SKIP
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

import pandas as pd

TABLES = ("images", "objects", "suspects", "classes", "causes")


@dataclass
class AuditRun:
    """A finished run folder; tables are read on first use from its CSV files, or from their Parquet copies where
    pyarrow is installed (the same table, read faster). Either way text columns are strings (empty: ``""``) and
    ``usable`` / ``never_learned`` / ``probe`` / ``significant`` are booleans."""

    rundir: Path

    def table(self, name: str, columns: list[str] | None = None) -> pd.DataFrame:
        """One of :data:`TABLES`, or just some of its ``columns``: from a Parquet copy only those are read (two
        columns of an 860k-row objects table: about 50x faster than the whole CSV)."""
        from detdiff.report.run_folder import parquet_copy, read_table

        if name not in TABLES:
            raise ValueError(f"unknown table {name!r}; one of {', '.join(TABLES)}")
        path = self.rundir / f"{name}.csv"
        if not path.exists() and parquet_copy(path) is None:
            raise FileNotFoundError(f"{path}: table not written yet (run the audit or 'detdiff analyze')")
        return read_table(path, only=columns)

    @cached_property
    def images(self) -> pd.DataFrame:
        """One row per image: scores per stream (higher = harder), percentiles, descriptors, why tags."""
        return self.table("images")

    @cached_property
    def objects(self) -> pd.DataFrame:
        """One row per annotation: scores, learning dynamics, descriptors, why tags."""
        return self.table("objects")

    @cached_property
    def suspects(self) -> pd.DataFrame:
        """Suspected label errors (kind, ids, box, suggested fix, score, evidence)."""
        return self.table("suspects")

    @cached_property
    def classes(self) -> pd.DataFrame:
        return self.table("classes")

    @cached_property
    def causes(self) -> pd.DataFrame:
        """Effect of each descriptor on each stream (Spearman, lifts) with BH-corrected q-values."""
        return self.table("causes")

    @cached_property
    def self_check(self) -> dict[str, Any]:
        """The audit's own measurement of how well it finds each fault kind on this dataset (probes), {} if none."""
        path = self.rundir / "self_check.json"
        return json.loads(path.read_text()) if path.is_file() else {}

    @cached_property
    def metrics(self) -> dict[str, Any]:
        """COCOeval figures of the audit's own detector (how far its scores can be trusted)."""
        return json.loads((self.rundir / "metrics.json").read_text())

    @property
    def report_path(self) -> Path:
        return self.rundir / "report" / "index.html"


def audit(annotations: str | Path, images: str | Path, out: str | Path, *, config: str | Path | None = None,
          epochs: int | None = None, image_size: int | None = None, batch_size: int | None = None,
          device: str | None = None, seed: int | None = None, flips: str | None = None, budget: float | None = None,
          resume: bool = False, progress: bool = True, report: bool = True, thumbnails: bool | None = None) -> AuditRun:
    """Run the full audit (check, recipe, train with loss logging, cross-fit, analyse, report) and return the run.

    ``config`` is a YAML path or a packaged config's name; the keywords after it override its values
    (``flips``: ``none`` | ``horizontal`` | ``both`` | ``dihedral``, the ``train.flips`` key; ``budget``: minutes
    of the whole audit to fit the recipe to, default the config's ``recipe.budget_minutes``).
    """
    from detdiff.pipeline import run_audit, run_overrides

    overrides = run_overrides(image_size=image_size, epochs=epochs, batch_size=batch_size, device=device, seed=seed,
                              flips=flips, budget=budget)
    run_audit(annotations, images, out, config_path=config, overrides=overrides, resume=resume,
              progress=progress, make_report=report, thumbnails=thumbnails)
    return AuditRun(Path(out))


def plan_audit(annotations: str | Path, images: str | Path, out: str | Path, *, config: str | Path | None = None,
               epochs: int | None = None, image_size: int | None = None, batch_size: int | None = None,
               device: str | None = None, seed: int | None = None, flips: str | None = None,
               budget: float | None = None):
    """What :func:`audit` with the same arguments would cost on this machine, without doing it: lint, recipe and
    plan (``detdiff audit --plan``). Returns the :class:`detdiff.plan.Plan` (disk, seconds and memory per part,
    small objects), also written as ``out/plan.json``; raises when the disk cannot hold the audit."""
    from detdiff.pipeline import run_audit, run_overrides
    from detdiff.plan import read_plan

    overrides = run_overrides(image_size=image_size, epochs=epochs, batch_size=batch_size, device=device, seed=seed,
                              flips=flips, budget=budget)
    run_audit(annotations, images, out, config_path=config, overrides=overrides, progress=False, plan_only=True)
    return read_plan(out)


def open_run(rundir: str | Path) -> AuditRun:
    """Open an existing run folder."""
    rundir = Path(rundir)
    if not rundir.is_dir():
        raise FileNotFoundError(f"{rundir}: no such run folder")
    return AuditRun(rundir)


def check(annotations: str | Path, images: str | Path | None = None, *, verify_images: bool = False):
    """Lint a COCO file; returns the LintReport (``.findings``, ``.exit_status``, ``.to_json()``)."""
    from detdiff.data.lint import lint_coco

    return lint_coco(annotations, images, verify_images=verify_images)
