"""Write the offline HTML report of a run: ``RUNDIR/report/index.html`` (+ ``thumbs/``) and ``RUNDIR/plots/*.png``.

:func:`write_report` plans the cards' thumbnails, renders them, and assembles the page from
:mod:`detdiff.report.sections`. The page opens from disk with no network: CSS and JavaScript are inlined
(``assets/``), images are relative paths (``thumbs/*.jpg`` next to the page, ``../plots/*.png``), and a
Content-Security-Policy allows only those inlined blocks (by hash) and local images, so even a string that
slipped through could not run.
"""

from __future__ import annotations

import base64
import hashlib
import os
import shutil
from importlib import resources
from pathlib import Path

from detdiff.report.cards import plan_cards
from detdiff.report.elements import Markup, el
from detdiff.report.page import Page
from detdiff.report.plots import write_plots
from detdiff.report.run_folder import RunFolder
from detdiff.report.sections import NAV, page_sections
from detdiff.report.thumbnails import render_shots


def _asset(name: str) -> str:
    return resources.files("detdiff.report").joinpath("assets", name).read_text(encoding="utf-8")


def _csp_hash(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode("ascii") + "'"


def _page_html(page: Page) -> str:
    css, script = _asset("report.css"), _asset("report.js")
    policy = (f"default-src 'none'; img-src 'self' file:; style-src {_csp_hash(css)}; "
              f"script-src {_csp_hash(script)}; base-uri 'none'; form-action 'none'")
    annotations = Path(str(page.run.run.get("annotations", ""))).name or page.run.root.name
    head = el("head", None, el("meta", {"charset": "utf-8"}),
              el("meta", {"name": "viewport", "content": "width=device-width, initial-scale=1"}),
              el("meta", {"http-equiv": "Content-Security-Policy", "content": policy}),
              el("meta", {"name": "referrer", "content": "no-referrer"}),
              el("title", None, f"detdiff report \u2013 {annotations}"),
              Markup(f"<style>{css}</style>"))
    top = el("header", {"class": "top"},
             el("div", {"class": "brand"}, "detdiff", el("small", None, annotations)),
             el("nav", None, [el("a", {"href": f"#{anchor}"}, label) for anchor, label in NAV]))
    footer = el("footer", None, f"Written by detdiff {page.run.run.get('detdiff_version', '')}. Scores are "
                                "accumulated training losses: higher = harder.")
    body = el("body", None, top, el("main", None, page_sections(page)), footer, Markup(f"<script>{script}</script>"))
    return "<!DOCTYPE html>\n" + el("html", {"lang": "en"}, head, body) + "\n"


def write_report(rundir: str | Path, *, top: int = 24, thumbnails: bool = True, thumbnail_size: int = 256) -> Path:
    """Write ``RUNDIR/report/index.html`` (+ ``report/thumbs/*.jpg``) and ``RUNDIR/plots/*.png``; return the page.

    Parameters
    ----------
    rundir : the run folder written by ``detdiff audit`` (DEVELOPERS.md "Run folder").
    top : length bound of every list (hardest images, objects, each suspect kind); easiest lists get a third.
    thumbnails : copy downscaled dataset pixels into ``report/thumbs``. ``False`` copies none at all (an old
        ``thumbs`` folder is removed) and the cards show boxes and ids as text on a blank frame.
    thumbnail_size : longest side of an image thumbnail, px (crops get three quarters of it).
    """
    if top < 1:
        raise ValueError(f"top must be at least 1, got {top}")
    if thumbnail_size < 16:
        raise ValueError(f"thumbnail_size must be at least 16 px, got {thumbnail_size}")
    run = RunFolder.load(rundir)
    report_dir = run.root / "report"
    thumbs_dir = report_dir / "thumbs"
    report_dir.mkdir(parents=True, exist_ok=True)
    shutil.rmtree(thumbs_dir, ignore_errors=True)
    page = Page(run, top, thumbnails, thumbnail_size)
    page.plots = write_plots(run, top=top)
    plan_cards(page)
    if thumbnails:
        page.written = render_shots(run, page.shots, thumbs_dir)
    out = report_dir / "index.html"
    partial = report_dir / f".index.html.tmp-{os.getpid()}"
    partial.write_text(_page_html(page), encoding="utf-8")
    os.replace(partial, out)
    return out
