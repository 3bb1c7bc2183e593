"""PNG plots of a run for the report page and for slides (matplotlib, Agg canvas, no pyplot state).

Every plot is written under ``RUNDIR/plots/``; the HTML page shows the same files. Figures are built with
:class:`matplotlib.figure.Figure` directly, so making them never touches a caller's pyplot backend.

Colours come from :data:`PALETTE`, a set of our own chosen to stay apart under the common colour-vision
deficiencies (after the Okabe-Ito "colour universal design" guidance: blue / orange / vermillion / bluish
green contrasts). Plots never rely on colour alone: lines also differ in marker shape and dash pattern.
Scores are accumulated losses: higher = harder.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter

from detdiff.analysis.accumulate import object_epoch_loss
from detdiff.report.advice import rank_correlation
from detdiff.report.run_folder import STREAMS, RunFolder
from detdiff.report.wording import STREAM_TITLES, descriptor_words
from detdiff.train.loss_log import LossLog

#: the report's colours (hex). ``annotated`` / ``predicted`` / ``suggested`` are also the box colours.
PALETTE: dict[str, str] = {
    "blue": "#0b6fb8", "orange": "#e89b0c", "vermillion": "#d1541b", "green": "#0f9a72",
    "sky": "#5cb3e4", "purple": "#c2749f", "yellow": "#ecd932", "ink": "#1d232b", "grey": "#8b929a",
    "annotated": "#0b6fb8", "predicted": "#e89b0c", "suggested": "#c2349f",
}
STREAM_COLOURS: dict[str, str] = {"loc": PALETTE["blue"], "pos": PALETTE["vermillion"], "neg": PALETTE["green"]}
#: colour + marker + dash for the k-th highlighted line, so lines differ in more than colour
_LINE_STYLES: list[tuple[str, str, Any]] = [
    (PALETTE["vermillion"], "o", "-"), (PALETTE["blue"], "s", "--"), (PALETTE["green"], "^", "-."),
    (PALETTE["orange"], "D", ":"), (PALETTE["purple"], "v", (0, (5, 1, 1, 1))),
]
#: tick series of the log lift axis, densest first: 1-2-5, 1-3, decades (plain numbers: 0.5, 1, 2)
_LIFT_MANTISSAS: tuple[tuple[int, ...], ...] = ((1, 2, 5), (1, 3), (1,))
_LIFT_RANGE = (0.01, 100.0)      # the lift axis never spans more (a lift of 0 has no place on a log axis)
_STYLE = {
    "font.size": 9, "axes.titlesize": 10, "axes.labelsize": 9, "axes.spines.top": False,
    "axes.spines.right": False, "axes.grid": True, "grid.alpha": 0.25, "grid.linewidth": 0.6,
    "legend.frameon": False, "legend.fontsize": 8, "figure.dpi": 110, "savefig.dpi": 110,
    "axes.edgecolor": "#5a6169", "axes.labelcolor": PALETTE["ink"], "xtick.color": "#3c434b",
    "ytick.color": "#3c434b", "text.color": PALETTE["ink"],
}


def literal(text: object) -> str:
    """A dataset string shown as-is by matplotlib: ``$`` escaped so it never starts mathtext."""
    return str(text).replace("$", r"\$")


def _save(fig: Figure, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    fig.savefig(tmp, format="png", facecolor="white")
    os.replace(tmp, path)
    return path


def per_epoch_loss(log: LossLog, stream: str, level: str) -> np.ndarray:
    """Loss of every image (``level="image"``) or object per epoch, normalised as training does: ``[E, N]``.

    Images: ``<stream>_sum / max(1, num_pos)``. Objects: the kept anchor's loss
    (:func:`detdiff.analysis.accumulate.object_epoch_loss`). Items not trained in an epoch are NaN.
    """
    if level != "image":
        return object_epoch_loss(log, stream)
    sums = log.image_field(f"{stream}_sum").astype(np.float64)
    count = log.image_field("num_pos").astype(np.float64)
    return np.where(count >= 0, sums / np.maximum(1.0, count), np.nan)


def plot_loss_curves(panels: list[dict[str, Any]], epochs: list[int], *, title: str, path: Path) -> Path:
    """Per-epoch loss of the hardest items against the spread of all items, one panel per level.

    Each panel dict: ``values`` float ``[E, N]`` (per-epoch loss, NaN = not trained), ``hardest`` int
    ``[k]`` column indices (k <= 5 drawn), ``labels`` ``[k]`` legend texts, ``title``, ``ylabel``.
    """
    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(5.0 * len(panels), 3.3), layout="constrained")
        axes = fig.subplots(1, len(panels), squeeze=False)[0]
        x = np.asarray(epochs)
        for ax, panel in zip(axes, panels):
            values = np.asarray(panel["values"], dtype=np.float64)
            finite_cols = np.isfinite(values).any(axis=0)
            if finite_cols.any():
                spread = values[:, finite_cols]
                has_value = np.isfinite(spread).any(axis=1)
                q25, q50, q75 = np.full((3, len(x)), np.nan)
                quartiles = np.nanpercentile(spread[has_value], [25, 50, 75], axis=1)
                q25[has_value], q50[has_value], q75[has_value] = quartiles
                ax.fill_between(x, q25, q75, color=PALETTE["grey"], alpha=0.25, linewidth=0, label="middle half of all")
                ax.plot(x, q50, color=PALETTE["ink"], linewidth=1.2, linestyle=(0, (1, 1)), label="median of all")
            for k, (column, label) in enumerate(zip(panel["hardest"][:len(_LINE_STYLES)], panel["labels"])):
                colour, marker, dash = _LINE_STYLES[k]
                ax.plot(x, values[:, column], color=colour, marker=marker, markersize=4, linestyle=dash,
                        linewidth=1.5, label=label)
            ax.set_title(panel["title"], loc="left")
            ax.set_xlabel("epoch")
            ax.set_ylabel(panel["ylabel"])
            if len(x) <= 20:
                ax.set_xticks(x)
            ax.legend(loc="upper right", ncols=1)
        fig.suptitle(title, x=0.01, ha="left", fontweight="bold")
        return _save(fig, path)


def _label_width(text: str, font_px: float) -> float:
    """Approximate width of a number's tick label in px (digit ~0.64 em, point ~0.32 em in DejaVu Sans)."""
    return font_px * sum(0.32 if c == "." else 0.64 for c in text)


