"""Read a run folder for the reports, and say in plain sentences what it found.

Three things live here because the HTML page and the terminal both need them:

- :class:`RunFolder` reads the tables and JSON files ``detdiff audit`` wrote (DEVELOPERS.md "Run folder"),
  tolerating optional files that are missing (an empty table, an empty dict) so a partial run still reports.
- :func:`sourcing_advice` turns ``causes.csv`` lift rows and ``suspects.csv`` into sentences that each
  carry their number ("Images with >= 12 boxes are 3.4 times as common among the hardest tenth for box
  regression as in the dataset (31% vs 9%).").
- :func:`terminal_summary` is the short text printed at the end of ``detdiff audit``.

Scores are accumulated losses: higher = harder. Sentences are plain text; the HTML writer escapes them.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

STREAMS: tuple[str, ...] = ("loc", "pos", "neg")
STREAM_TITLES: dict[str, str] = {"loc": "Box regression", "pos": "Positive class", "neg": "Background class"}
#: how a stream is named inside a sentence ("... among the hardest tenth for <this> ...")
STREAM_PHRASES: dict[str, str] = {"loc": "box regression", "pos": "the positive-class loss",
                                  "neg": "the background-class loss"}
SUSPECT_KINDS: tuple[str, ...] = ("wrong_class", "missing_box", "loose_box", "duplicate_box")

#: descriptor column -> words used in sentences
DESCRIPTOR_WORDS: dict[str, str] = {
    "box_count": "box count", "crowding": "crowding", "blur_laplacian_var": "sharpness (Laplacian variance)",
    "brightness": "brightness", "contrast": "contrast", "clutter_edge_density": "background clutter (edge density)",
    "resolution": "resolution", "area": "area", "size_bin": "size", "rel_size": "size relative to the image",
    "aspect": "aspect ratio", "max_iou": "overlap with another box (max IoU)", "occlusion": "occlusion",
    "truncation": "truncation", "class_freq": "class frequency", "feature_dist": "distance from the class centre",
    "elongation": "elongation",
}
_FRACTION_WORDS = {0.5: "half", 0.25: "quarter", 0.2: "fifth", 0.1: "tenth", 0.05: "twentieth", 0.01: "hundredth"}
_COMPARISON = re.compile(r"^\s*(>=|<=|==|!=|>|<|≥|≤)")
_BOXES = re.compile(r"\bbox(es)?$")
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")

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


def read_table(path: Path, columns: tuple[str, ...]) -> pd.DataFrame:
    """Read one analysis CSV; a missing file gives an empty table with ``columns``.

    Only empty cells are missing values (``keep_default_na=False``), so text such as ``NA`` survives, and the
    text columns are always strings (empty -> ``""``). ``significant`` / ``usable`` become real booleans.
    """
    if not path.exists():
        return pd.DataFrame({c: pd.Series(dtype="float64") for c in columns})
    try:
        header = pd.read_csv(path, nrows=0).columns
        table = pd.read_csv(path, keep_default_na=False, na_values=[""],
                            dtype={c: str for c in _TEXT_COLUMNS if c in header})
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise ValueError(f"{path}: cannot read table: {exc}") from exc
    for column in columns:
        if column not in table:
            table[column] = np.nan
    for column in _TEXT_COLUMNS:
        if column in table:
            table[column] = table[column].fillna("").astype(str)
    for column in ("significant", "usable", "never_learned"):
        if column in table:
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

    @classmethod
    def load(cls, rundir: str | Path) -> RunFolder:
        """Read RUNDIR; ``images.csv`` is required, every other file is optional."""
        root = Path(rundir)
        if not (root / "images.csv").exists():
            raise FileNotFoundError(f"{root / 'images.csv'}: not found; is {root} a detdiff run folder?")
        tables = {name: read_table(root / f"{name}.csv", cols) for name, cols in _TABLE_COLUMNS.items()}
        return cls(root=root, **tables, metrics=_read_json(root / "metrics.json", {}),
                   findings=_read_json(root / "findings.json", {}), run=_read_json(root / "run.json", {}))

    @property
    def config(self) -> dict[str, Any]:
        config = self.run.get("config")
        return config if isinstance(config, dict) else {}

    def setting(self, section: str, key: str, default: Any) -> Any:
        """``run.json`` config value ``section.key``, or ``default`` when the run did not record it."""
        value = self.config.get(section, {})
        return value.get(key, default) if isinstance(value, dict) else default

    @property
    def top_fraction(self) -> float:
        return float(self.setting("analysis", "top_fraction", 0.1))

    @property
    def report_path(self) -> Path:
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

    def quality_warning(self) -> str:
        """One plain sentence when the detector is not trustworthy, else ``""``."""
        if self.trustworthy():
            return ""
        text = self.metrics.get("warning")
        if isinstance(text, str) and text.strip():
            return text.strip()
        return (f"The detector reached AP50 {format_ap(self.metrics.get('AP50'))}, below "
                f"{format_ap(self.metrics.get('min_ap50'))}: treat its difficulty scores with caution.")


# ----------------------------------------------------------------------------------------------- wording

def plain(text: Any) -> str:
    """A dataset string made safe for a terminal: control characters (escape sequences) become ``?``."""
    return _CONTROL.sub("?", str(text))


def format_ap(value: Any) -> str:
    """AP as ``0.412``; COCOeval's ``-1`` (no object in that bin) and missing values as ``n/a``."""
    if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value) or value < 0:
        return "n/a"
    return f"{value:.3f}"


