"""Robust subject-level regression (``glmeeg.subject_level.robust.fit_robust``) checked against outside values.

* statsmodels ``RLM`` (HuberT, TukeyBiweight) fitted point by point, at sampled points of data
  with outliers, and on the stackloss data;
* the stackloss Huber coefficients of R's ``rlm`` and of statsmodels' RLM documentation;
* properties of M-estimators with a concurrently estimated scale (equivariance in the data's
  units), of the batched path (column order, splits, threads) and of the input checks.
"""

from __future__ import annotations

import doctest

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.datasets import stackloss

from glmeeg.errors import ModelError
from glmeeg.subject_level.robust import RobustFit, fit_robust

# Stackloss, Huber's T (t = 1.345), MAD scale, order (AIRFLOW, WATERTEMP, ACIDCONC, const).
# Source: R (MASS::rlm) results kept by statsmodels in
# statsmodels/robust/tests/results/results_rlm.py, class Huber (read from the installed copy).
R_RLM_HUBER_STACKLOSS = (0.82937387, 0.92610818, -0.12784916, -41.02653105)
# Source: the RLM class docstring of statsmodels (statsmodels/robust/robust_linear_model.py),
# ``rlm_results.params`` of ``sm.RLM(data.endog, data.exog, M=sm.robust.norms.HuberT())``
# with the constant added first; printed to 8 decimals.
STATSMODELS_DOC_HUBER_STACKLOSS = (-41.02649835, 0.82938433, 0.92606597, -0.12784672)

NORMS = {"huber": lambda: sm.robust.norms.HuberT(t=1.345),
         "bisquare": lambda: sm.robust.norms.TukeyBiweight(c=4.685)}


def _stackloss():
    """Design (const, AIRFLOW, WATERTEMP, ACIDCONC) and STACKLOSS, 21 rows."""
    data = stackloss.load_pandas()
    X = np.column_stack([np.ones(len(data.exog)),
                         data.exog[["AIRFLOW", "WATERTEMP", "ACIDCONC"]].to_numpy(float)])
    return X, data.endog.to_numpy(float)


def _design(rng: np.random.Generator, n: int) -> np.ndarray:
    """Intercept, a 3-level factor (treatment coding) and a covariate."""
    level = np.arange(n) % 3
    rng.shuffle(level)
    return np.column_stack([np.ones(n), level == 1, level == 2,
                            rng.normal(50.0, 10.0, n)]).astype(np.float64)


def _data_with_outliers(rng: np.random.Generator, n: int, points: int):
    """Design, true betas and data: t(3) noise plus 5 % gross outliers (10 to 50 units)."""
    X = _design(rng, n)
    beta = np.array([1.0, 0.5, -0.5, 0.02])
    Y = (X @ beta)[:, None] + rng.standard_t(3, size=(n, points))
    bad = rng.random((n, points)) < 0.05
    Y[bad] += rng.choice([-1.0, 1.0], bad.sum()) * rng.uniform(10, 50, bad.sum())
    return X, beta, Y


# ---------------------------------------------------------------------------------------------
# statsmodels RLM at sampled points


@pytest.mark.parametrize("norm", ["huber", "bisquare"])
def test_matches_statsmodels_rlm_at_sampled_points(norm):
    rng = np.random.default_rng(2024)
    X, _, Y = _data_with_outliers(rng, 100, 400)
    fit = fit_robust(X, Y, norm=norm)
    assert fit.converged.all()
    for j in rng.choice(Y.shape[1], size=50, replace=False):
        # Source: statsmodels RLM with its default fit (IRLS from OLS, MAD scale, tol 1e-8).
        ref = sm.RLM(Y[:, j], X, M=NORMS[norm]()).fit()
        # Absolute, in units of the data (noise scale ~1, betas O(1)): the two stop on
        # different criteria at different iterates of the same sequence, each within ~1e-8 of
        # the common fixed point; 1e-6 leaves a margin of ~100.
        np.testing.assert_allclose(fit.betas[:, j], ref.params, rtol=0, atol=1e-6)
        # Scale, H1 standard errors, final weights: the same quantities at the same fixed
        # point; relative 1e-6 for the same reason.
        np.testing.assert_allclose(fit.scale[j], ref.scale, rtol=1e-6)
        bse = np.sqrt(fit.covariance_factor[j] * np.diag(fit.xtx_inv))
        np.testing.assert_allclose(bse, ref.bse, rtol=1e-6)
        np.testing.assert_allclose(fit.mean_weight[j], ref.weights.mean(), rtol=1e-6)


