"""Causes: which descriptors go with high difficulty scores, with confidence intervals and FDR control.

For each stream (image level: loc, pos, neg; object level: loc, pos) and each descriptor:

- ``spearman``: Spearman's rho between score and descriptor (``scipy.stats.spearmanr`` for rho and p);
  95% CI by the Fisher z transform with the variance 1.06 / (n - 3) that Fieller, Hartley & Pearson
  (Biometrika 1957) give for Spearman's rho (from memory). Binary descriptors skip this test.
- ``lift``: descriptors are cut into bins (natural bins such as COCO size bins and box-count ranges, or
  quartiles with their edges in the label). ``top_rate`` = share of the stream's top ``top_fraction``
  falling in the bin, ``base_rate`` = share of all items in the bin, effect = lift = top_rate / base_rate.
  The p-value is an exact binomial test of the top count against the base rate
  (``scipy.stats.binomtest``); the CI is the Wilson interval of top_rate divided by base_rate.
- ``mannwhitney`` (binary descriptors, e.g. truncated or not): ``scipy.stats.mannwhitneyu`` two-sided;
  effect = U / (n1 * n0) = probability that a flagged item scores higher than an unflagged one (ties
  count half); CI from the Hanley & McNeil (Radiology 1982) standard error of that probability (from
  memory).

All p-values of a run are adjusted together by Benjamini-Hochberg (``scipy.stats.false_discovery_control``)
-> ``q_value``; ``significant`` = q < 0.05.

"why" tags: an item in a stream's top fraction is tagged with the descriptor bins it falls in whose lift
for that stream is significant and at least :data:`MIN_WHY_LIFT`, strongest lift first (over all streams, each tag once, at most
:data:`MAX_WHY_TAGS`). Only bins that name a recognisable condition carry a tag (small, occluded,
blurry, ...); middle quartiles carry none.

Restatements: descriptors go together (night photographs are dim, low in contrast, blurry and plain all at
once), so several lift lines of one stream can name the same hardest items. A significant lift line (above 1)
whose hardest items (in its bin and in the stream's top) and those of a stronger line of the same level and
stream, another descriptor, have a Jaccard index (intersection over union) of at least :data:`SAME_ITEMS_JACCARD`
is folded under it (``same_items_as`` = that line's row, ``same_items_jaccard`` = the index): the report names
it in the stronger line's sentence instead of giving it a line of its own. Lines are taken strongest first; a
line that folds under none leads its own. On the held-out streetcam audit (seed 3) four of the eight "collect
more" lines were the positive-class stream's lowest quartiles of sharpness, clutter, contrast and brightness
(65% of that stream's hardest tenth sat in all four bins; Jaccard 0.73-0.92 with the sharpness line). A share of
the weaker line's items (0.8) was tried first: where a strong line holds most of the top, a weak line with a
large bin folds under it by chance (warehouse: 'overlapping at IoU < 0.3' under 'far from the class centre',
which holds 91% of the top); the Jaccard index needs both lines to name the same items. At 0.7, five validity
audits fold 0-7 lines (image quality quartiles together, 5-11 boxes with crowding, small with small relative
size); at 0.6 occlusion joins overlap and class rarity joins small size too.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.stats

from detdiff.analysis.descriptors import SIZE_BIN_EDGES, SIZE_BIN_LABELS

SIGNIFICANCE = 0.05
MAX_WHY_TAGS = 3
MIN_WHY_LIFT = 1.2      # smaller lifts are significant at 10^5 items but not worth naming (common practice)
MIN_ITEMS = 10          # fewer finite (score, descriptor) pairs than this: no test
#: Two lift lines whose hardest items overlap at least this much (Jaccard index) name the same items (module docstring).
SAME_ITEMS_JACCARD = 0.7
CAUSES_COLUMNS = ["stream", "level", "descriptor", "test", "bin", "effect", "ci_low", "ci_high", "p_value",
                  "q_value", "significant", "n", "top_rate", "base_rate"]


@dataclass(frozen=True)
class DescriptorSpec:
    """How one descriptor column is tested.

    ``edges`` (ascending, left edge inclusive) with ``labels``/``tags`` (len(edges) + 1 each) give fixed
    bins; without edges the column is cut at its quartiles and only the lowest / highest bins carry
    ``low_tag`` / ``high_tag``. ``binary`` descriptors (two fixed bins) get Mann-Whitney instead of Spearman.
    """

    column: str
    low_tag: str | None = None
    high_tag: str | None = None
    edges: tuple[float, ...] = ()
    labels: tuple[str, ...] = ()
    tags: tuple[str | None, ...] = ()
    binary: bool = False


_ANY = 1e-9   # "greater than zero" edge for shares measured on a grid
IMAGE_DESCRIPTORS: tuple[DescriptorSpec, ...] = (
    DescriptorSpec("box_count", edges=(1, 2, 5, 12),
                   labels=("0 boxes", "1 box", "2-4 boxes", "5-11 boxes", ">= 12 boxes"),
                   tags=("empty", "single_object", None, None, "many_objects")),
    DescriptorSpec("crowding", low_tag="sparse", high_tag="crowded"),
    DescriptorSpec("blur_laplacian_var", low_tag="blurry", high_tag="sharp"),
    DescriptorSpec("brightness", low_tag="dim", high_tag="bright"),
    DescriptorSpec("contrast", low_tag="low_contrast", high_tag="high_contrast"),
    DescriptorSpec("clutter_edge_density", low_tag="plain_background", high_tag="cluttered"),
    DescriptorSpec("resolution", low_tag="low_resolution", high_tag="high_resolution"),
)
OBJECT_DESCRIPTORS: tuple[DescriptorSpec, ...] = (
    DescriptorSpec("area", edges=SIZE_BIN_EDGES, labels=SIZE_BIN_LABELS, tags=SIZE_BIN_LABELS),
    DescriptorSpec("rel_size", low_tag="small_in_image", high_tag="large_in_image"),
    DescriptorSpec("elongation", low_tag=None, high_tag="elongated"),
    DescriptorSpec("max_iou", edges=(_ANY, 0.3), labels=("no overlap", "IoU < 0.3", "IoU >= 0.3"),
                   tags=("isolated", None, "overlapping")),
    DescriptorSpec("occlusion", edges=(_ANY, 0.5),
                   labels=("not occluded", "< 50% covered", ">= 50% covered"),
                   tags=(None, "partly_occluded", "occluded")),
    DescriptorSpec("truncation", edges=(_ANY,), labels=("inside the image", "at the border"),
                   tags=(None, "truncated"), binary=True),
    DescriptorSpec("class_freq", low_tag="rare_class", high_tag="common_class"),
    DescriptorSpec("feature_dist", low_tag="typical", high_tag="atypical"),
)
#: level -> streams tested at that level
STREAMS: dict[str, tuple[str, ...]] = {"image": ("loc", "pos", "neg"), "object": ("loc", "pos")}


def spearman_with_ci(x: np.ndarray, y: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float, float]:
    """Spearman rho, CI low, CI high, p-value (scipy.stats.spearmanr; CI by Fisher z, see module doc)."""
    res = scipy.stats.spearmanr(x, y)
    rho, p = float(res.statistic), float(res.pvalue)
    n = len(x)
    if n <= 3 or not np.isfinite(rho):
        return rho, np.nan, np.nan, p
    z = np.arctanh(np.clip(rho, -0.999999, 0.999999))
    half = scipy.stats.norm.ppf(0.5 + confidence / 2) * np.sqrt(1.06 / (n - 3))
    return rho, float(np.tanh(z - half)), float(np.tanh(z + half)), p


def mann_whitney_with_ci(flagged: np.ndarray, others: np.ndarray,
                         confidence: float = 0.95) -> tuple[float, float, float, float]:
    """P(flagged > other) = U / (n1 n0), CI low, CI high, two-sided p (scipy.stats.mannwhitneyu)."""
    res = scipy.stats.mannwhitneyu(flagged, others, alternative="two-sided")
    n1, n0 = len(flagged), len(others)
    a = float(res.statistic) / (n1 * n0)
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    se = np.sqrt(max(0.0, a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n0 - 1) * (q2 - a * a)) / (n1 * n0))
    half = scipy.stats.norm.ppf(0.5 + confidence / 2) * se
    return a, max(0.0, a - half), min(1.0, a + half), float(res.pvalue)


def adjust_p_values(p_values: np.ndarray) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (``scipy.stats.false_discovery_control``) ``[N]``; NaN stays NaN
    and does not count as a test."""
    p = np.asarray(p_values, dtype=np.float64)
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    if finite.any():
        q[finite] = scipy.stats.false_discovery_control(p[finite])
    return q


