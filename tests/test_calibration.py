"""Calibration of suspicion scores with probes: AUROC, its standard error, fault share, posterior, list cut."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import mannwhitneyu, norm
from sklearn.metrics import roc_auc_score

from detdiff.analysis.calibration import (MAX_FAULT_SHARE, PLATEAU_AGREEMENT, TAIL_GRID, TAIL_QUANTILES,
                                          auroc_mann_whitney, calibrate, cut_list, fault_share, hanley_mcneil_se,
                                          tail_ratios)


def test_auroc_matches_scipy_and_sklearn() -> None:
    # Published references: scipy.stats.mannwhitneyu (U statistic) and sklearn.metrics.roc_auc_score; with ties.
    rng = np.random.default_rng(0)
    pos = np.round(rng.normal(1.0, 1.0, 40), 1)
    neg = np.round(rng.normal(0.0, 1.0, 300), 1)
    ours = auroc_mann_whitney(pos, neg)
    u = mannwhitneyu(pos, neg, alternative="two-sided").statistic
    assert ours == pytest.approx(u / (len(pos) * len(neg)))
    labels = np.r_[np.ones(len(pos)), np.zeros(len(neg))]
    assert ours == pytest.approx(roc_auc_score(labels, np.r_[pos, neg]))


def test_hanley_mcneil_standard_error_worked_value() -> None:
    # Hanley & McNeil (Radiology 1982), eq. 2 by hand for A = 0.8, 50 positives, 50 negatives:
    # Q1 = 0.8 / 1.2, Q2 = 2 * 0.64 / 1.8; SE^2 = (0.16 + 49 (Q1 - 0.64) + 49 (Q2 - 0.64)) / 2500
    q1, q2 = 0.8 / 1.2, 1.28 / 1.8
    expected = np.sqrt((0.16 + 49 * (q1 - 0.64) + 49 * (q2 - 0.64)) / 2500)
    assert hanley_mcneil_se(0.8, 50, 50) == pytest.approx(expected)
    assert expected == pytest.approx(0.0445, abs=1e-4)


def _mixture(rng: np.random.Generator, n: int, share: float, probes: int):
    faults = rng.random(n) < share
    scores = np.where(faults, rng.normal(3.0, 1.0, n), rng.normal(0.0, 1.0, n))
    return scores, faults, rng.normal(3.0, 1.0, probes)


def test_fault_share_and_posterior_recover_a_known_mixture() -> None:
    # Invented mixture with a known answer: 6% faults scoring like the probes (N(3,1)) among N(0,1) clean items.
    rng = np.random.default_rng(1)
    scores, faults, probes = _mixture(rng, 20000, 0.06, 4000)
    assert fault_share(scores, probes) == pytest.approx(0.06, abs=0.01)
    cal = calibrate(scores, probes)
    assert cal.calibrated
    # the true posterior at s is 0.06 f1(s) / (0.06 f1(s) + 0.94 f0(s)); compare on a band of scores
    band = (scores > 1.8) & (scores < 2.2)
    f1, f0 = np.exp(-0.5 * (scores[band] - 3) ** 2), np.exp(-0.5 * scores[band] ** 2)
    truth = 0.06 * f1 / (0.06 * f1 + 0.94 * f0)
    assert np.mean(cal.posterior[band]) == pytest.approx(np.mean(truth), abs=0.08)
    # the expected number of faults is close to the real count, and the AUROC correction goes the right way
    assert cal.expected_faults() == pytest.approx(faults.sum(), rel=0.15)
    assert cal.auroc >= cal.auroc_raw


def test_fault_share_falls_back_to_the_quartile_median_where_the_ratios_keep_falling() -> None:
    # Invented mixture with known tails: 6% faults N(3,1) among N(0,1) clean items, probes easier to spot (N(4,1)).
    # The tail ratio at the probes' quantile q is (0.94 sf(t) + 0.06 sf(t - 3)) / (1 - q) at t = 4 + ppf(q)
    # (normal survival and quantile functions: scipy.stats.norm); it falls all along, so no stretch is level.
    rng = np.random.default_rng(5)
    faults = rng.random(200000) < 0.06
    scores = np.where(faults, rng.normal(3.0, 1.0, faults.size), rng.normal(0.0, 1.0, faults.size))
    probes = rng.normal(4.0, 1.0, 40000)

    def population(q: np.ndarray) -> np.ndarray:
        t = 4.0 + norm.ppf(q)
        return (0.94 * norm.sf(t) + 0.06 * norm.sf(t - 3.0)) / (1.0 - q)

    grid = population(np.asarray(TAIL_GRID))
    assert np.all(np.diff(grid) < 0) and np.all(grid[2:] / grid[:-2] < 1 / PLATEAU_AGREEMENT)
    assert tail_ratios(scores, probes, TAIL_GRID) == pytest.approx(grid, rel=0.2)     # ~135 items past the last
    assert fault_share(scores, probes) == pytest.approx(np.median(population(np.asarray(TAIL_QUANTILES))), rel=0.08)
    # probes that score like the faults: the ratios level off at the share itself
    assert fault_share(scores, rng.normal(3.0, 1.0, 40000)) == pytest.approx(0.06, abs=0.004)


def test_cut_list_keeps_the_head_above_the_level_and_its_precision_holds() -> None:
    rng = np.random.default_rng(2)
    scores, faults, probes = _mixture(rng, 20000, 0.05, 4000)
    cal = calibrate(scores, probes)
    order = np.argsort(-scores, kind="stable")
    kept = cut_list(order, cal.posterior, 0.5)
    assert len(kept) and np.all(cal.posterior[kept] >= 0.5)
    assert np.array_equal(kept, order[:len(kept)])
    assert faults[kept].mean() == pytest.approx(cal.expected_precision(kept), abs=0.07)


def test_uninformative_evidence_is_not_calibrated_and_lists_nothing() -> None:
    rng = np.random.default_rng(3)
    items, probes = rng.normal(size=500), rng.normal(size=500)
    cal = calibrate(items, probes)
    assert not cal.calibrated
    assert len(cut_list(np.argsort(-items), cal.posterior, 0.5)) == 0


def test_fault_share_is_capped() -> None:
    rng = np.random.default_rng(4)
    items, probes = rng.normal(2.0, 1.0, 1000), rng.normal(2.5, 1.0, 1000)
    assert calibrate(items, probes).fault_share <= MAX_FAULT_SHARE