def format_percent(rate: float) -> str:
    """A share (0-1) as ``31%``; ``0.4%`` below one percent. Values above 1 are taken as percents already."""
    if not math.isfinite(rate):
        return "n/a"
    percent = rate if rate > 1 else 100 * rate
    return f"{percent:.1f}%" if 0 < percent < 1 else f"{percent:.0f}%"


def fraction_words(fraction: float) -> str:
    """``0.1`` -> ``tenth`` (the hardest tenth), otherwise ``12%``."""
    for value, word in _FRACTION_WORDS.items():
        if math.isclose(fraction, value):
            return word
    return format_percent(fraction)


def descriptor_words(descriptor: str) -> str:
    """The words for a descriptor column in sentences (``clutter_edge_density`` -> ``background clutter ...``)."""
    return DESCRIPTOR_WORDS.get(descriptor, descriptor.replace("_", " "))


def cause_subject(level: str, descriptor: str, bin_text: str) -> str:
    """Who a causes.csv row is about, e.g. ``Images with >= 12 boxes`` or ``Small objects``.

    ``bin`` forms understood: a count of boxes (``2-4 boxes``, ``>= 12 boxes``), a comparison (``< 0.3``), a
    quartile range (``0.3 to < 0.5``), an interval (``[12, 20)``), a COCO size bin (``small``), the fixed
    overlap / occlusion / truncation labels, ``low`` / ``high``, or empty (read as "high").
    """
    noun = "Images" if level == "image" else "Objects"
    words = descriptor_words(descriptor)
    text = bin_text.strip()
    lower = text.lower()
    if descriptor in ("area", "size_bin") and lower in ("small", "medium", "large"):
        return f"{text.capitalize()} objects"
    if descriptor in ("category", "category_name", "class"):
        return f"Objects labelled '{text}'"
    if not text:
        return f"{noun} with high {words}"
    if lower in ("low", "high"):
        return f"{noun} with {lower} {words}"
    if _BOXES.search(text):
        return f"{noun} with {text}"
    if descriptor == "box_count" and _COMPARISON.match(text):
        return f"Images with {text} boxes"
    if descriptor == "max_iou" and lower.startswith("iou"):
        return f"Objects overlapping another box at {text}"
    if descriptor == "occlusion" and "covered" in lower:
        return f"Objects {text} by other boxes"
    if lower.startswith(("no ", "not ", "at ", "inside ")):
        return f"{noun} with {text}" if lower.startswith("no ") else f"{noun} {text}"
    if _COMPARISON.match(text):
        return f"{noun} with {words} {text}"
    if " to " in text:
        return f"{noun} with {words} from {text}"
    if text[0] in "[(":
        return f"{noun} with {words} in {text}"
    return f"{noun} with {words} = {text}"


def lift_sentence(row: pd.Series, top_fraction: float) -> str:
    """One causes.csv lift row as a sentence with its lift and the two rates."""
    subject = cause_subject(str(row["level"]), str(row["descriptor"]), str(row["bin"]))
    lift = float(row["effect"])
    times = f"{lift:.1f} times" if lift >= 1 else f"only {lift:.2f} times"
    return (f"{subject} are {times} as common among the hardest {fraction_words(top_fraction)} for "
            f"{STREAM_PHRASES.get(str(row['stream']), str(row['stream']))} as in the dataset "
            f"({format_percent(float(row['top_rate']))} vs {format_percent(float(row['base_rate']))}).")