def lift_test(in_bin: np.ndarray, top: np.ndarray, confidence: float = 0.95) -> dict[str, float]:
    """Lift of a bin among the top items versus all items, with Wilson CI and exact binomial p-value.

    ``in_bin``, ``top``: bool ``[N]``. Returns effect, ci_low, ci_high, p_value, top_rate, base_rate.
    """
    n_top, k = int(top.sum()), int((in_bin & top).sum())
    base = float(in_bin.mean())
    res = scipy.stats.binomtest(k, n_top, base)
    ci = res.proportion_ci(confidence_level=confidence, method="wilson")
    top_rate = k / n_top
    return {"effect": top_rate / base, "ci_low": ci.low / base, "ci_high": ci.high / base,
            "p_value": float(res.pvalue), "top_rate": top_rate, "base_rate": base}


def bin_descriptor(values: np.ndarray, spec: DescriptorSpec) -> tuple[np.ndarray, list[str], list[str | None]]:
    """Bin index per value ``[N]`` (-1 for NaN), bin labels and tags; quartile bins drop repeated edges."""
    finite = np.isfinite(values)
    if spec.edges:
        edges = np.asarray(spec.edges, dtype=np.float64)
        labels, tags = list(spec.labels), list(spec.tags)
    else:
        edges = np.unique(np.quantile(values[finite], [0.25, 0.5, 0.75])) if finite.any() else np.array([])
        edges = edges[(edges > values[finite].min()) & (edges <= values[finite].max())] if len(edges) else edges
        text = [f"{e:.3g}" for e in edges]
        labels = ([f"< {text[0]}"] + [f"{a} to < {b}" for a, b in zip(text[:-1], text[1:])] + [f">= {text[-1]}"]
                  if len(edges) else ["all"])
        tags = [None] * len(labels)
        if len(edges):
            tags[0], tags[-1] = spec.low_tag, spec.high_tag
    codes = np.where(finite, np.searchsorted(edges, np.where(finite, values, 0.0), side="right"), -1)
    return codes, labels, tags


