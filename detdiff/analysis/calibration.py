"""Turn suspicion scores into estimated probabilities of a real label error, measured with probes.

Probes are label faults the audit makes itself on items whose evidence does not depend on them
(:mod:`detdiff.analysis.probes`): their scores show how a fault of that kind scores on *this* dataset. Every
other item is a mixture: a share ``pi`` of real faults (scoring like the probes: the one assumption) and
``1 - pi`` clean items.

* **Fault share** ``pi``: above a threshold ``t`` the unlabelled items hold about ``pi`` times the probes'
  tail share plus a few clean items, so ``pi ~ (1 - F(t)) / (1 - F1(t))`` (mixture-proportion estimation
  from an upper tail: Scott, Blanchard & Handy, COLT 2013; the positive-unlabelled setting of Elkan & Noto,
  KDD 2008). That ratio is ``pi * r(t) + c(t)``: at low thresholds clean items above ``t`` add ``c(t)``; at
  high ones ``r(t)`` falls below 1 where probes reach higher scores than real faults. Where the two effects
  leave a level stretch, that level is ``pi``: the ratios are read at the probes' deciles 0.1 ... 0.9
  (:data:`TAIL_GRID`), and when :data:`PLATEAU_WIDTH` neighbouring ratios agree within a factor
  :data:`PLATEAU_AGREEMENT`, ``pi`` is the median of the neighbours that agree best. Where no stretch is level
  (the ratio keeps falling: probes are easier to spot than real faults all along), ``pi`` is the median of the
  ratios at the probes' quantiles 0.5 / 0.75 / 0.9 (:data:`TAIL_QUANTILES`); the textbook estimate, the
  smallest ratio over high thresholds, gave 0 on the demo's wrong classes. Measured on seven audits (four
  scenarios, 4.0-5.2% planted per kind): the wrong-class ratios level off on all seven (best neighbours within
  a factor 1.01-1.06) and the level is 0.94-1.17x the truth where the quartile median read 0.59-1.17x
  (warehouse seed 2: list 31 -> 104 boxes, self-estimated precision 0.72 against true 1.00 -> 0.82 against
  0.90); the seven lists' self-estimates are then all within 0.08 of the truth and five within 0.05 (before:
  four, and warehouse seed 2 0.28 off). The loose-box ratios fall all along on all seven (best neighbours
  1.27-2.4x apart), so they keep the quartile median. The missing-box proposals level off on two: streetcam
  seed 2 (list 50 -> 234, true precision 0.86 -> 0.69, self-estimated 0.96 -> 0.61) and warehouse seed 2
  (list unchanged, self-estimate 0.52 -> 0.66 against true 0.97). Taking the flattest stretch whether or not
  it is level (an earlier version) lengthened the held-out aerial loose-box list from 64 to 661 boxes whose
  true precision 0.51 it put at 0.83.
* **Posterior** ``P(fault | s)``: the probability that an item of score ``s`` is a probe, among probes and
  unlabelled items, is fitted by isotonic regression (non-decreasing in ``s``); its odds times
  ``n_unlabelled / n_probes`` estimate the density ratio ``f1(s) / f(s)``, and the posterior is
  ``pi * f1(s) / f(s)``, clipped to ``[0, 1]`` (Elkan & Noto, KDD 2008, §2-3).
* **No calibration** where fewer than :data:`MIN_PROBES` probes exist or the probes' AUROC against the items is
  not above 0.5 at 95% confidence: the evidence does not separate faults there, no item gets a probability,
  and the lists stay empty. The fault share is capped at :data:`MAX_FAULT_SHARE` (errors are a minority).
* **Self-measured AUROC**: probes against unlabelled items, corrected for the real faults among the
  unlabelled ones (their AUROC against probes is taken as 0.5): ``(A - pi / 2) / (1 - pi)``, with the
  standard error of Hanley & McNeil (Radiology, 1982).

Tried and not kept (same run folders, against the planted truth):

* **Probes matched to the faults' severity.** Box probes in five IoU bands (0.30-0.80), crop models trained again,
  the band taken whose tail ratios stop falling without rising (the mildest severity the items' upper tail is
  consistent with). Streetcam seed 5 (planted IoU 0.50-0.70): the 0.55-0.65 band levels off at a fault share of
  0.054 against 0.052 true. Aerial seed 6 (planted 0.55-0.80): clean boxes' scores have a heavy tail there (small
  boxes), no band levels off, the 0.72-0.80 band read 0.089 and the loose list grew from 184 to 1,330 boxes at
  0.42 true precision against 0.72 self-estimated; with a share near the truth (0.040, the 0.65-0.72 band) a
  495-box list read 0.79 against 0.51 true.
  Where the evidence cannot tell mild faults from clean boxes' noise, no choice of probes recovers the truth.
* **The list's precision estimated by sample splitting** (the list cut with half the probes, its precision read with
  the other half, both ways, four random halvings): missing-box lists of fifteen audits, mean absolute error
  against the truth 0.080 -> 0.079; half the probes make each estimate noisier by as much as it removes the
  selection bias.

Score direction: higher = more suspicious. NaN scores rank lowest.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import isotonic_regression
from scipy.stats import rankdata

#: Probe-score quantiles at which the tail ratio is read, looking for a level stretch (module docstring)...
TAIL_GRID = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9)
#: ...of this many neighbouring ratios...
PLATEAU_WIDTH = 3
#: ...that agree within this factor (largest / smallest).
PLATEAU_AGREEMENT = 1.16
#: Where no stretch is level: the fault share is the median of the ratios at these probe-score quantiles.
TAIL_QUANTILES = (0.5, 0.75, 0.9)
#: Fewer probes than this: no calibration (the figures would be noise).
MIN_PROBES = 10
#: Label errors are taken to be a minority: the estimated fault share is capped here. Where the evidence cannot
#: tell probes from items, the tail ratios approach 1 and would call everything a fault.
MAX_FAULT_SHARE = 0.5


@dataclass
class Calibration:
    """Result of :func:`calibrate` for one kind of fault.

    ``posterior [N]``: P(real fault) per unlabelled item (NaN when uncalibrated); ``fault_share`` the
    estimated ``pi``; ``auroc`` / ``auroc_se`` the self-measured AUROC (contamination-corrected) and its
    standard error; ``auroc_raw`` the uncorrected probes-vs-unlabelled AUROC; ``num_probes``.
    """

    posterior: np.ndarray
    fault_share: float
    auroc: float
    auroc_se: float
    auroc_raw: float
    num_probes: int

    @property
    def calibrated(self) -> bool:
        return self.num_probes >= MIN_PROBES and bool(np.isfinite(self.posterior).any())

    def expected_faults(self, rows: np.ndarray | None = None) -> float:
        """Expected number of real faults among ``rows`` (all unlabelled items when None)."""
        post = self.posterior if rows is None else self.posterior[np.asarray(rows, dtype=np.int64)]
        return float(np.nansum(post))

    def expected_precision(self, rows: np.ndarray) -> float:
        """Expected share of real faults in a list of unlabelled items (mean posterior); NaN for an empty list."""
        post = self.posterior[np.asarray(rows, dtype=np.int64)]
        return float(np.nanmean(post)) if len(post) else float("nan")


def _finite(scores: np.ndarray, floor: float) -> np.ndarray:
    scores = np.asarray(scores, dtype=np.float64)
    return np.where(np.isfinite(scores), scores, floor)


def auroc_mann_whitney(positive: np.ndarray, negative: np.ndarray) -> float:
    """P(score of a positive > score of a negative) + 0.5 P(tie): the AUROC as a Mann-Whitney U statistic."""
    n1, n0 = len(positive), len(negative)
    if not n1 or not n0:
        return float("nan")
    ranks = rankdata(np.concatenate([positive, negative]))
    return float((ranks[:n1].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def hanley_mcneil_se(auc: float, n_pos: int, n_neg: int) -> float:
    """Standard error of an AUROC (Hanley & McNeil, "The meaning and use of the area under a ROC curve", 1982)."""
    if not (n_pos and n_neg) or not np.isfinite(auc):
        return float("nan")
    q1, q2 = auc / (2 - auc), 2 * auc * auc / (1 + auc)
    var = (auc * (1 - auc) + (n_pos - 1) * (q1 - auc * auc) + (n_neg - 1) * (q2 - auc * auc)) / (n_pos * n_neg)
    return float(math.sqrt(max(var, 0.0)))


def tail_ratios(unlabelled: np.ndarray, probes: np.ndarray, quantiles: tuple[float, ...]) -> np.ndarray:
    """The upper-tail ratios ``(1 - F(t)) / (1 - F1(t))`` at the probes' score ``quantiles``."""
    n0, n1 = len(unlabelled), len(probes)
    probes_sorted, u_sorted = np.sort(probes), np.sort(unlabelled)
    thresholds = np.quantile(probes_sorted, quantiles, method="lower")
    tail_u = (n0 - np.searchsorted(u_sorted, thresholds, side="left")) / n0
    tail_p = (n1 - np.searchsorted(probes_sorted, thresholds, side="left")) / n1
    return tail_u / tail_p