def rank_correlation(test: Any, effect: Any) -> np.ndarray:
    """Spearman rho as is; a Mann-Whitney effect A = P(flagged scores higher) as the rank-biserial
    correlation 2A - 1 (Glass 1965), so both read on -1..1 with 0 = no association. Element-wise ``[n]``."""
    effect = np.asarray(pd.to_numeric(pd.Series(np.atleast_1d(effect)), errors="coerce"), dtype=np.float64)
    return np.where(np.atleast_1d(np.asarray(test)) == "mannwhitney", 2.0 * effect - 1.0, effect)


def spearman_phrase(row: pd.Series) -> str:
    """``box count rho +0.42``; Mann-Whitney rows as ``Objects at the border score higher 62% of the time``."""
    effect = float(row["effect"])
    if row["test"] == "mannwhitney":
        subject = cause_subject(str(row["level"]), str(row["descriptor"]), str(row["bin"]))
        return f"{subject} score higher {format_percent(effect)} of the time"
    level = "" if row["level"] == "image" else "object "
    return f"{level}{descriptor_words(str(row['descriptor']))} rho {effect:+.2f}"


def significant_causes(causes: pd.DataFrame, stream: str | None = None) -> pd.DataFrame:
    """Significant rows, strongest first: lifts above 1 by lift, then Spearman / Mann-Whitney rows by the
    size of their rank correlation (see :func:`rank_correlation`)."""
    rows = causes[causes["significant"].astype(bool)]
    if stream is not None:
        rows = rows[rows["stream"] == stream]
    effect = pd.to_numeric(rows["effect"], errors="coerce")
    lifts = rows[(rows["test"] == "lift") & (effect > 1)]
    lifts = lifts.iloc[np.argsort(-effect[lifts.index].to_numpy(), kind="stable")]
    ranked = rows[rows["test"].isin(["spearman", "mannwhitney"])]
    strength = np.abs(rank_correlation(ranked["test"].to_numpy(), effect[ranked.index].to_numpy()))
    ranked = ranked.iloc[np.argsort(-strength, kind="stable")]
    return pd.concat([lifts, ranked])


@dataclass(frozen=True)
class Advice:
    """One sourcing sentence: ``action`` is ``collect`` (a cause) or ``relabel`` / ``fix`` (suspects, lint)."""

    action: str
    text: str
    number: float
    stream: str | None = None
    emphasis: str = ""   # the part of ``text`` that states the number, set in bold by the HTML page


def _share_clause(total: int, count: int, what: str) -> str:
    if total == 1:
        return f" ({what})"
    if count == total:
        return f", all of them {what}"
    return f", {count} of them {what}"


def _plural(count: int, word: str) -> str:
    return f"{count} {word}" if count == 1 else f"{count} {word}es" if word.endswith("x") else f"{count} {word}s"


def _most_common(values: pd.Series) -> tuple[str, int]:
    counts = values[values != ""].value_counts(sort=True)
    if counts.empty:
        return "", 0
    return str(counts.index[0]), int(counts.iloc[0])


def suspect_advice(run: RunFolder) -> list[Advice]:
    """One relabel sentence per suspect kind present, naming its most common class (and count)."""
    suspects = run.suspects
    if suspects.empty:
        return []
    names = run.category_names()
    labelled_by_ann = run.objects.dropna(subset=["annotation_id"]).set_index("annotation_id")["category_name"]
    labelled_by_ann = labelled_by_ann[~labelled_by_ann.index.duplicated()]
    ann = pd.to_numeric(suspects["annotation_id"], errors="coerce")
    labelled = ann.map(labelled_by_ann).fillna("").astype(str)
    sug_ids = pd.to_numeric(suspects["suggested_category_id"], errors="coerce")
    suggested = sug_ids.map(names).fillna("").astype(str)
    unnamed = sug_ids.notna() & (suggested == "")
    suggested[unnamed] = "category " + sug_ids[unnamed].astype(np.int64).astype(str)
    out: list[Advice] = []
    for kind in SUSPECT_KINDS:
        mask = suspects["kind"] == kind
        total = int(mask.sum())
        if not total:
            continue
        if kind == "wrong_class":
            pairs = pd.DataFrame({"suggested": suggested[mask], "labelled": labelled[mask]})
            pairs = pairs[(pairs["suggested"] != "") & (pairs["labelled"] != "")].value_counts(sort=True)
            clause = ""
            if len(pairs):
                (sug, lab), count = pairs.index[0], int(pairs.iloc[0])
                clause = _share_clause(total, count, f"'{sug}' labelled '{lab}'")
            text = f"Relabel {_plural(total, 'box')} suspected of the wrong class{clause}."
        elif kind == "missing_box":
            name, count = _most_common(suggested[mask])
            clause = _share_clause(total, count, f"'{name}'") if name else ""
            text = (f"Add {_plural(total, 'missing box')} where the detector keeps finding an unlabelled "
                    f"object{clause}.")
        else:
            name, count = _most_common(labelled[mask])
            clause = _share_clause(total, count, f"'{name}'") if name else ""
            verb, adjective = ("Tighten", "loose") if kind == "loose_box" else ("Remove", "duplicate")
            text = f"{verb} {_plural(total, adjective + ' box')}{clause}."
        out.append(Advice("relabel", text, float(total), emphasis=str(total)))
    return out


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