def lift_ticks(low: float, high: float, width_px: float, font_px: float) -> list[float]:
    """Ticks of a log lift axis from ``low`` to ``high`` drawn ``width_px`` wide with labels ``font_px`` high.

    The densest 1-2-5, 1-3 or decade series whose neighbouring labels keep half a letter apart (the tick at
    either end may be left out for it); ``[1.0]`` alone when even the decades would touch.
    """
    px_per_decade = width_px / max(1e-9, np.log10(high / low))

    def apart(a: float, b: float) -> bool:
        room = (_label_width(f"{a:g}", font_px) + _label_width(f"{b:g}", font_px)) / 2 + font_px / 2
        return bool(np.log10(b / a) * px_per_decade >= room)

    for mantissas in _LIFT_MANTISSAS:
        ticks = [m * 10.0 ** e for e in range(-3, 3) for m in mantissas if low <= m * 10.0 ** e <= high]
        if len(ticks) > 3 and not apart(ticks[0], ticks[1]):
            ticks = ticks[1:]
        if len(ticks) > 3 and not apart(ticks[-2], ticks[-1]):
            ticks = ticks[:-1]
        if all(apart(a, b) for a, b in zip(ticks, ticks[1:])):
            return ticks
    return [1.0]


def _lift_limits(effect: np.ndarray, low: np.ndarray, high: np.ndarray) -> tuple[float, float]:
    """x limits of the lift panel: every point and CI with a margin, 1 inside, within :data:`_LIFT_RANGE`."""
    lo = min(float(np.min(low)), float(np.min(effect)), 1.0) / 1.3
    hi = max(float(np.max(high)), float(np.max(effect)), 1.0) * 1.3
    return max(lo, _LIFT_RANGE[0]), min(hi, _LIFT_RANGE[1])