@dataclass
class CauseAnalysis:
    """``table``: causes.csv rows; ``image_why`` ``[I]`` and ``object_why`` ``[A]``: "tag1;tag2" strings."""

    table: pd.DataFrame
    image_why: np.ndarray
    object_why: np.ndarray


def _level_tests(level: str, scores: pd.DataFrame, descriptors: pd.DataFrame,
                 specs: tuple[DescriptorSpec, ...], top_fraction: float
                 ) -> tuple[list[dict], list[tuple], dict[int, np.ndarray]]:
    """Rows of the causes table for one level, (row number, item rows in the bin and the stream's top, tag) of
    every tagged lift row, and those hardest item rows of every lift row by row number."""
    rows: list[dict] = []
    tagged: list[tuple] = []
    hardest: dict[int, np.ndarray] = {}
    for stream in STREAMS[level]:
        score = scores[f"{stream}_score"].to_numpy(dtype=np.float64)
        for spec in specs:
            if spec.column not in descriptors:
                continue
            values = descriptors[spec.column].to_numpy(dtype=np.float64)
            ok = np.isfinite(score) & np.isfinite(values)
            n = int(ok.sum())
            if n < MIN_ITEMS or np.ptp(values[ok]) == 0 or np.ptp(score[ok]) == 0:
                continue
            s, v = score[ok], values[ok]
            base = {"stream": stream, "level": level, "descriptor": spec.column, "n": n,
                    "top_rate": np.nan, "base_rate": np.nan}
            codes, labels, tags = bin_descriptor(v, spec)
            if len(np.unique(codes)) < 2:      # one bin holds everything: nothing to compare
                continue
            if spec.binary:
                flag = codes == len(labels) - 1
                if flag.all() or not flag.any():
                    continue
                eff, lo, hi, p = mann_whitney_with_ci(s[flag], s[~flag])
                rows.append(base | {"test": "mannwhitney", "bin": labels[-1], "effect": eff, "ci_low": lo,
                                    "ci_high": hi, "p_value": p})
            else:
                rho, lo, hi, p = spearman_with_ci(v, s)
                rows.append(base | {"test": "spearman", "bin": "", "effect": rho, "ci_low": lo, "ci_high": hi,
                                    "p_value": p})
            top = s >= np.quantile(s, 1.0 - top_fraction)
            if top.all():
                continue
            for b, (label, tag) in enumerate(zip(labels, tags)):
                in_bin = codes == b
                if not in_bin.any():
                    continue
                rows.append(base | {"test": "lift", "bin": label, "tag": tag or ""} | lift_test(in_bin, top))
                hardest[len(rows) - 1] = np.flatnonzero(ok)[in_bin & top]
                if tag:
                    tagged.append((len(rows) - 1, hardest[len(rows) - 1], tag))
    return rows, tagged, hardest