def lint_totals(findings: dict[str, Any]) -> dict[str, int]:
    """Findings per severity (findings.json ``totals``, else summed from :func:`lint_code_counts`)."""
    totals = findings.get("totals") if isinstance(findings, dict) else None
    if isinstance(totals, dict) and totals:
        return {str(k): int(v) for k, v in totals.items() if isinstance(v, (int, float))}
    return {str(k): int(v) for k, v in lint_code_counts(findings).groupby("severity")["count"].sum().items()}


def lint_advice(run: RunFolder) -> list[Advice]:
    """A sentence for lint errors (they come first: nothing else is trustworthy on a broken file)."""
    codes = lint_code_counts(run.findings)
    errors = codes[codes["severity"] == "error"]
    total = int(lint_totals(run.findings).get("error", errors["count"].sum()))
    if total <= 0:
        return []
    listed = ", ".join(f"{r.code} ({r.count:,})" for r in errors.head(3).itertuples())
    text = f"Fix {_plural(total, 'error')} found in the annotation file first" + (f": {listed}." if listed else ".")
    return [Advice("fix", text, float(total), emphasis=_plural(total, "error"))]


def sourcing_advice(run: RunFolder, *, limit: int = 8) -> list[Advice]:
    """What to fix, relabel and collect, each sentence carrying its number; at most ``limit`` cause lines."""
    causes = significant_causes(run.causes)
    lifts = causes[causes["test"] == "lift"].head(limit)
    collect = [Advice("collect", lift_sentence(row, run.top_fraction), float(row["effect"]), str(row["stream"]),
                      emphasis=f"{float(row['effect']):.1f} times") for _, row in lifts.iterrows()]
    return lint_advice(run) + suspect_advice(run) + collect


def terminal_summary(rundir: str | Path) -> str:
    """Short plain text for the end of ``detdiff audit``: AP50 (+ warning), causes, suspects, report path."""
    run = RunFolder.load(rundir)
    info = run.run
    lines = [f"detdiff audit: {info.get('num_images', len(run.images))} images "
             f"({info.get('num_usable_images', int(run.images['usable'].sum()))} usable), "
             f"{info.get('num_annotations', len(run.objects))} boxes, "
             f"{info.get('num_categories', len(run.classes))} classes"]
    lines.append(f"Detector: AP50 {format_ap(run.metrics.get('AP50'))} (AP {format_ap(run.metrics.get('AP'))})")
    warning = run.quality_warning()
    if warning:
        lines.append(f"  WARNING: {plain(warning)}")
    lines.append(f"Strongest causes (hardest {fraction_words(run.top_fraction)} vs dataset):")
    width = max(len(t) for t in STREAM_TITLES.values())
    for stream in STREAMS:
        rows = significant_causes(run.causes, stream).head(2)
        parts = [f"{cause_subject(str(r['level']), str(r['descriptor']), str(r['bin']))} "
                 f"{float(r['effect']):.1f}x ({format_percent(float(r['top_rate']))} vs "
                 f"{format_percent(float(r['base_rate']))})" if r["test"] == "lift" else spearman_phrase(r)
                 for _, r in rows.iterrows()]
        lines.append(f"  {STREAM_TITLES[stream].lower():<{width}}  {plain('; '.join(parts)) or 'none significant'}")
    kinds = run.suspects["kind"].value_counts()
    counts = ", ".join(f"{int(kinds.get(kind, 0))} {kind}" for kind in SUSPECT_KINDS)
    lines.append(f"Suspected label errors (ranked by evidence, review from the top): {counts}")
    written = "" if run.report_path.exists() else " (not written yet)"
    lines.append(f"Report: {run.report_path}{written}")
    return "\n".join(lines)