def fault_share(unlabelled: np.ndarray, probes: np.ndarray) -> float:
    """Share of faults among ``unlabelled`` scores: the level of the upper-tail ratios where they level off,
    else their median at the probes' upper quartiles (see module docstring)."""
    if not len(unlabelled) or len(probes) < MIN_PROBES:
        return float("nan")
    ratios = np.maximum(tail_ratios(unlabelled, probes, TAIL_GRID), 1e-12)
    windows = np.lib.stride_tricks.sliding_window_view(ratios, PLATEAU_WIDTH)
    spread = windows.max(axis=1) / windows.min(axis=1)
    flattest = int(np.argmin(spread))
    if spread[flattest] <= PLATEAU_AGREEMENT:
        return float(np.clip(np.median(windows[flattest]), 0.0, 1.0))
    return float(np.clip(np.median(tail_ratios(unlabelled, probes, TAIL_QUANTILES)), 0.0, 1.0))


def probe_odds(unlabelled: np.ndarray, probes: np.ndarray) -> np.ndarray:
    """``f1(s) / f(s)`` at each unlabelled score: isotonic P(probe | s) over the pooled items, as odds times
    ``n_unlabelled / n_probes``; tied scores share one value."""
    n0, n1 = len(unlabelled), len(probes)
    pooled = np.concatenate([unlabelled, probes])
    is_probe = np.concatenate([np.zeros(n0), np.ones(n1)])
    order = np.argsort(pooled, kind="stable")
    fitted = isotonic_regression(is_probe[order], increasing=True).x
    values, first = np.unique(pooled[order], return_index=True)
    size = np.diff(np.r_[first, len(order)])
    block = np.add.reduceat(fitted, first) / size
    g = block[np.searchsorted(values, unlabelled)]
    return (n0 / n1) * g / np.maximum(1.0 - g, 1e-9)