def fold_restatements(table: pd.DataFrame, hardest: dict[int, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """``same_items_as`` (int ``[R]``, -1 = leads its own line or is no significant lift above 1) and
    ``same_items_jaccard`` (``[R]``, NaN where not folded) of the table's rows (module docstring). ``hardest``:
    the sorted item rows of each lift row in its bin and its stream's top."""
    lead = np.full(len(table), -1, dtype=np.int64)
    jaccard = np.full(len(table), np.nan)
    effect = pd.to_numeric(table["effect"], errors="coerce")
    eligible = table[(table["test"] == "lift") & table["significant"].astype(bool) & (effect > 1)]
    for _, group in eligible.groupby(["level", "stream"], sort=False):
        leads: list[int] = []
        for row in group.index[np.argsort(-effect[group.index].to_numpy(), kind="stable")]:
            items = hardest[int(row)]                  # a significant lift above 1 has items in the top
            for first in leads:
                if table.at[first, "descriptor"] == table.at[row, "descriptor"]:
                    continue
                both = len(np.intersect1d(items, hardest[first], assume_unique=True))
                overlap = both / (len(items) + len(hardest[first]) - both)
                if overlap >= SAME_ITEMS_JACCARD:
                    lead[row], jaccard[row] = first, overlap
                    break
            else:
                leads.append(int(row))
    return lead, jaccard


def _why_strings(num_items: int, tagged: list[tuple], table: pd.DataFrame, tag_index: dict[str, int]) -> np.ndarray:
    """Join the significant tags of each item, strongest lift first, into ``tag1;tag2`` strings ``[N]``."""
    out = np.full(num_items, "", dtype=object)
    strength = np.zeros((num_items, len(tag_index)), dtype=np.float32)
    for row, items, tag in tagged:
        rec = table.iloc[row]
        if rec["significant"] and rec["effect"] >= MIN_WHY_LIFT:
            col = tag_index[tag]
            strength[items, col] = np.maximum(strength[items, col], rec["effect"])
    if not strength.any():
        return out
    k = min(MAX_WHY_TAGS, strength.shape[1])
    order = np.argsort(-strength, axis=1, kind="stable")[:, :k]
    picked = np.where(np.take_along_axis(strength, order, axis=1) > 0, order, -1)
    combos, inverse = np.unique(picked, axis=0, return_inverse=True)
    names = list(tag_index)
    texts = np.array([";".join(names[t] for t in combo if t >= 0) for combo in combos], dtype=object)
    return texts[inverse.ravel()]


def find_causes(image_scores: pd.DataFrame, image_desc: pd.DataFrame, object_scores: pd.DataFrame,
                object_desc: pd.DataFrame, *, top_fraction: float,
                scored_objects: np.ndarray | None = None) -> CauseAnalysis:
    """Run every test at both levels, adjust all p-values together (BH) and derive the "why" tags.

    Frames are row-aligned (images ``[I]``, objects ``[A]``); scores need ``<stream>_score`` columns,
    descriptors the columns of :data:`IMAGE_DESCRIPTORS` / :data:`OBJECT_DESCRIPTORS` (missing ones are
    skipped). ``scored_objects [A]`` bool limits the object level (e.g. no crowd rows).
    """
    if not 0 < top_fraction < 1:
        raise ValueError(f"analysis.top_fraction must be between 0 and 1, got {top_fraction}")
    if scored_objects is not None:
        object_scores = object_scores.where(pd.Series(scored_objects, index=object_scores.index), np.nan, axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", scipy.stats.ConstantInputWarning)
        img_rows, img_tagged, img_hardest = _level_tests("image", image_scores, image_desc, IMAGE_DESCRIPTORS,
                                                         top_fraction)
        obj_rows, obj_tagged, obj_hardest = _level_tests("object", object_scores, object_desc, OBJECT_DESCRIPTORS,
                                                         top_fraction)
    table = pd.DataFrame(img_rows + obj_rows)
    extra = ["tag", "same_items_as", "same_items_jaccard"]
    if table.empty:
        table = pd.DataFrame(columns=CAUSES_COLUMNS + extra)
    else:
        table["q_value"] = adjust_p_values(table["p_value"].to_numpy(dtype=np.float64))
        table["significant"] = table["q_value"].fillna(1.0) < SIGNIFICANCE
        table["tag"] = table.get("tag", pd.Series("", index=table.index)).fillna("")
        hardest = img_hardest | {row + len(img_rows): items for row, items in obj_hardest.items()}
        table["same_items_as"], table["same_items_jaccard"] = fold_restatements(table, hardest)
        table = table[CAUSES_COLUMNS + extra]
    tag_index = {t: k for k, t in enumerate(dict.fromkeys(t for _, _, t in img_tagged + obj_tagged))}
    offset = len(img_rows)
    obj_tagged = [(row + offset, items, tag) for row, items, tag in obj_tagged]
    return CauseAnalysis(table=table.reset_index(drop=True),
                         image_why=_why_strings(len(image_scores), img_tagged, table, tag_index),
                         object_why=_why_strings(len(object_scores), obj_tagged, table, tag_index))