def _cause_label(row: pd.Series) -> str:
    words = descriptor_words(str(row["descriptor"]))
    bin_text = str(row["bin"]).strip()
    return f"{row['level']}: {words}" + (f" {bin_text}" if bin_text and row["test"] != "spearman" else "")


def plot_causes(causes: pd.DataFrame, *, stream: str, path: Path, max_rows: int = 12) -> Path | None:
    """Forest plot of one stream's causes: Spearman rho and lift, each with its CI; significant filled.

    ``causes`` holds causes.csv rows (any streams; this one is selected). Returns None when it has none.
    """
    rows = causes[causes["stream"] == stream]
    tests = [(("spearman", "mannwhitney"), "rank correlation with the score (Spearman rho; binary: 2A - 1)",
              0.0, False),
             (("lift",), "Lift: share among the hardest / share in the dataset", 1.0, True)]
    if rows.empty:
        return None
    rows = rows.copy()
    for column in ("effect", "ci_low", "ci_high"):
        rows[column] = rank_correlation(rows["test"].to_numpy(), rows[column].to_numpy())
    colour = STREAM_COLOURS.get(stream, PALETTE["blue"])
    with matplotlib.rc_context(_STYLE):
        counts = [min(max_rows, int(rows["test"].isin(t).sum())) for t, *_ in tests]
        fig = Figure(figsize=(10.0, 1.3 + 0.27 * max(1, max(counts))), layout="constrained")
        axes = fig.subplots(1, 2, width_ratios=[1.0, 1.8])
        lift_axes: list[tuple[Any, float, float]] = []
        for ax, (test, xlabel, reference, log_scale), count in zip(axes, tests, counts):
            part = rows[rows["test"].isin(test)].copy()
            part["effect"] = pd.to_numeric(part["effect"], errors="coerce")
            part = part[np.isfinite(part["effect"])]
            if log_scale:
                part = part[part["effect"] > 0]
            strength = np.abs(np.log(part["effect"])) if log_scale else part["effect"].abs()
            part = part.assign(_rank=list(zip(~part["significant"].astype(bool), -strength)))
            part = part.sort_values("_rank").head(max_rows).sort_values("effect")
            ax.axvline(reference, color=PALETTE["ink"], linewidth=0.8)
            ax.set_xlabel(xlabel, loc="right")
            if part.empty:
                ax.text(0.5, 0.5, "no rows", transform=ax.transAxes, ha="center", va="center", color=PALETTE["grey"])
                ax.set_yticks([])
                continue
            y = np.arange(len(part))
            effect = part["effect"].to_numpy(float)
            low = pd.to_numeric(part["ci_low"], errors="coerce").fillna(part["effect"]).to_numpy(float)
            high = pd.to_numeric(part["ci_high"], errors="coerce").fillna(part["effect"]).to_numpy(float)
            significant = part["significant"].astype(bool).to_numpy()
            if log_scale:
                low, high = np.maximum(low, 1e-3), np.maximum(high, 1e-3)
            ax.hlines(y, low, high, color=np.where(significant, colour, PALETTE["grey"]), linewidth=2)
            ax.scatter(effect[significant], y[significant], marker="D", s=36, color=colour, zorder=3)
            ax.scatter(effect[~significant], y[~significant], marker="o", s=30, facecolors="white",
                       edgecolors=PALETTE["grey"], zorder=3)
            labels = [literal(_cause_label(r)) + (" *" if s else "") for (_, r), s in zip(part.iterrows(), significant)]
            ax.set_yticks(y, labels)
            for tick, s in zip(ax.get_yticklabels(), significant):
                tick.set_fontweight("bold" if s else "normal")
            ax.set_ylim(-0.7, len(part) - 0.3)
            ax.grid(axis="y", visible=False)
            if log_scale:
                ax.set_xscale("log")
                lift_axes.append((ax, *_lift_limits(effect, low, high)))
            else:
                ax.set_xlim(-1.05, 1.05)
        keys = [Line2D([], [], marker="D", color=colour, linewidth=2, label="significant (*)"),
                Line2D([], [], marker="o", markerfacecolor="white", color=PALETTE["grey"], linewidth=2,
                       label="not significant")]
        fig.legend(handles=keys, loc="outside upper right", ncols=2)
        fig.suptitle(f"{STREAM_TITLES.get(stream, stream)}: what goes with a high score (95% CI)",
                     x=0.01, ha="left", fontweight="bold")
        for ax, lo, hi in lift_axes:
            ax.set_xlim(lo, hi)
        if lift_axes:
            fig.draw_without_rendering()         # lays the figure out, so the lift axis has its final width
        font_px = float(_STYLE["font.size"]) * fig.dpi / 72
        for ax, lo, hi in lift_axes:
            ax.xaxis.set_major_locator(FixedLocator(lift_ticks(lo, hi, ax.get_window_extent().width, font_px)))
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
            ax.xaxis.set_minor_formatter(NullFormatter())
        return _save(fig, path)


