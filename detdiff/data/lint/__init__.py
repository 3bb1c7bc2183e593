"""COCO lint for ``detdiff check``: findings that name the record, its id and the field.

Layers, each importing only those above it:

- :mod:`~detdiff.data.lint.codes`: finding codes, severities, tolerances, the :class:`Finding` record;
- :mod:`~detdiff.data.lint.parse`: record fields as numpy columns with a status, sections with ids;
- :mod:`~detdiff.data.lint.areas`: segmentation validity and ``area`` against polygon / RLE areas;
- ``rules_records`` (images, categories, coverage), ``rules_duplicates``, ``rules_annotations``,
  ``rules_files`` (image files): the rules of each section;
- :mod:`~detdiff.data.lint.report`: :class:`LintReport`, its JSON and text forms;
- :mod:`~detdiff.data.lint.check`: :func:`lint_coco` and :func:`run_check` (``detdiff check``).

Speed: every check on boxes runs over whole arrays; duplicates are found by sorting, pairs only inside
one (image, class) group. Without ``verify_images`` no image is opened.
"""

from detdiff.data.lint.check import lint_coco, run_check
from detdiff.data.lint.codes import CODES, SEVERITIES, Finding
from detdiff.data.lint.report import LintReport, format_text

__all__ = ["CODES", "SEVERITIES", "Finding", "LintReport", "format_text", "lint_coco", "run_check"]
