"""Statistics of causes against scipy.stats, and planted causes found with readable "why" tags."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats

from detdiff.analysis.causes import (CAUSES_COLUMNS, OBJECT_DESCRIPTORS, adjust_p_values, bin_descriptor,
                                     find_causes, lift_test, mann_whitney_with_ci, spearman_with_ci)


def test_spearman_worked_value_and_fisher_interval() -> None:
    x = np.arange(1, 11)
    y = np.array([2, 1, 4, 3, 7, 8, 6, 10, 9, 5])
    rho, lo, hi, p = spearman_with_ci(x, y)
    # CHECKS.md worked value, from scipy.stats.spearmanr
    assert rho == pytest.approx(0.745455, abs=1e-6) and p == pytest.approx(0.013330, abs=1e-6)
    half = scipy.stats.norm.ppf(0.975) * np.sqrt(1.06 / (10 - 3))    # Fisher z, Fieller et al. variance
    assert (lo, hi) == pytest.approx((np.tanh(np.arctanh(rho) - half), np.tanh(np.arctanh(rho) + half)))
    assert lo < rho < hi


def test_mann_whitney_worked_value() -> None:
    flagged, others = np.array([1, 3, 5, 7, 9]), np.array([2, 4, 6, 8, 10, 12])
    effect, lo, hi, p = mann_whitney_with_ci(flagged, others)
    # CHECKS.md worked value, from scipy.stats.mannwhitneyu (two-sided): U = 10, p = 0.428571
    assert effect == pytest.approx(10 / 30) and p == pytest.approx(0.428571, abs=1e-6)
    assert 0 <= lo < effect < hi <= 1


def test_benjamini_hochberg_worked_value() -> None:
    q = adjust_p_values(np.array([0.01, 0.02, np.nan, 0.03, 0.04, 0.20]))
    # CHECKS.md worked value, from scipy.stats.false_discovery_control; the NaN is not a test
    np.testing.assert_allclose(q[[0, 1, 3, 4, 5]], [0.05, 0.05, 0.05, 0.05, 0.20])
    assert np.isnan(q[2])


def test_lift_against_binomial_test() -> None:
    in_bin = np.zeros(100, bool)
    in_bin[:20] = True
    top = np.zeros(100, bool)
    top[14:24] = True                                 # 6 of the 10 top items are in the bin (base rate 0.2)
    out = lift_test(in_bin, top)
    assert out["effect"] == pytest.approx(3.0) and out["top_rate"] == 0.6 and out["base_rate"] == 0.2
    ref = scipy.stats.binomtest(6, 10, 0.2)           # reference: scipy.stats.binomtest
    assert out["p_value"] == pytest.approx(ref.pvalue)
    ci = ref.proportion_ci(method="wilson")
    assert (out["ci_low"], out["ci_high"]) == pytest.approx((ci.low / 0.2, ci.high / 0.2))


def test_quartile_bins_have_readable_labels() -> None:
    spec = next(s for s in OBJECT_DESCRIPTORS if s.column == "rel_size")
    codes, labels, tags = bin_descriptor(np.array([0.1, 0.2, 0.3, 0.4, np.nan, 0.5, 0.6, 0.7, 0.8]), spec)
    assert labels == ["< 0.275", "0.275 to < 0.45", "0.45 to < 0.625", ">= 0.625"]
    assert tags == ["small_in_image", None, None, "large_in_image"]
    assert codes.tolist() == [0, 0, 1, 1, -1, 2, 2, 3, 3]
    codes, labels, _ = bin_descriptor(np.array([0.0] * 8 + [1.0, 2.0]), spec)   # repeated edges collapse
    assert len(labels) == len(set(labels)) and codes.max() == len(labels) - 1


def _planted(n_obj: int = 600, n_img: int = 120, seed: int = 0):
    """Small objects and truncated ones are hard in the box stream; dim images are hard in the background
    stream. Everything else is noise."""
    rng = np.random.default_rng(seed)
    area = rng.uniform(100, 20000, n_obj)
    truncation = np.where(rng.random(n_obj) < 0.2, rng.uniform(0.1, 0.5, n_obj), 0.0)
    obj_desc = pd.DataFrame({"area": area, "rel_size": np.sqrt(area) / 300, "elongation": rng.uniform(1, 3, n_obj),
                             "max_iou": rng.uniform(0, 0.6, n_obj), "occlusion": rng.uniform(0, 1, n_obj),
                             "truncation": truncation, "class_freq": rng.choice([0.1, 0.3, 0.6], n_obj),
                             "feature_dist": np.full(n_obj, np.nan)})
    loc = rng.normal(1.0, 0.2, n_obj) + 2.0 * (area < 32 ** 2) + 0.5 * (truncation > 0)
    obj_scores = pd.DataFrame({"loc_score": loc, "pos_score": rng.normal(1.0, 0.2, n_obj)})
    brightness = rng.uniform(20, 230, n_img)
    img_desc = pd.DataFrame({"box_count": rng.integers(0, 20, n_img), "crowding": rng.uniform(0, 0.5, n_img),
                             "blur_laplacian_var": rng.uniform(10, 500, n_img), "brightness": brightness,
                             "contrast": rng.uniform(10, 80, n_img), "clutter_edge_density": rng.uniform(0, .2, n_img),
                             "resolution": np.full(n_img, 0.3)})
    img_scores = pd.DataFrame({"loc_score": rng.normal(1, .2, n_img), "pos_score": rng.normal(1, .2, n_img),
                               "neg_score": rng.normal(5, .5, n_img) + 3.0 * (brightness < 60)})
    return img_scores, img_desc, obj_scores, obj_desc


def test_planted_causes_are_significant_and_tagged() -> None:
    img_scores, img_desc, obj_scores, obj_desc = _planted()
    found = find_causes(img_scores, img_desc, obj_scores, obj_desc, top_fraction=0.1)
    t = found.table
    assert list(t.columns[:len(CAUSES_COLUMNS)]) == CAUSES_COLUMNS
    np.testing.assert_allclose(t["q_value"], scipy.stats.false_discovery_control(t["p_value"]))   # scipy BH
    assert set(t["test"]) == {"spearman", "lift", "mannwhitney"}
    small = t[(t.stream == "loc") & (t.level == "object") & (t.descriptor == "area") & (t.bin == "small")].iloc[0]
    assert small["significant"] and small["effect"] > 2 and small["ci_low"] > 1
    trunc = t[(t.stream == "loc") & (t.descriptor == "truncation") & (t.test == "mannwhitney")].iloc[0]
    assert trunc["significant"] and trunc["effect"] > 0.5
    area_rho = t[(t.stream == "loc") & (t.descriptor == "area") & (t.test == "spearman")].iloc[0]
    assert area_rho["effect"] < 0 and area_rho["significant"]
    noise = t[(t.stream == "pos") & (t.level == "object")]
    assert not noise["significant"].any()                   # nothing planted in that stream
    assert not (t.descriptor == "resolution").any()          # constant: no test
    assert not (t.descriptor == "feature_dist").any()        # all NaN: no test
    # why: top loc items that are small say so first; items outside every top fraction say nothing
    top = obj_scores["loc_score"] >= obj_scores["loc_score"].quantile(0.9)
    small_top = top & (obj_desc["area"] < 32 ** 2)
    assert all(w.split(";")[0] == "small" for w in found.object_why[small_top])
    assert all(w == "" for w in found.object_why[~top & (obj_scores["pos_score"] < obj_scores["pos_score"].quantile(.9))])
    dim_top = (img_scores["neg_score"] >= img_scores["neg_score"].quantile(0.9)) & (img_desc["brightness"] < 60)
    assert dim_top.any() and all("dim" in w.split(";") for w in found.image_why[dim_top])


def test_top_fraction_is_checked() -> None:
    img_scores, img_desc, obj_scores, obj_desc = _planted(60, 20)
    with pytest.raises(ValueError, match="top_fraction"):
        find_causes(img_scores, img_desc, obj_scores, obj_desc, top_fraction=1.5)


def test_restated_lines_fold_under_the_stronger_one() -> None:
    """Dim images are hard in the background stream; contrast follows brightness with a little noise (mostly the same
    images in its lowest quartile) and crowding is noise: the contrast line folds under the brightness line."""
    img_scores, img_desc, obj_scores, obj_desc = _planted(n_img=400, seed=3)
    img_desc["contrast"] = 0.3 * img_desc["brightness"] + np.random.default_rng(4).normal(0.0, 6.0, len(img_desc))
    t = find_causes(img_scores, img_desc, obj_scores, obj_desc, top_fraction=0.1).table
    lifts = t[(t.stream == "neg") & (t.level == "image") & (t.test == "lift")]
    dim = lifts[(lifts.descriptor == "brightness") & lifts.bin.str.startswith("<")].iloc[0]
    low_contrast = lifts[(lifts.descriptor == "contrast") & lifts.bin.str.startswith("<")].iloc[0]
    assert dim["significant"] and low_contrast["significant"] and dim["effect"] >= low_contrast["effect"]
    # the stronger line leads; the other names it, with the Jaccard index of their hardest images
    # (Jaccard 1901: intersection over union), recomputed here with pandas boolean indexing (independent of the
    # numpy set routine in causes.py)
    assert dim["same_items_as"] == -1 and low_contrast["same_items_as"] == dim.name
    top = img_scores["neg_score"] >= img_scores["neg_score"].quantile(0.9)
    in_dim = img_desc["brightness"] < img_desc["brightness"].quantile(0.25)
    in_low = img_desc["contrast"] < img_desc["contrast"].quantile(0.25)
    both, either = (top & in_low & in_dim).sum(), (top & (in_low | in_dim)).sum()
    assert low_contrast["same_items_jaccard"] == pytest.approx(both / either) and 0.7 <= both / either < 1
    assert (t.loc[t.descriptor == "crowding", "same_items_as"] == -1).all()     # noise folds under nothing
    assert t.loc[t.same_items_as < 0, "same_items_jaccard"].isna().all()