def plot_object_map(xy: np.ndarray, percentiles: dict[str, np.ndarray], hardest: dict[str, np.ndarray], *,
                    path: Path) -> Path | None:
    """2-D map of objects, one panel per stream, coloured by score percentile, hardest marked.

    ``xy`` float ``[A, 2]`` (objects.csv map_x, map_y); ``percentiles[stream]`` float ``[A]`` (0-100, higher =
    harder); ``hardest[stream]`` int ``[k]`` row indices. Returns None when no object has map coordinates.
    """
    finite = np.isfinite(xy).all(axis=1)
    if not finite.any():
        return None
    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(5.2 * len(percentiles), 4.4), layout="constrained")
        axes = fig.subplots(1, len(percentiles), squeeze=False)[0]
        for ax, (stream, pct) in zip(axes, percentiles.items()):
            order = np.argsort(np.nan_to_num(pct, nan=-1.0))   # hardest drawn last, on top
            order = order[finite[order]]
            points = ax.scatter(xy[order, 0], xy[order, 1], c=pct[order], cmap="cividis", vmin=0, vmax=100,
                                s=float(np.clip(4000 / max(1, len(order)), 5, 30)), linewidths=0, rasterized=True)
            marked = hardest[stream][finite[hardest[stream]]]
            ax.scatter(xy[marked, 0], xy[marked, 1], marker="D", s=46, facecolors="none",
                       edgecolors=PALETTE["vermillion"], linewidths=1.4, label=f"hardest {len(marked)}")
            ax.set_title(f"{STREAM_TITLES.get(stream, stream)} score", loc="left")
            ax.set_xticks([])
            ax.set_yticks([])
            ax.grid(False)
            ax.legend(loc="upper right")
            fig.colorbar(points, ax=ax, shrink=0.85, label="percentile (100 = hardest)")
        fig.suptitle("Objects laid out by their detector features", x=0.01, ha="left", fontweight="bold")
        return _save(fig, path)


