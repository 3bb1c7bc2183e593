"""The short plain-text summary printed at the end of ``detdiff audit`` (:func:`terminal_summary`)."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from detdiff.report.advice import cause_subject, significant_causes, spearman_phrase
from detdiff.report.run_folder import STREAMS, SUSPECT_KINDS, RunFolder, epochs_cut, lean_clause
from detdiff.report.wording import STREAM_TITLES, format_ap, format_percent, fraction_words

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")


def plain(text: Any) -> str:
    """A dataset string made safe for a terminal: control characters (escape sequences) become ``?``."""
    return _CONTROL.sub("?", str(text))


def terminal_summary(rundir: str | Path) -> str:
    """Short plain text for the end of ``detdiff audit``: AP50 (+ warning), causes, suspects, report path."""
    run = RunFolder.load(rundir)
    info = run.run
    lines = [f"detdiff audit: {info.get('num_images', len(run.images))} images "
             f"({info.get('num_usable_images', int(run.images['usable'].sum()))} usable), "
             f"{info.get('num_annotations', len(run.objects))} boxes, "
             f"{info.get('num_categories', len(run.classes))} classes"]
    lines.append(f"Detector: AP50 {format_ap(run.metrics.get('AP50'))} (AP {format_ap(run.metrics.get('AP'))})")
    cut = epochs_cut(info)
    if cut:
        lines.append(f"  training ended after {cut[0]} of {cut[1]} epochs to keep to train.time_limit "
                     f"({info['config']['train']['time_limit']} min); --budget MINUTES buys more")
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
    lines += self_check_lines(run)
    written = "" if run.report_path.exists() else " (not written yet)"
    lines.append(f"Report: {run.report_path}{written}")
    return "\n".join(lines)


def self_check_lines(run: RunFolder) -> list[str]:
    """How well the audit found the faults it planted itself, per kind, and what each cut list is expected to hold."""
    if not run.self_check:
        return []
    lines = ["Self-check (faults the audit planted itself, then looked for like any other):"]
    for kind in ("wrong_class", "loose_box", "missing_box"):
        check = run.list_check(kind)
        if not check:
            continue
        auroc, ci = check.get("auroc"), check.get("auroc_ci95")
        found = f"AUROC {auroc:.3f}" if isinstance(auroc, (int, float)) else "AUROC not measurable"
        if isinstance(ci, list) and all(isinstance(v, (int, float)) for v in ci):
            found += f" (95% CI {ci[0]:.3f}-{ci[1]:.3f})"
        if kind == "missing_box" and isinstance(auroc, (int, float)):
            found += " per image"
        if check.get("calibrated"):
            precision = run.expected_precision(kind)
            listed = f"list of {check.get('listed', 0)}"
            if precision:
                listed += f", expected precision about {precision[0]:.2f}" + lean_clause(precision[1], " (", ")")
            share = check.get("fault_share")
            if isinstance(share, (int, float)):
                listed += f"; about {share:.1%} of the {'proposals' if kind == 'missing_box' else 'boxes'} faulty"
        else:
            listed = "not calibrated: the evidence does not separate planted faults here, so no list"
        lines.append(f"  {kind:<12} {found}; {listed}")
    return lines
