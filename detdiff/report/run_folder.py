"""Read a run folder for the reports: the tables and JSON files ``detdiff audit`` wrote.

:class:`RunFolder` reads them (DEVELOPERS.md "Run folder"), tolerating optional files that are missing (an
empty table, an empty dict) so a partial run still reports. :func:`lint_code_counts` and :func:`lint_totals`
count the lint findings of ``findings.json``. The HTML page, the plots, the sentences of
:mod:`detdiff.report.advice` and the terminal summary all read a run through here.
"""

from __future__ import annotations

import importlib.util
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from detdiff.report.wording import format_ap

#: the loss streams scored per image and object (``<stream>_score`` columns, causes.csv ``stream``)
STREAMS: tuple[str, ...] = ("loc", "pos", "neg")
#: the kinds of suspected label error (suspects.csv ``kind``), in the order the reports list them
SUSPECT_KINDS: tuple[str, ...] = ("wrong_class", "missing_box", "loose_box", "duplicate_box")

#: text columns read as strings whatever they look like (a category called "NA" or "1" stays text)
_TEXT_COLUMNS = ("file_name", "category_name", "why", "evidence", "kind", "stream", "level", "descriptor",
                 "test", "bin", "region", "size_bin")
_TABLE_COLUMNS: dict[str, tuple[str, ...]] = {
    "images": ("image_id", "file_name", "width", "height", "usable", "loc_score", "pos_score", "neg_score",
               "loc_pct", "pos_pct", "neg_pct", "box_count", "why"),
    "objects": ("annotation_id", "image_id", "category_id", "category_name", "x", "y", "w", "h", "loc_score",
                "pos_score", "loc_pct", "pos_pct", "map_x", "map_y", "why"),
    "suspects": ("kind", "image_id", "annotation_id", "x", "y", "w", "h", "suggested_category_id",
                 "suggested_x", "suggested_y", "suggested_w", "suggested_h", "score", "evidence"),
    "classes": ("category_id", "category_name", "images", "objects", "median_loc_score", "median_pos_score",
                "suspects", "suspect_share"),
    "causes": ("stream", "level", "descriptor", "test", "bin", "effect", "ci_low", "ci_high", "p_value",
               "q_value", "significant", "n", "top_rate", "base_rate"),
}


def parquet_copy(path: Path) -> Path | None:
    """The Parquet copy of the CSV ``path`` when there is one at least as new as the CSV and pyarrow can read it."""
    parquet = path.with_suffix(".parquet")
    try:
        fresh = parquet.stat().st_mtime_ns >= (path.stat().st_mtime_ns if path.exists() else 0)
    except OSError:
        return None
    return parquet if fresh and importlib.util.find_spec("pyarrow") is not None else None


def read_table(path: Path, columns: tuple[str, ...] = (), *, only: list[str] | None = None) -> pd.DataFrame:
    """Read one analysis CSV (from its Parquet copy when :func:`parquet_copy` finds one: the same table, read
    faster); a missing file gives an empty table with ``columns``. ``only``: read just these columns (from a
    Parquet copy only they are read at all).

    Only empty cells are missing values (``keep_default_na=False``), so text such as ``NA`` survives, and the
    text columns are always strings (empty -> ``""``). ``significant`` / ``usable`` become real booleans.
    """
    parquet = parquet_copy(path)
    if parquet is None and not path.exists():
        return pd.DataFrame({c: pd.Series(dtype="float64") for c in columns})
    try:
        if parquet is not None:     # without pandas' metadata, columns come back with the types a CSV gives
            import pyarrow.parquet

            table = pyarrow.parquet.read_table(parquet, columns=only).to_pandas(ignore_metadata=True)
        else:
            header = pd.read_csv(path, nrows=0).columns
            table = pd.read_csv(path, keep_default_na=False, na_values=[""], usecols=only,
                                dtype={c: str for c in _TEXT_COLUMNS if c in header})
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError, OSError) as exc:
        raise ValueError(f"{parquet or path}: cannot read table: {exc}") from exc
    for column in columns:
        if column not in table:
            table[column] = np.nan
    for column in _TEXT_COLUMNS:
        if column in table:
            table[column] = table[column].fillna("").astype(str)
    for column in ("significant", "usable", "never_learned", "probe"):
        if column in table and table[column].dtype != bool:
            table[column] = table[column].astype(str).str.strip().str.lower().isin(["true", "1", "yes"])
    return table


def _read_json(path: Path, default: Any) -> Any:
    if not path.exists():
        return default
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise ValueError(f"{path}: not valid JSON ({exc})") from exc