def plot_score_distributions(images: pd.DataFrame, top_fraction: float, *, path: Path) -> Path | None:
    """Histogram of each stream's image score with the "hardest" cut (top ``top_fraction``) marked."""
    usable = images[images["usable"].astype(bool)]
    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(10.0, 2.6), layout="constrained")
        axes = fig.subplots(1, len(STREAMS))
        drawn = False
        for ax, stream in zip(axes, STREAMS):
            scores = pd.to_numeric(usable[f"{stream}_score"], errors="coerce").to_numpy(float)
            scores = scores[np.isfinite(scores)]
            ax.set_title(STREAM_TITLES[stream], loc="left")
            ax.set_xlabel("image score (higher = harder)")
            if not len(scores):
                ax.text(0.5, 0.5, "no scores", transform=ax.transAxes, ha="center", color=PALETTE["grey"])
                continue
            drawn = True
            ax.hist(scores, bins=min(40, max(5, len(scores) // 4)), color=STREAM_COLOURS[stream], alpha=0.85)
            cut = np.quantile(scores, 1 - top_fraction)
            ax.axvline(cut, color=PALETTE["ink"], linestyle="--", linewidth=1.1,
                       label=f"hardest {100 * top_fraction:.0f}% above")
            ax.legend(loc="upper right")
        axes[0].set_ylabel("images")
        return _save(fig, path) if drawn else None


def hardest_rows(scores: pd.Series, k: int, *, easiest: bool = False) -> np.ndarray:
    """Positions (row numbers) of the ``k`` highest (or lowest) finite scores, ties in row order."""
    values = pd.to_numeric(scores, errors="coerce").to_numpy(float)
    rows = np.flatnonzero(np.isfinite(values))
    key = values[rows] if easiest else -values[rows]
    return rows[np.argsort(key, kind="stable")[:k]]


def write_plots(run: RunFolder, *, top: int) -> dict[str, Path]:
    """Write every plot of the run to ``RUNDIR/plots/``; returns name -> path of those written.

    Names: ``scores``, ``curves_<stream>``, ``causes_<stream>``, ``object_map``. A plot whose inputs are
    absent (no training log, no causes, no map coordinates) is skipped, not faked.
    """
    out_dir = run.root / "plots"
    written: dict[str, Path] = {}
    scores = plot_score_distributions(run.images, run.top_fraction, path=out_dir / "scores.png")
    if scores:
        written["scores"] = scores
    log = None
    if (run.root / "log").is_dir():
        try:
            log = LossLog.open(run.root / "log")
        except FileNotFoundError:
            log = None
    for stream in STREAMS:
        if log is not None:
            panels = _curve_panels(run, log, stream)
            if panels:
                written[f"curves_{stream}"] = plot_loss_curves(
                    panels, log.epochs, title=f"{STREAM_TITLES[stream]}: loss per epoch of the hardest items",
                    path=out_dir / f"curves_{stream}.png")
        causes = plot_causes(run.causes, stream=stream, path=out_dir / f"causes_{stream}.png")
        if causes:
            written[f"causes_{stream}"] = causes
    objects = run.objects
    xy = objects[["map_x", "map_y"]].apply(pd.to_numeric, errors="coerce").to_numpy(float)
    percentiles = {s: pd.to_numeric(objects[f"{s}_pct"], errors="coerce").to_numpy(float) for s in ("loc", "pos")}
    hardest = {s: hardest_rows(objects[f"{s}_score"], top) for s in ("loc", "pos")}
    object_map = plot_object_map(xy, percentiles, hardest, path=out_dir / "object_map.png")
    if object_map:
        written["object_map"] = object_map
    return written


def _curve_panels(run: RunFolder, log: LossLog, stream: str) -> list[dict[str, Any]]:
    """Image panel (and object panel for loc / pos) of the hardest five, when the log matches the tables."""
    panels = []
    images, objects = run.images, run.objects
    image_values = per_epoch_loss(log, stream, "image")
    if image_values.shape[1] == len(images):
        rows = hardest_rows(images[f"{stream}_score"], 5)
        labels = [f"#{k + 1} image {images['image_id'].iloc[r]}" for k, r in enumerate(rows)]
        panels.append({"values": image_values, "hardest": rows, "labels": labels, "title": "images",
                       "ylabel": f"{stream} loss / positive anchors"})
    if stream in ("loc", "pos"):
        object_values = per_epoch_loss(log, stream, "object")
        if object_values.shape[1] == len(objects) and len(objects):
            rows = hardest_rows(objects[f"{stream}_score"], 5)
            labels = [literal(f"#{k + 1} box {objects['annotation_id'].iloc[r]} '{objects['category_name'].iloc[r]}'")
                      for k, r in enumerate(rows)]
            panels.append({"values": object_values, "hardest": rows, "labels": labels, "title": "objects",
                           "ylabel": f"{stream} loss at the kept anchor"})
    return panels
