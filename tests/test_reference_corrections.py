"""Parametric multiple-comparison corrections checked against outside references.

* statsmodels.stats.multitest.multipletests (Bonferroni, Holm, Benjamini-Hochberg): identical
  decisions and adjusted p, with ties and with NaN entries left out of the family;
* the worked example of Benjamini & Hochberg (1995) (tests/reference/benjamini_hochberg.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

import glmeeg
from glmeeg.inference.corrections import correction_from_name
from reference import benjamini_hochberg as bh

# glmeeg correction -> statsmodels multipletests method name
METHODS = {"bonferroni": "bonferroni", "holm": "holm", "fdr": "fdr_bh"}


def _check_against_multipletests(p, name, alpha):
    """adjust_p vs multipletests on the finite entries; NaN entries stay NaN."""
    adjusted = glmeeg.adjust_p(p, correction_from_name(name))
    finite = np.isfinite(p)
    assert adjusted.shape == p.shape
    assert np.isnan(adjusted[~finite]).all()
    # statsmodels multipletests on the finite subset: NaN points are not part of the family.
    reject, p_ref, _, _ = multipletests(p[finite], alpha=alpha, method=METHODS[name])
    # rtol 1e-12: the same products and running max/min; only the order of one multiplication
    # and one division may differ (m / i * p versus p / (i / m)), an ulp or two.
    np.testing.assert_allclose(adjusted[finite], p_ref, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(adjusted[finite] <= alpha, reject)
    return adjusted


@pytest.mark.parametrize("name", list(METHODS))
def test_matches_multipletests_on_random_p_values(name):
    rng = np.random.default_rng(4101)
    # A mixture of nulls (uniform) and effects (small p), like a map with a real effect.
    p = np.concatenate([rng.uniform(size=700), rng.beta(0.2, 8.0, size=300)])
    rng.shuffle(p)
    for alpha in (0.01, 0.05, 0.2):
        adjusted = _check_against_multipletests(p, name, alpha)
    assert 0 < (adjusted <= 0.05).sum() < p.size


@pytest.mark.parametrize("name", list(METHODS))
def test_matches_multipletests_with_ties(name):
    rng = np.random.default_rng(4102)
    # Rounding to 3 decimals gives many tied p-values, including ties across the rejection
    # boundary; plus exact duplicates of small values and p = 1.
    p = np.round(np.concatenate([rng.uniform(size=400), rng.beta(0.3, 10.0, size=200)]), 3)
    p = np.concatenate([p, [0.001] * 5, [1.0] * 4, [0.0]])
    rng.shuffle(p)
    for alpha in (0.05, 0.1):
        _check_against_multipletests(p, name, alpha)


@pytest.mark.parametrize("name", list(METHODS))
def test_nan_entries_are_left_out_of_the_family(name):
    rng = np.random.default_rng(4103)
    p = np.concatenate([rng.uniform(size=300), rng.beta(0.2, 8.0, size=100)])
    p[rng.choice(p.size, 37, replace=False)] = np.nan
    # Maps come as channels x times: the shape is kept and NaN points keep a NaN adjusted p.
    p = p.reshape(8, 50)
    _check_against_multipletests(p, name, 0.05)


def test_benjamini_hochberg_1995_example():
    p = np.asarray(bh.P_VALUES)
    counts = {}
    for name in METHODS:
        adjusted = _check_against_multipletests(p, name, bh.ALPHA)
        counts[name] = int((adjusted <= bh.ALPHA).sum())
        # The rejected hypotheses are those with the smallest p-values (step-down / step-up).
        assert (adjusted <= bh.ALPHA)[: counts[name]].all()
    # Benjamini & Hochberg (1995), section 4 (from memory): Bonferroni 3, Holm 3, FDR 4.
    assert counts == {"bonferroni": bh.REJECTED_BONFERRONI, "holm": bh.REJECTED_HOLM,
                      "fdr": bh.REJECTED_FDR}


def test_holm_and_bh_by_their_definitions_on_the_example():
    # Holm (1979): reject H(1..k-1) where k is the first i with p(i) > alpha / (m - i + 1).
    # Benjamini & Hochberg (1995): reject H(1..k) for the largest k with p(k) <= k alpha / m.
    p = np.asarray(bh.P_VALUES)
    m, alpha = p.size, bh.ALPHA
    i = np.arange(1, m + 1)
    holm_fail = np.flatnonzero(p > alpha / (m - i + 1))
    holm_k = holm_fail[0] if holm_fail.size else m
    bh_k = np.flatnonzero(p <= i * alpha / m).max() + 1
    assert (holm_k, bh_k) == (bh.REJECTED_HOLM, bh.REJECTED_FDR)
    holm = glmeeg.adjust_p(p, glmeeg.Holm())
    fdr = glmeeg.adjust_p(p, glmeeg.FalseDiscoveryRate())
    assert (holm <= alpha).sum() == holm_k and (fdr <= alpha).sum() == bh_k


def test_no_correction_and_all_nan():
    p = np.array([0.2, np.nan, 0.01])
    # No correction returns p itself (identity; nothing to compare but the input).
    np.testing.assert_array_equal(glmeeg.adjust_p(p, glmeeg.NoCorrection()), p)
    assert np.isnan(glmeeg.adjust_p(np.full(4, np.nan), glmeeg.Holm())).all()