@pytest.mark.parametrize("norm", ["huber", "bisquare"])
def test_matches_fully_converged_statsmodels_rlm_tightly(norm):
    rng = np.random.default_rng(7)
    X, _, Y = _data_with_outliers(rng, 100, 30)
    fit = fit_robust(X, Y, norm=norm, tolerance=1e-12, max_iterations=200)
    for j in range(Y.shape[1]):
        # Source: statsmodels RLM iterated until the coefficients change by < 1e-13.
        ref = sm.RLM(Y[:, j], X, M=NORMS[norm]()).fit(conv="coefs", tol=1e-13, maxiter=500)
        # Absolute, data units ~1: both at the fixed point to ~1e-12; the rest is rounding in
        # the normal equations (ours) and the pseudo-inverse (statsmodels) over ~30 steps.
        np.testing.assert_allclose(fit.betas[:, j], ref.params, rtol=0, atol=1e-9)


@pytest.mark.parametrize("norm", ["huber", "bisquare"])
@pytest.mark.parametrize("fits", [1, 2, 3])
def test_fixed_number_of_iterations_gives_statsmodels_iterates(norm, fits):
    rng = np.random.default_rng(11)
    X, _, Y = _data_with_outliers(rng, 80, 12)
    fit = fit_robust(X, Y, norm=norm, max_iterations=fits, tolerance=0.0)
    assert (fit.iterations == fits).all()
    assert not fit.converged.any()
    for j in range(Y.shape[1]):
        # Source: statsmodels RLM, which counts its OLS start as an iteration (maxiter = fits
        # + 1) and with tol=-1 never stops early: the same sequence of weighted fits.
        ref = sm.RLM(Y[:, j], X, M=NORMS[norm]()).fit(maxiter=fits + 1, tol=-1.0)
        assert ref.fit_history["iteration"] == fits + 1
        # Relative 1e-9: identical arithmetic up to the linear solver (Cholesky of conditioned
        # normal equations vs pseudo-inverse), a few steps of rounding.
        np.testing.assert_allclose(fit.betas[:, j], ref.params, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(fit.scale[j], ref.scale, rtol=1e-9)


# ---------------------------------------------------------------------------------------------
# stackloss


def test_stackloss_huber_equals_r_and_statsmodels_published_values():
    X, y = _stackloss()
    fit = fit_robust(X, np.tile(y[:, None], (1, 257)), norm="huber")
    assert fit.converged.all()
    # Every column holds the same data: every column gives the same bits.
    assert (fit.betas == fit.betas[:, :1]).all()
    assert (fit.scale == fit.scale[0]).all()
    ours = fit.betas[:, 0]
    # Source: statsmodels RLM docstring (8 decimals printed): absolute 1e-8 = half a unit in
    # the last printed digit plus our convergence (~1e-12 here).
    np.testing.assert_allclose(ours, STATSMODELS_DOC_HUBER_STACKLOSS, rtol=0, atol=1e-8)
    # Source: R MASS::rlm (results_rlm.Huber), slopes first, intercept last. R stops its IRLS
    # when the residuals change by less than acc = 1e-4 (relative; from memory), so its values
    # sit ~4e-5 from the converged fixed point (statsmodels' own test compares them to 4
    # decimals): absolute 1e-4.
    r_order = np.r_[ours[1:], ours[0]]
    np.testing.assert_allclose(r_order, R_RLM_HUBER_STACKLOSS, rtol=0, atol=1e-4)
    assert np.abs(r_order - R_RLM_HUBER_STACKLOSS).max() > 1e-5  # the two stopping rules differ
    # Source: statsmodels RLM, live, default fit: coefficients, scale, H1 bse, weights.
    ref = sm.RLM(y, X, M=NORMS["huber"]()).fit()
    np.testing.assert_allclose(ours, ref.params, rtol=1e-9)  # both converged to ~1e-12
    np.testing.assert_allclose(fit.scale[0], ref.scale, rtol=1e-9)
    np.testing.assert_allclose(np.sqrt(fit.covariance_factor[0] * np.diag(fit.xtx_inv)),
                               ref.bse, rtol=1e-9)
    np.testing.assert_allclose(fit.mean_weight[0], ref.weights.mean(), rtol=1e-9)


def test_stackloss_huber_with_relative_residual_stop_reproduces_r_to_1e6():
    X, y = _stackloss()
    # R's rlm settings (Venables & Ripley 2002, section 6.5; defaults from memory): stop when
    # ||r_old - r|| / ||r_old|| <= 1e-4, at most 20 steps, MAD divided by 0.6745.
    fit = fit_robust(X, np.tile(y[:, None], (1, 5)), norm="huber", convergence="relative-residuals",
                     tolerance=1e-4, max_iterations=20, scale_constant=0.6745)
    assert fit.converged.all() and fit.convergence == "relative-residuals"
    r_order = np.r_[fit.betas[1:, 0], fit.betas[0, 0]]
    # Source: R MASS::rlm stackloss Huber (results_rlm.Huber in statsmodels), 8 decimals:
    # 1e-6 asked; the printed values round at 5e-9.
    np.testing.assert_allclose(r_order, R_RLM_HUBER_STACKLOSS, rtol=0, atol=1e-6)


def test_relative_residual_stop_matches_plain_irls_iterates_of_statsmodels():
    rng = np.random.default_rng(7)
    X = np.column_stack([np.ones(60), rng.normal(size=60)])
    Y = X @ [[1.0], [2.0]] + rng.standard_t(2, size=(60, 4))
    loose = fit_robust(X, Y, norm="bisquare", convergence="relative-residuals", tolerance=1e-3)
    for j in range(Y.shape[1]):
        fits = int(loose.iterations[j])
        # Source: statsmodels RLM with the same number of plain IRLS steps (maxiter counts the
        # start) and no stopping of its own: the same iterate, to rounding.
        ref = sm.RLM(Y[:, j], X, M=NORMS["bisquare"]()).fit(maxiter=fits + 1, tol=-1.0)
        np.testing.assert_allclose(loose.betas[:, j], ref.params, rtol=1e-9, atol=1e-12)


def test_stackloss_bisquare_matches_statsmodels_tukey_biweight():
    X, y = _stackloss()
    fit = fit_robust(X, np.tile(y[:, None], (1, 33)), norm="bisquare")
    assert fit.converged.all() and (fit.betas == fit.betas[:, :1]).all()
    # Source: statsmodels RLM with TukeyBiweight(c=4.685), default fit. Absolute 1e-6 (the
    # betas are O(1) to O(40)): statsmodels stops on its own criterion ~3e-9 from the fixed
    # point (it stops 2 iterations later than with tol 1e-14).
    ref = sm.RLM(y, X, M=NORMS["bisquare"]()).fit()
    np.testing.assert_allclose(fit.betas[:, 0], ref.params, rtol=0, atol=1e-6)
    # Source: statsmodels RLM iterated to coefficient changes < 1e-13: relative 1e-9.
    tight = sm.RLM(y, X, M=NORMS["bisquare"]()).fit(conv="coefs", tol=1e-13, maxiter=500)
    fit_tight = fit_robust(X, y[:, None], norm="bisquare", tolerance=1e-12)
    np.testing.assert_allclose(fit_tight.betas[:, 0], tight.params, rtol=1e-9)
    np.testing.assert_allclose(np.sqrt(fit_tight.covariance_factor[0]
                                       * np.diag(fit_tight.xtx_inv)), tight.bse, rtol=1e-8)


def test_contrast_and_contrast_variance():
    X, y = _stackloss()
    fit = fit_robust(X, np.column_stack([y, 2 * y]), norm="huber")
    ref = sm.RLM(y, X, M=NORMS["huber"]()).fit()
    c = np.array([[0.0, 1.0, -1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])
    # Source: statsmodels RLM: c @ params and c @ cov_params() @ c' (H1 covariance).
    np.testing.assert_allclose(fit.contrast(c)[:, 0], c @ ref.params, rtol=1e-9)
    np.testing.assert_allclose(fit.contrast_variance(c)[:, 0],
                               np.diag(c @ ref.cov_params() @ c.T), rtol=1e-8)
    # Doubling the data doubles the estimates and quadruples the variances (equivariance).
    np.testing.assert_allclose(fit.contrast(c)[:, 1], 2 * fit.contrast(c)[:, 0], rtol=1e-12)
    np.testing.assert_allclose(fit.contrast_variance(c)[:, 1],
                               4 * fit.contrast_variance(c)[:, 0], rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# properties


@pytest.mark.parametrize("norm", ["huber", "bisquare"])
def test_equivariant_in_the_units_of_the_data(norm):
    # An M-estimator with a concurrently estimated (MAD) scale is scale- and regression-
    # equivariant (Huber 1964; Holland & Welsch 1977): betas(a Y + X g) = a betas(Y) + g.
    # The stopping rule is on standardized residuals, so the fit stops at the same iteration in
    # volts or microvolts. (statsmodels' default criterion divides the residuals by the WLS
    # residual variance, so its stopping point moves with the units: read in its source,
    # robust_linear_model.py, RLM.deviance and _MinimalWLS.results.)
    rng = np.random.default_rng(3)
    X, _, Y = _data_with_outliers(rng, 90, 40)
    fit = fit_robust(X, Y, norm=norm)
    for a in (2.0 ** -20, 2.0 ** 10):  # powers of two scale every rounding exactly
        other = fit_robust(X, a * Y, norm=norm)
        np.testing.assert_array_equal(other.iterations, fit.iterations)
        np.testing.assert_array_equal(other.betas, a * fit.betas)
        np.testing.assert_array_equal(other.scale, a * fit.scale)
    for a in (1e-6, 1e3):
        other = fit_robust(X, a * Y, norm=norm)
        # At most one iteration apart (a rounding can cross the tolerance); relative 1e-8 on
        # the betas: both within ~1e-8 scale units of the same fixed point.
        assert np.abs(other.iterations - fit.iterations).max() <= 1
        np.testing.assert_allclose(other.betas, a * fit.betas, rtol=0,
                                   atol=1e-8 * a * fit.scale.max())
    shift = np.array([5.0, -1.0, 2.0, 0.1])
    other = fit_robust(X, Y + (X @ shift)[:, None], norm=norm)
    # Absolute 1e-8 x scale: as above (the shifted data carry ~5x larger values to round).
    np.testing.assert_allclose(other.betas, fit.betas + shift[:, None], rtol=0,
                               atol=1e-8 * fit.scale.max() * 5)


@pytest.mark.parametrize("norm", ["huber", "bisquare"])
def test_artefact_trials_pull_ols_but_not_the_robust_betas(norm):
    from glmeeg.subject_level import fit_ols

    rng = np.random.default_rng(20240501)
    n, channels, times = 200, 4, 60
    level = np.arange(n) % 2
    rng.shuffle(level)
    X = np.column_stack([np.ones(n), level, rng.normal(0, 1, n)])
    B = rng.normal(0, 2, (3, channels * times))
    Y = X @ B + rng.normal(0, 1, (n, channels * times))
    # 3 % of the trials (6) carry +100 on a block of 20 samples at every channel.
    bad = rng.choice(n, size=6, replace=False)
    block = np.zeros((channels, times), bool)
    block[:, 20:40] = True
    block = block.ravel()
    Y[np.ix_(bad, np.flatnonzero(block))] += 100.0
    robust = fit_robust(X, Y, norm=norm)
    ols = fit_ols(X, Y)
    err_robust = np.abs(robust.betas - B)[:, block].mean()
    err_ols = np.abs(ols.betas - B)[:, block].mean()
    # Source: common practice (the point of a robust fit). OLS errors on the artefact block are
    # ~3 (6 trials x 100 / 200 spread over the betas); the robust ones stay near the noise
    # level (~0.07 for 200 trials); margin: at least 10 times smaller, and < 0.15.
    assert err_ols > 1.0
    assert err_robust < 0.1 * err_ols and err_robust < 0.15
    # Away from the artefacts the two agree to the noise level (both ~ the truth).
    assert np.abs(robust.betas - B)[:, ~block].mean() < 0.15
    # The artefact trials get small weights: the mean weight drops on the block only.
    assert robust.mean_weight[block].mean() < robust.mean_weight[~block].mean()


def test_results_do_not_depend_on_column_order_split_or_dtype():
    rng = np.random.default_rng(5)
    X, _, Y = _data_with_outliers(rng, 60, 301)
    Y = Y.astype(np.float32)
    fit = fit_robust(X, Y)
    order = rng.permutation(Y.shape[1])
    permuted = fit_robust(X, Y[:, order])
    halves = [fit_robust(X, Y[:, :97]), fit_robust(X, Y[:, 97:])]
    strided = fit_robust(X, Y[:, ::3])
    as64 = fit_robust(X, Y.astype(np.float64))
    for name in ("betas", "scale", "covariance_factor", "mean_weight", "iterations",
                 "converged"):
        full = getattr(fit, name)
        # Bitwise: each point is computed by the same code on the same values.
        np.testing.assert_array_equal(getattr(permuted, name), full[..., order])
        np.testing.assert_array_equal(
            np.concatenate([getattr(h, name) for h in halves], axis=-1), full)
        np.testing.assert_array_equal(getattr(strided, name), full[..., ::3])
        np.testing.assert_array_equal(getattr(as64, name), full)


def test_thread_count_does_not_change_a_bit():
    numba = pytest.importorskip("numba")
    rng = np.random.default_rng(8)
    X, _, Y = _data_with_outliers(rng, 50, 700)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = fit_robust(X, Y, norm="bisquare")
        numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
        many = fit_robust(X, Y, norm="bisquare")
    finally:
        numba.set_num_threads(before)
    np.testing.assert_array_equal(one.betas, many.betas)
    np.testing.assert_array_equal(one.iterations, many.iterations)


def test_convergence_flags_and_iterations():
    rng = np.random.default_rng(9)
    X, _, Y = _data_with_outliers(rng, 100, 50)
    fit = fit_robust(X, Y)
    assert fit.converged.all() and (fit.iterations >= 2).all()
    assert (fit.iterations <= fit.max_iterations).all()
    assert fit.iterations.dtype.kind == "i" and fit.converged.dtype == bool
    short = fit_robust(X, Y, max_iterations=3)
    assert (short.iterations <= 3).all() and not short.converged.any()
    assert isinstance(fit, RobustFit) and fit.df_resid == 100 - 4
    assert (fit.norm, fit.tuning, fit.tolerance, fit.max_iterations) == ("huber", 1.345, 1e-8, 50)
    assert fit_robust(X, Y[:, :2], norm="bisquare").tuning == 4.685
    with pytest.raises(ValueError):
        fit.betas[0, 0] = 1.0  # read-only


def test_prior_weights_are_inverse_variances_and_zero_drops_the_trial():
    rng = np.random.default_rng(12)
    X, _, Y = _data_with_outliers(rng, 70, 6)
    a = rng.uniform(0.5, 2.0, 70)
    a[[3, 10, 11]] = 0.0
    fit = fit_robust(X, Y, weights=a)
    keep = a > 0
    root = np.sqrt(a[keep])
    assert fit.df_resid == keep.sum() - X.shape[1]
    for j in range(Y.shape[1]):
        # Source: statsmodels RLM on the rescaled model sqrt(a) y = sqrt(a) X b + e, trials
        # with weight 0 removed. Absolute 1e-6 as in the sampled-point test.
        ref = sm.RLM(root * Y[keep, j], root[:, None] * X[keep], M=NORMS["huber"]()).fit()
        np.testing.assert_allclose(fit.betas[:, j], ref.params, rtol=0, atol=1e-6)
        np.testing.assert_allclose(fit.scale[j], ref.scale, rtol=1e-6)
    dropped = fit_robust(X[keep], Y[keep], weights=a[keep])
    np.testing.assert_allclose(dropped.betas, fit.betas, rtol=1e-12, atol=1e-12)


def test_non_finite_points_flat_points_and_rank_loss():
    rng = np.random.default_rng(13)
    X, _, Y = _data_with_outliers(rng, 40, 5)
    Y[3, 1] = np.nan
    Y[:, 2] = 0.0  # a flat channel: exact fit, scale 0
    fit = fit_robust(X, Y)
    assert np.isnan(fit.betas[:, 1]).all() and not fit.converged[1] and fit.iterations[1] == 0
    assert (fit.betas[:, 2] == 0).all() and fit.scale[2] == 0 and fit.converged[2]
    assert fit.iterations[2] == 0 and fit.covariance_factor[2] == 0
    others = fit_robust(X, Y[:, [0, 3, 4]])
    np.testing.assert_array_equal(fit.betas[:, [0, 3, 4]], others.betas)
    # Bisquare gives weight 0 to every trial of a level whose trials are all far out: the
    # weighted design loses rank; the point stops, not converged, with finite betas.
    n = 30
    Xr = np.column_stack([np.ones(n), np.arange(n) < 3])
    y = rng.normal(0, 1, n)
    y[:3] += np.array([40.0, -40.0, 45.0])
    lost = fit_robust(Xr, y[:, None], norm="bisquare")
    assert not lost.converged[0] and np.isfinite(lost.betas).all()


def test_docstring_example_runs():
    import glmeeg.subject_level.robust

    result = doctest.testmod(glmeeg.subject_level.robust, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0


# ---------------------------------------------------------------------------------------------
# bad settings


@pytest.mark.parametrize("kwargs, word", [
    (dict(norm="cauchy"), "norm"),
    (dict(tuning=0.0), "tuning"),
    (dict(tuning=-1.0), "tuning"),
    (dict(tuning=float("nan")), "tuning"),
    (dict(max_iterations=0), "max_iterations"),
    (dict(max_iterations=2.5), "max_iterations"),
    (dict(tolerance=-1e-8), "tolerance"),
    (dict(scale="huber"), "scale"),
    (dict(convergence="coefficients"), "convergence"),
    (dict(scale_constant=1.4826), "scale_constant"),
    (dict(scale_constant=True), "scale_constant"),
    (dict(weights=-np.ones(20)), "weights"),
    (dict(weights=np.ones(19)), "weights"),
    (dict(weights=np.r_[np.ones(2), np.zeros(18)]), "weight"),
])
def test_bad_settings_are_one_line_model_errors_naming_the_option(kwargs, word):
    rng = np.random.default_rng(0)
    X = np.column_stack([np.ones(20), rng.normal(size=20)])
    Y = rng.normal(size=(20, 3))
    with pytest.raises(ModelError) as info:
        fit_robust(X, Y, **kwargs)
    message = str(info.value)
    assert word in message and "\n" not in message


@pytest.mark.parametrize("X, Y, word", [
    (np.ones((20, 2)), np.zeros((20, 3)), "rank"),
    (np.ones(20), np.zeros((20, 3)), "design"),
    (np.column_stack([np.ones(20), np.arange(20)]), np.zeros((19, 3)), "data"),
    (np.column_stack([np.ones(20), np.arange(20)]), np.zeros(20), "data"),
    (np.column_stack([np.ones(2), np.arange(2)]), np.zeros((2, 2)), "degrees of freedom"),
    (np.column_stack([np.ones(20), np.full(20, np.nan)]), np.zeros((20, 2)), "design"),
])
def test_bad_shapes_are_model_errors(X, Y, word):
    with pytest.raises(ModelError, match=word):
        fit_robust(X, Y)
