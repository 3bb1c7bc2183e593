"""The result of one lint run: :class:`LintReport`, its JSON form and its text summary for ``detdiff check``."""

from __future__ import annotations

from collections import Counter
from dataclasses import asdict, dataclass
from typing import Any

from detdiff.data.lint.codes import CODES, SEVERITIES, Finding


@dataclass
class LintReport:
    """All findings of one annotation file plus what it holds (``counts``)."""

    ann_path: str
    findings: list[Finding]
    counts: dict[str, int]
    images_dir: str | None = None
    verify_images: bool = False

    @property
    def exit_status(self) -> int:
        """0 when clean or only info findings, 1 when there is any warning or error."""
        return int(any(f.severity != "info" for f in self.findings))

    def totals(self) -> dict[str, int]:
        """Number of findings per severity."""
        counted = Counter(f.severity for f in self.findings)
        return {s: counted.get(s, 0) for s in SEVERITIES}

    def _error_ids(self, record: str) -> set[int]:
        return {int(f.record_id) for f in self.findings
                if f.severity == "error" and f.record == record and not f.by_position}

    def error_image_ids(self) -> set[int]:
        """Ids of image records with an error: training must skip them (and their annotations)."""
        return self._error_ids("image")

    def error_annotation_ids(self) -> set[int]:
        """Ids of annotation records with an error: training must skip them."""
        return self._error_ids("annotation")

    def to_json(self, max_per_code: int | None = None) -> dict[str, Any]:
        """A JSON-ready dict; ``max_per_code`` caps the findings listed per code (totals stay exact)."""
        per_code = Counter(f.code for f in self.findings)
        listed: Counter[str] = Counter()
        findings = []
        for f in self.findings:
            if max_per_code is None or listed[f.code] < max_per_code:
                listed[f.code] += 1
                findings.append(asdict(f))
        return {
            "annotations": self.ann_path, "images_dir": self.images_dir, "verify_images": self.verify_images,
            "exit_status": self.exit_status, "counts": dict(self.counts), "totals": self.totals(),
            "codes": {c: {"severity": CODES[c][0], "count": n, "listed": listed[c]}
                      for c, n in sorted(per_code.items())},
            "findings": findings,
        }


def format_text(report: LintReport, *, per_code: int = 10) -> str:
    """Human summary: counts, then findings grouped by severity and code, ``per_code`` listed per code."""
    c = report.counts
    lines = [f"{report.ann_path}: {c['images']} images, {c['annotations']} annotations, {c['categories']} "
             f"categories ({c['crowd_annotations']} crowd, {c['crowd_rle_masks']} with RLE masks)"]
    if "image_files_checked" in c:
        lines.append(f"image files under {report.images_dir}: {c['image_files_checked']} checked"
                     + (f", {c['image_files_verified']} opened" if report.verify_images else ""))
    by_code: dict[str, list[Finding]] = {}
    for f in report.findings:
        by_code.setdefault(f.code, []).append(f)
    for severity in SEVERITIES:
        codes = sorted((code for code in by_code if CODES[code][0] == severity),
                       key=lambda code: (-len(by_code[code]), code))
        if not codes:
            continue
        lines.append("")
        lines.append(f"{severity.upper()}S" if severity != "info" else "INFO")
        for code in codes:
            found = by_code[code]
            lines.append(f"  {code} ({len(found)}): {CODES[code][1]}")
            for f in found[:per_code]:
                where = f"{f.record} at position {f.record_id}" if f.by_position else f"{f.record} {f.record_id}"
                file = f" [{f.file}]" if f.file != report.ann_path else ""
                lines.append(f"    {where}, {f.field or 'record'}: {f.message}{file}")
            if len(found) > per_code:
                lines.append(f"    ... and {len(found) - per_code} more")
    totals = report.totals()
    lines.append("")
    if report.findings:
        lines.append(f"{totals['error']} errors, {totals['warning']} warnings, {totals['info']} info; "
                     f"exit status {report.exit_status}"
                     + ("; records with errors are skipped by training" if totals["error"] else ""))
    else:
        lines.append("no problems found; exit status 0")
    return "\n".join(lines)