@dataclass
class RunFolder:
    """Everything the reports read from one RUNDIR; tables keep the CSV row order (= dataset order)."""

    root: Path
    images: pd.DataFrame
    objects: pd.DataFrame
    suspects: pd.DataFrame
    classes: pd.DataFrame
    causes: pd.DataFrame
    metrics: dict[str, Any] = field(default_factory=dict)
    findings: dict[str, Any] = field(default_factory=dict)
    run: dict[str, Any] = field(default_factory=dict)
    self_check: dict[str, Any] = field(default_factory=dict)
    recipe: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def load(cls, rundir: str | Path) -> RunFolder:
        """Read RUNDIR; ``images.csv`` is required, every other file is optional."""
        root = Path(rundir)
        if not (root / "images.csv").exists():
            raise FileNotFoundError(f"{root / 'images.csv'}: not found; is {root} a detdiff run folder?")
        tables = {name: read_table(root / f"{name}.csv", cols) for name, cols in _TABLE_COLUMNS.items()}
        return cls(root=root, **tables, metrics=_read_json(root / "metrics.json", {}),
                   findings=_read_json(root / "findings.json", {}), run=_read_json(root / "run.json", {}),
                   self_check=_read_json(root / "self_check.json", {}), recipe=_read_json(root / "recipe.json", {}))

    @property
    def config(self) -> dict[str, Any]:
        """The configuration the run recorded in ``run.json`` (empty when it recorded none)."""
        config = self.run.get("config")
        return config if isinstance(config, dict) else {}

    def setting(self, section: str, key: str, default: Any) -> Any:
        """``run.json`` config value ``section.key``, or ``default`` when the run did not record it."""
        value = self.config.get(section, {})
        return value.get(key, default) if isinstance(value, dict) else default

    @property
    def top_fraction(self) -> float:
        """The share of items counted as the hardest (``analysis.top_fraction``)."""
        return float(self.setting("analysis", "top_fraction", 0.1))

    @property
    def report_path(self) -> Path:
        """Where the HTML page of this run is (or will be) written."""
        return self.root / "report" / "index.html"

    def category_names(self) -> dict[int, str]:
        """category_id -> name, from classes.csv, completed from objects.csv."""
        names: dict[int, str] = {}
        for table in (self.objects, self.classes):
            rows = table[["category_id", "category_name"]].dropna(subset=["category_id"])
            names.update(zip(rows["category_id"].astype(np.int64).tolist(), rows["category_name"].tolist()))
        return names

    def trustworthy(self) -> bool:
        """The detector is good enough for its scores to mean something (metrics.json, else AP50 >= min)."""
        if "trustworthy" in self.metrics:
            return bool(self.metrics["trustworthy"])
        ap50, minimum = self.metrics.get("AP50"), self.metrics.get("min_ap50")
        if isinstance(ap50, (int, float)) and isinstance(minimum, (int, float)):
            return ap50 >= minimum
        return True

    def list_check(self, kind: str) -> dict[str, Any]:
        """The self-check figures of one suspect kind (``self_check.json``), {} when the run measured none."""
        value = self.self_check.get(kind)
        return value if isinstance(value, dict) else {}

    def expected_precision(self, kind: str) -> tuple[float, str] | None:
        """A list's self-estimated precision and the way it usually leans against the truth: ``"high"`` (loose
        boxes), ``"low"`` (missing boxes) or ``""``; None when the run estimated none. Run folders written before
        the lean replaced a one-sided bound keep their ``expected_precision_bound`` (upper / lower). An estimate
        at the end of its range (1.00 that "reads low") cannot lean that way and is given without a lean."""
        check = self.list_check(kind)
        value = check.get("expected_precision")
        if not isinstance(value, (int, float)) or value != value:
            return None
        lean = check.get("expected_precision_lean")
        if lean is None:
            lean = {"upper": "high", "lower": "low"}.get(check.get("expected_precision_bound"), "")
        value = float(value)
        at_end = (lean == "low" and value >= 0.995) or (lean == "high" and value < 0.005)
        return value, lean if lean in ("high", "low") and not at_end else ""

    def quality_warning(self) -> str:
        """One plain sentence when the detector is not trustworthy, else ``""``."""
        if self.trustworthy():
            return ""
        text = self.metrics.get("warning")
        if isinstance(text, str) and text.strip():
            return text.strip()
        return (f"The detector reached AP50 {format_ap(self.metrics.get('AP50'))}, below "
                f"{format_ap(self.metrics.get('min_ap50'))}: treat its difficulty scores with caution.")


def lint_code_counts(findings: dict[str, Any]) -> pd.DataFrame:
    """Lint findings per code: columns severity, code, count (descending count).

    Uses findings.json ``codes`` (exact even when the listed findings are capped per code), else counts
    the ``findings`` list.
    """
    codes = findings.get("codes") if isinstance(findings, dict) else None
    if isinstance(codes, dict) and codes:
        rows = [{"severity": str(v.get("severity", "")), "code": str(c), "count": int(v.get("count", 0))}
                for c, v in codes.items() if isinstance(v, dict)]
        table = pd.DataFrame(rows, columns=["severity", "code", "count"])
    else:
        listed = findings.get("findings") if isinstance(findings, dict) else None
        records = [f for f in listed if isinstance(f, dict)] if isinstance(listed, list) else []
        table = pd.DataFrame(records, columns=["severity", "code"]).fillna("").astype(str)
        table = table.groupby(["severity", "code"]).size().reset_index(name="count")
    return table.sort_values(["count", "code"], ascending=[False, True], kind="stable").reset_index(drop=True)


def epochs_cut(info: dict[str, Any]) -> tuple[int, int] | None:
    """``(done, planned)`` epochs where the time limit (``train.time_limit``) ended training early, from ``run.json``;
    None otherwise."""
    done, planned = info.get("epochs_done"), info.get("epochs_planned")
    if isinstance(done, int) and isinstance(planned, int) and done < planned:
        return done, planned
    return None


def lean_clause(lean: str, before: str, after: str) -> str:
    """"usually reads high" / "usually reads low" between ``before`` and ``after`` for a list's expected precision
    (:meth:`RunFolder.expected_precision`), ``""`` where the estimate has no usual lean."""
    return f"{before}usually reads {lean}{after}" if lean in ("high", "low") else ""


def lint_totals(findings: dict[str, Any]) -> dict[str, int]:
    """Findings per severity (findings.json ``totals``, else summed from :func:`lint_code_counts`)."""
    totals = findings.get("totals") if isinstance(findings, dict) else None
    if isinstance(totals, dict) and totals:
        return {str(k): int(v) for k, v in totals.items() if isinstance(v, (int, float))}
    return {str(k): int(v) for k, v in lint_code_counts(findings).groupby("severity")["count"].sum().items()}
