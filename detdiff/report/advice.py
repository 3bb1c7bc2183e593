"""Say in plain sentences what a run found: the strongest causes, and what to fix, relabel and collect.

:func:`sourcing_advice` turns ``causes.csv`` lift rows and ``suspects.csv`` into sentences that each carry
their number ("Images with >= 12 boxes are 3.4 times as common among the hardest tenth for box regression as
in the dataset (31% vs 9%)."); :func:`significant_causes` picks and orders the causes worth a sentence.

Scores are accumulated losses: higher = harder. Sentences are plain text; the HTML writer escapes them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from detdiff.report.run_folder import SUSPECT_KINDS, RunFolder, lean_clause, lint_code_counts, lint_totals
from detdiff.report.wording import STREAM_PHRASES, descriptor_words, format_percent, fraction_words

_COMPARISON = re.compile(r"^\s*(>=|<=|==|!=|>|<|≥|≤)")
_BOXES = re.compile(r"\bbox(es)?$")


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


def lift_sentence(row: pd.Series, top_fraction: float, folded: list[pd.Series] | None = None,
                  also: list[pd.Series] | None = None) -> str:
    """One causes.csv lift row as a sentence with its lift and the two rates; ``also``: the same bin's lifts for
    other streams, ``folded``: the lines of its stream whose hardest items are largely the same
    (:func:`detdiff.analysis.causes.fold_restatements`), each named with its lift."""
    subject = cause_subject(str(row["level"]), str(row["descriptor"]), str(row["bin"]))
    lift = float(row["effect"])
    times = f"{lift:.1f} times" if lift >= 1 else f"only {lift:.2f} times"
    others = "".join(f", and {float(r['effect']):.1f} times for "
                     f"{STREAM_PHRASES.get(str(r['stream']), str(r['stream']))}" for r in also or [])
    return (f"{subject} are {times} as common among the hardest {fraction_words(top_fraction)} for "
            f"{STREAM_PHRASES.get(str(row['stream']), str(row['stream']))} as in the dataset "
            f"({format_percent(float(row['top_rate']))} vs {format_percent(float(row['base_rate']))}){others}."
            + _restated_clause(str(row["level"]), folded or []))


def _restated_clause(level: str, folded: list[pd.Series]) -> str:
    """`` Most of the hardest images with A (3.0 times) or B (2.9 times) are these same images.`` ('' for none)."""
    if not folded:
        return ""
    noun = "images" if level == "image" else "objects"
    subjects = [cause_subject(str(r["level"]), str(r["descriptor"]), str(r["bin"])) for r in folded]
    prefix = f"{noun.capitalize()} with "
    common = all(s.startswith(prefix) for s in subjects)
    parts = [f"{s.removeprefix(prefix) if common else s[0].lower() + s[1:]} ({float(r['effect']):.1f} times)"
             for s, r in zip(subjects, folded)]
    listed = parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " or " + parts[-1]
    return f" Most of the hardest {noun + ' with ' if common else ''}{listed} are these same {noun}."


def folded_rows(causes: pd.DataFrame) -> dict[int, list[pd.Series]]:
    """Rows folded under each leading line (causes.csv ``same_items_as``), strongest first; empty for a table
    written before the fold existed."""
    if "same_items_as" not in causes:
        return {}
    lead = pd.to_numeric(causes["same_items_as"], errors="coerce").fillna(-1).astype(np.int64)
    rows = causes[lead >= 0]
    rows = rows.iloc[np.argsort(-pd.to_numeric(rows["effect"], errors="coerce").to_numpy(), kind="stable")]
    out: dict[int, list[pd.Series]] = {}
    for index, row in rows.iterrows():
        out.setdefault(int(lead[index]), []).append(row)
    return out


def cause_sentences(causes: pd.DataFrame, top_fraction: float, stream: str | None = None
                    ) -> list[tuple[str, pd.Series]]:
    """A sentence per significant lift line above 1 (strongest first) with its restatements folded in; across
    streams (``stream=None``) a bin already named for a stronger stream is added to that sentence. Returns
    (sentence, leading row) pairs."""
    causes = causes.reset_index(drop=True)
    folded = folded_rows(causes)
    rows = significant_causes(causes, stream)
    lines: dict[tuple[str, str, str], list[pd.Series]] = {}
    for _, row in rows[rows["test"] == "lift"].iterrows():       # lifts above 1 only (significant_causes)
        lines.setdefault((str(row["level"]), str(row["descriptor"]), str(row["bin"])), []).append(row)
    return [(lift_sentence(same[0], top_fraction, folded.get(int(same[0].name), []), same[1:]), same[0])
            for same in lines.values()]


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
    size of their rank correlation (see :func:`rank_correlation`); lift lines folded under a stronger one
    (``same_items_as``) are left out."""
    rows = causes[causes["significant"].astype(bool)]
    if "same_items_as" in rows:                    # restatements are named in their leading line's sentence
        rows = rows[pd.to_numeric(rows["same_items_as"], errors="coerce").fillna(-1) < 0]
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
            text = (f"Add {_plural(total, 'missing box')} where the detector found an object nobody "
                    f"labelled{clause}.")
        else:
            name, count = _most_common(labelled[mask])
            clause = _share_clause(total, count, f"'{name}'") if name else ""
            verb, adjective = ("Tighten", "loose") if kind == "loose_box" else ("Remove", "duplicate")
            text = f"{verb} {_plural(total, adjective + ' box')}{clause}."
        precision = run.expected_precision(kind)
        if precision:
            text = text[:-1] + (f" (about {precision[0]:.0%} of them expected to be real faults, measured on "
                                f"this dataset{lean_clause(precision[1], '; this estimate ', '')}).")
        out.append(Advice("relabel", text, float(total), emphasis=str(total)))
    return out


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
    collect = [Advice("collect", text, float(row["effect"]), str(row["stream"]),
                      emphasis=f"{float(row['effect']):.1f} times")
               for text, row in cause_sentences(run.causes, run.top_fraction)[:limit]]
    return lint_advice(run) + suspect_advice(run) + collect