def calibrate(unlabelled: np.ndarray, probes: np.ndarray, *, separates: bool | None = None) -> Calibration:
    """Calibrate the scores of ``unlabelled`` items ``[N]`` with the scores of ``probes`` ``[P]``.

    ``separates`` says whether the evidence tells faults apart, when another test than probes against these
    items decides it (items that are mostly faults score like the probes: their AUROC is near 0.5 whether the
    evidence works or not); None: probes against the items, as in the module docstring.
    """
    unlabelled = np.asarray(unlabelled, dtype=np.float64)
    probes = np.asarray(probes, dtype=np.float64)
    every = np.concatenate([unlabelled, probes])
    floor = float(np.nanmin(every)) - 1.0 if np.isfinite(every).any() else 0.0
    u, p = _finite(unlabelled, floor), _finite(probes, floor)
    n0, n1 = len(u), len(p)
    raw = auroc_mann_whitney(p, u)
    if separates is None:
        separates = bool(np.isfinite(raw) and raw - 1.96 * hanley_mcneil_se(raw, n1, n0) > 0.5)
    if n1 < MIN_PROBES or not n0 or not separates:
        return Calibration(np.full(n0, np.nan), float("nan"), raw if n1 and n0 else float("nan"),
                           hanley_mcneil_se(raw, n1, n0), raw, n1)
    pi = min(fault_share(u, p), MAX_FAULT_SHARE)
    corrected = float(np.clip((raw - 0.5 * pi) / (1 - pi), 0.0, 1.0)) if pi < 1 else float("nan")
    posterior = np.clip(pi * probe_odds(u, p), 0.0, 1.0)
    return Calibration(posterior, pi, corrected, hanley_mcneil_se(corrected, n1, n0), raw, n1)


def cut_list(order: np.ndarray, posterior: np.ndarray, level: float) -> np.ndarray:
    """The head of a ranked list (``order``: item rows, most suspicious first) whose items all have a
    posterior of at least ``level``; the posterior is made non-increasing along the ranking first (an item
    ranked above another is never less likely a fault)."""
    post = np.asarray(posterior, dtype=np.float64)[np.asarray(order, dtype=np.int64)]
    post = np.minimum.accumulate(np.nan_to_num(post, nan=0.0))
    keep = int(np.searchsorted(-post, -level, side="right"))
    return np.asarray(order[:keep], dtype=np.int64)
