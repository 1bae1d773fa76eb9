"""Subject level, robust: M-estimation of the regression at every point.

An alternative to :func:`glmeeg.subject_level.fit_ols` for epochs that may hold artefact trials
the cleaning missed: a few trials with huge values pull the least-squares betas, whereas an
M-estimator with Huber's or Tukey's bisquare criterion gives them little or no weight.

The fit is iteratively reweighted least squares, run at every point by one compiled kernel
(numba, imported and compiled on the first call, not when this module is imported). Each
point's trials are copied once into a float64 buffer that stays in cache for all of that point's
iterations, and a point stops as soon as it has converged. The per-iteration median of the
absolute residuals (the robust scale) is an exact selection among the few trials that fall in a
narrow band around the previous iteration's median (all trials when the band misses), and the
weighted cross-products are re-formed only while the weights still move. Chunks of points run
in threads; each point's arithmetic is the same whatever the chunk or thread, so results do not
depend on the order, split or thread count of the points.
"""

from __future__ import annotations

import concurrent.futures
import math
import numbers
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from .. import defaults
from ..errors import ModelError
from .irls import compiled_irls
from .ols import require_full_rank

# The norms and their default tuning constants (glmeeg.defaults.ROBUST_TUNING: 95 % asymptotic
# efficiency at the normal distribution, Holland & Welsch, 1977).
NORMS = defaults.ROBUST_TUNING


_NORM_CODES = {"huber": 0, "bisquare": 1}


# Stopping rules (see fit_robust): the largest change of a standardized residual, or the
# relative change of the residual vector as a whole.
CONVERGENCE_RULES = {"standardized-residuals": 0, "relative-residuals": 1}




# Points per block: the block's trials are copied once, as float64, into a (block x trials)
# buffer that stays in cache; a chunk of points (a whole number of blocks) is one task for a
# thread.
_BLOCK_POINTS = 16


_CHUNK_POINTS = 1024


# A Cholesky pivot below this share of its diagonal means the weighted design (robust weights
# times prior weights) has lost rank at that point; the point stops there (not converged).
_PIVOT_FLOOR = 1e-10


# The weighted cross-products are re-formed at the first _EXACT_FITS fits and afterwards only
# when a weight has moved by more than _REFRESH_CHANGE since they were formed.
_EXACT_FITS, _REFRESH_CHANGE = 3, 0.05


# Bracketed selection of the median (speed only, never the result): the band's relative
# half-width is 0.25 around the previous point's median for the least-squares start (EEG
# varies slowly from sample to sample), 0.1 around the start's median at the first
# reweighting, then 3x the last relative change of the point's median;
# never less than one that holds about _BAND_TRIALS trials (at the normal, |r| has about 0.86 m
# trials per unit of relative width around its median), nor more than 0.5.
_BAND_START, _BAND_FIRST, _BAND_TRIALS, _BAND_MAX = 0.25, 0.1, 8, 0.5


@dataclass(frozen=True)
class RobustFit:
    """Robust (M-estimation) fit at every point.

    Attributes
    ----------
    betas : numpy.ndarray
        ``(n_columns, n_points)`` coefficients.
    scale : numpy.ndarray
        ``(n_points,)`` final robust scale estimate: the normalised median absolute residual
        ``median_i |r_i| / 0.6745`` (centred at 0, not at the median of the residuals) from the
        last weighted fit, ``r_i`` being the residuals of the prior-weighted model
        (``sqrt(a_i) (y_i - x_i b)``). It estimates the error standard deviation at the normal.
        It is not a residual variance: square it for that.
    covariance_factor : numpy.ndarray
        ``(n_points,)`` factor ``f`` such that Huber's H1 covariance of the betas at a point is
        ``f * xtx_inv`` (see Notes of :func:`fit_robust`).
    xtx_inv : numpy.ndarray
        ``(n_columns, n_columns)`` inverse cross-product of the (prior-weighted) design.
    mean_weight : numpy.ndarray
        ``(n_points,)`` mean over trials of the robust weights used in the last weighted fit
        (1 where no reweighting took place); a low value flags points where many trials were
        down-weighted.
    iterations : numpy.ndarray
        ``(n_points,)`` int, weighted least-squares steps taken at each point after the
        least-squares start.
    converged : numpy.ndarray
        ``(n_points,)`` bool: the stopping rule ``convergence`` was met at the last iteration,
        or the scale was zero (more than half the residuals exactly zero: an exact
        fit, nothing to reweight). False where ``max_iterations`` was reached, where the weighted
        design lost rank, or where the data hold NaN or infinity (those points' results are NaN).
    df_resid : int
        Trials with a positive prior weight minus columns.
    norm : str
        ``"huber"`` or ``"bisquare"``.
    tuning : float
        Tuning constant of the norm, in units of ``scale``.
    tolerance : float
        Convergence tolerance of the stopping rule.
    max_iterations : int
        Most weighted least-squares steps allowed at a point.
    convergence : str
        The stopping rule: ``"standardized-residuals"`` or ``"relative-residuals"``.
    scale_constant : float
        The divisor of the median absolute residual in the scale estimate.
    """

    betas: np.ndarray
    scale: np.ndarray
    covariance_factor: np.ndarray
    xtx_inv: np.ndarray
    mean_weight: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    df_resid: int
    norm: str
    tuning: float
    tolerance: float
    max_iterations: int
    convergence: str
    scale_constant: float

    def contrast(self, c: np.ndarray) -> np.ndarray:
        """Contrast estimates ``c @ betas``: ``(rows, n_points)`` for a ``(rows, n_columns)`` c."""
        from .ols import small_product

        return small_product(np.atleast_2d(np.asarray(c, dtype=np.float64)), self.betas)

    def contrast_variance(self, c: np.ndarray) -> np.ndarray:
        """H1 variance of each contrast row at every point: ``(rows, n_points)``."""
        c = np.atleast_2d(np.asarray(c, dtype=np.float64))
        quad = np.einsum("ij,jk,ik->i", c, self.xtx_inv, c)
        return quad[:, None] * self.covariance_factor[None, :]


def _conditioning(X: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Matrix M with ``diag(sqrt(a)) X M`` well conditioned: columns centred on a constant
    column (a-weighted means) when there is one, then scaled to unit norm."""
    p = X.shape[1]
    M = np.eye(p)
    constant = [j for j in range(p) if X[0, j] != 0 and np.all(X[:, j] == X[0, j])]
    if constant:
        j0 = constant[0]
        means = (a @ X) / a.sum()
        for j in range(p):
            if j != j0:
                M[j0, j] = -means[j] / X[0, j0]
    norms = np.linalg.norm(np.sqrt(a)[:, None] * X @ M, axis=0)
    norms[norms == 0] = 1.0
    return M / norms


def _validate(X, Y, norm, tuning, max_iterations, tolerance, weights, scale, convergence,
              scale_constant):
    """Check every argument of :func:`fit_robust` once; return the normalised ones."""
    if norm not in NORMS:
        raise ModelError(f"norm={norm!r} is not known; expected one of {sorted(NORMS)}")
    if convergence not in CONVERGENCE_RULES:
        raise ModelError(f"convergence={convergence!r} is not known; expected one of "
                         f"{sorted(CONVERGENCE_RULES)}")
    if isinstance(scale_constant, bool) or not isinstance(scale_constant, numbers.Real) \
            or not math.isfinite(scale_constant) or not 0.5 <= scale_constant <= 1.0:
        raise ModelError(f"scale_constant={scale_constant!r}: must be a number in [0.5, 1] "
                         "(0.6745 for a consistent scale at the normal)")
    if isinstance(tuning, bool) or not isinstance(tuning, numbers.Real) \
            or not math.isfinite(tuning) or tuning <= 0:
        raise ModelError(f"tuning={tuning!r}: must be a finite number > 0")
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, numbers.Integral) \
            or max_iterations < 1:
        raise ModelError(f"max_iterations={max_iterations!r}: must be an integer >= 1")
    if isinstance(tolerance, bool) or not isinstance(tolerance, numbers.Real) \
            or not math.isfinite(tolerance) or tolerance < 0:
        raise ModelError(f"tolerance={tolerance!r}: must be a finite number >= 0")
    if scale != "mad":
        raise ModelError(f"scale={scale!r} is not known; expected 'mad'")
    X = np.asarray(X)
    if X.ndim != 2 or not (np.issubdtype(X.dtype, np.number) or X.dtype == bool) \
            or np.iscomplexobj(X):
        raise ModelError(f"design has shape {X.shape} and dtype {X.dtype}; expected a real "
                         "(trials, columns) matrix")
    X = X.astype(np.float64)
    if not np.all(np.isfinite(X)):
        raise ModelError("design holds NaN or infinite values")
    n, p = X.shape
    Y = np.asarray(Y)
    if Y.ndim != 2 or Y.shape[0] != n:
        raise ModelError(f"data have shape {Y.shape}; expected ({n}, points) to match the design")
    if Y.dtype not in (np.float32, np.float64):
        if not (np.issubdtype(Y.dtype, np.number) or Y.dtype == bool) or np.iscomplexobj(Y):
            raise ModelError(f"data have dtype {Y.dtype}; expected real numbers")
        Y = Y.astype(np.float64)
    if not Y.flags.c_contiguous:  # one compiled kernel per dtype: copy strided views once
        Y = np.ascontiguousarray(Y)
    if weights is None:
        a = np.ones(n)
    else:
        a = np.asarray(weights)
        if a.shape != (n,) or not (np.issubdtype(a.dtype, np.number) or a.dtype == bool) \
                or np.iscomplexobj(a):
            raise ModelError(f"weights have shape {a.shape}; expected ({n},), one per trial")
        a = a.astype(np.float64)
        if not np.all(np.isfinite(a)) or np.any(a < 0):
            raise ModelError("weights must be finite and >= 0; got "
                             f"min {np.nanmin(a) if a.size else a!r}")
    rows = np.flatnonzero(a > 0)
    if rows.size <= p:
        raise ModelError(f"{rows.size} trials with positive weight for {p} design columns: "
                         "no residual degrees of freedom")
    return X, Y, float(tuning), int(max_iterations), float(tolerance), a, rows, float(scale_constant)


def robust_options(norm: str, *, tuning: float | None = None, max_iterations: int | None = None,
                   tolerance: float | None = None, convergence: str | None = None,
                   scale_constant: float | None = None) -> dict:
    """The options of :func:`fit_robust` with every one not given taken from :mod:`glmeeg.defaults`
    (read now), so that a job's options, and the cache key made of them, say what is done."""
    if norm not in defaults.ROBUST_TUNING:
        raise ModelError(f"norm={norm!r} is not known; expected one of {sorted(defaults.ROBUST_TUNING)}")
    return {"norm": norm, "tuning": defaults.ROBUST_TUNING[norm] if tuning is None else tuning,
            "max_iterations": defaults.ROBUST_MAX_ITERATIONS if max_iterations is None else max_iterations,
            "tolerance": defaults.ROBUST_TOLERANCE if tolerance is None else tolerance,
            "convergence": defaults.ROBUST_CONVERGENCE if convergence is None else convergence,
            "scale_constant": defaults.ROBUST_SCALE_CONSTANT if scale_constant is None else scale_constant}


def fit_robust(X: np.ndarray, Y: np.ndarray, *, norm: str = "huber", tuning: float | None = None,
               max_iterations: int | None = None, tolerance: float | None = None,
               convergence: str | None = None, weights: np.ndarray | None = None, scale: str = "mad",
               scale_constant: float | None = None) -> RobustFit:
    """Fit ``Y = X @ B + E`` by M-estimation (Huber or bisquare) at every column of ``Y``.

    Parameters
    ----------
    X : numpy.ndarray
        ``(n_rows, n_columns)`` design matrix of full column rank.
    Y : numpy.ndarray
        ``(n_rows, n_points)`` data, float32 or float64 (other real dtypes are converted first);
        a memory-mapped array is read once.
    norm : {"huber", "bisquare"}, default "huber"
        The criterion: Huber's [1]_ (monotone: outliers keep a weight ``tuning / |z|``) or Tukey's
        bisquare [3]_ (redescending: trials beyond ``tuning`` scales get weight 0).
    tuning : float, optional
        Tuning constant in units of the robust scale. Default 1.345 for Huber and 4.685 for the
        bisquare: 95 % efficiency relative to least squares when the errors are normal [2]_.
    max_iterations : int, optional
        Most weighted least-squares steps at a point after the least-squares start.
    tolerance : float, optional
        Tolerance of the stopping rule ``convergence``.
    convergence : {"standardized-residuals", "relative-residuals"}
        When a point has converged. ``"standardized-residuals"`` (default): no standardized
        residual ``r_i / scale`` changed by more than ``tolerance`` at the last step.
        ``"relative-residuals"``: the residual vector changed by at most ``tolerance`` relative
        to its length, ``||r_old - r_new|| / ||r_old|| <= tolerance``, the rule of Venables &
        Ripley's ``rlm`` [4]_ (used there with ``tolerance = 1e-4`` and ``max_iterations = 20``;
        with those settings and ``scale_constant = 0.6745`` the fit reproduces published values
        computed that way).
    weights : numpy.ndarray, optional
        ``(n_rows,)`` non-negative prior weights of the trials, read as inverse variances: the
        model is fitted to ``sqrt(a_i) y_i`` on ``sqrt(a_i) x_i``. Trials with weight 0 are left
        out (they count neither in the fit nor in the median). Default: all 1.
    scale : {"mad"}, default "mad"
        Robust scale re-estimated at every iteration: the median absolute residual divided by
        ``scale_constant``.
    scale_constant : float, optional
        The normal quantile at 3/4, which makes the scale consistent for the error SD at the
        normal. Software that rounds it to 0.6745 gives betas that differ in the fifth digit;
        pass 0.6745 to reproduce such results.

    Options not given take their values from :mod:`glmeeg.defaults` (``ROBUST_TUNING``,
    ``ROBUST_MAX_ITERATIONS`` = 50, ``ROBUST_TOLERANCE`` = 1e-8, ``ROBUST_CONVERGENCE``,
    ``ROBUST_SCALE_CONSTANT``).

    Returns
    -------
    RobustFit

    Raises
    ------
    ModelError
        An unknown ``norm`` or ``scale``; ``tuning`` not > 0; ``max_iterations`` < 1; a negative
        ``tolerance``; an unknown ``convergence``; ``scale_constant`` outside [0.5, 1];
        negative or non-finite ``weights``; mismatched shapes; a rank-deficient
        design; no residual degrees of freedom.

    Notes
    -----
    Iteratively reweighted least squares [2]_ with the fitting choices of ``RLM.fit()`` of
    statsmodels at its defaults: start from least squares; then, at every iteration, the scale
    ``s = median_i |r_i| / 0.6745`` of the current residuals (centred at 0), the weights
    ``w_i = psi(z_i) / z_i`` at ``z_i = r_i / s`` (Huber: ``min(1, c / |z|)``; bisquare:
    ``(1 - (z/c)^2)^2`` for ``|z| <= c``, else 0) and a weighted least-squares step.
    statsmodels counts the least-squares start as an iteration, so its ``maxiter`` is
    ``max_iterations + 1``.

    The stopping rule differs from statsmodels' default (``conv="dev"``: the change of
    ``sum_i rho(r_i / v)`` with ``v`` the residual *variance* of the weighted fit). That
    criterion depends on the units of the data (in volts it never reaches 1e-8; in larger
    units it stops early), and it is stationary at the solution, so it moves only with the
    square of the coefficients' error. Standardized residuals are free of units and move in
    proportion to the error: ``tolerance`` bounds the last change of the fitted values to about
    ``tolerance`` scales, and the betas agree with a fully converged statsmodels fit to about
    that many scales.

    Each step is taken in correction form, ``g <- g + (Xc' W Xc)^{-1} Xc' W r``, on the
    conditioned design ``Xc = X M`` (columns centred on the intercept and scaled to unit norm,
    where the cross-product is well conditioned), by Cholesky in float64; the betas are
    ``M g``. The first three steps form the cross-product of their own weights (they are the
    plain IRLS iterates, statsmodels' to rounding); later steps reuse it until some weight has
    moved by more than 0.05 since it was formed (with ``convergence="relative-residuals"``
    every step forms its own, since a rule that stops early returns an iterate, which depends
    on the path). The fixed point solves ``Xc' W r = 0``, the
    M-estimating equations, whichever matrix is used, and near it the weights have settled, so
    the reuse changes neither the solution nor, in practice, the number of iterations.

    The H1 covariance of Huber [1]_, statsmodels' default for RLM, is ``f (X'X)^{-1}`` with
    ``f = K^2 [sum_i psi(z_i)^2 / df_resid] s^2 / m^2``, ``m`` the mean of ``psi'(z_i)`` over
    trials and ``K = 1 + (n_columns / n_rows) var(psi') / m^2``, all at the final residuals.

    A point stops without converging where a bisquare fit gives zero weight to so many trials
    that the weighted design loses rank (statsmodels would go on with a pseudo-inverse). NaN or
    infinity in a point's data make that point's results NaN.

    References
    ----------
    .. [1] Huber, P. J. (1964). Robust estimation of a location parameter. The Annals of
       Mathematical Statistics, 35(1), 73-101.
    .. [2] Holland, P. W., & Welsch, R. E. (1977). Robust regression using iteratively
       reweighted least-squares. Communications in Statistics - Theory and Methods, 6(9),
       813-827.
    .. [3] Beaton, A. E., & Tukey, J. W. (1974). The fitting of power series, meaning
       polynomials, illustrated on band-spectroscopic data. Technometrics, 16(2), 147-185.
    .. [4] Venables, W. N., & Ripley, B. D. (2002). Modern Applied Statistics with S (4th ed.),
       section 6.5. Springer.

    Examples
    --------
    >>> import numpy as np
    >>> from glmeeg.subject_level.robust import fit_robust
    >>> rng = np.random.default_rng(0)
    >>> X = np.column_stack([np.ones(40), np.arange(40) % 2])
    >>> Y = 2.0 + 3.0 * X[:, [1]] + rng.normal(size=(40, 3))
    >>> Y[0] += 100.0                                  # one artefact trial
    >>> fit = fit_robust(X, Y, norm="bisquare")
    >>> bool(np.all(np.abs(fit.betas - [[2.0], [3.0]]) < 0.6)), bool(fit.converged.all())
    (True, True)
    """
    o = robust_options(norm, tuning=tuning, max_iterations=max_iterations, tolerance=tolerance,
                       convergence=convergence, scale_constant=scale_constant)
    convergence = o["convergence"]
    X, Y, tuning, max_iterations, tolerance, a, rows, scale_constant = _validate(
        X, Y, norm, o["tuning"], o["max_iterations"], o["tolerance"], weights, scale, convergence,
        o["scale_constant"])
    p = X.shape[1]
    Xu = X[rows]
    au = a[rows]
    root_w = np.sqrt(au)
    M = _conditioning(Xu, au)
    require_full_rank(root_w[:, None] * Xu, M, on=" on the trials with positive weight")
    Xc = root_w[:, None] * Xu @ M
    Q, R = np.linalg.qr(Xc)
    r_inv = scipy.linalg.solve_triangular(R, np.eye(p), check_finite=False)
    ols_map = np.ascontiguousarray(r_inv @ Q.T)  # least-squares start, conditioned coordinates
    iu, ju = np.triu_indices(p)
    gram_rows = np.ascontiguousarray((Xc[:, iu] * Xc[:, ju]).T)  # (p(p+1)/2, trials)
    n_points = Y.shape[1]
    out = dict(betas=np.full((p, n_points), np.nan), scale=np.full(n_points, np.nan),
               covariance_factor=np.full(n_points, np.nan),
               mean_weight=np.full(n_points, np.nan),
               iterations=np.zeros(n_points, np.int64),
               converged=np.zeros(n_points, bool))
    settings = (rows.astype(np.int64), root_w, np.ascontiguousarray(Xc.T), gram_rows, ols_map,
                _NORM_CODES[norm], tuning, max_iterations, tolerance, CONVERGENCE_RULES[convergence],
                # a rule that stops early returns an iterate, not the fixed point: then every
                # step is a plain IRLS step, so the path is the textbook one
                _EXACT_FITS if convergence == "standardized-residuals" else max_iterations + 1,
                _REFRESH_CHANGE, scale_constant, _PIVOT_FLOOR, _BAND_START, _BAND_FIRST,
                min(_BAND_MAX, _BAND_TRIALS / (0.86 * rows.size)), _BAND_MAX)
    _run_blocks(Y, settings, out)
    from .ols import small_product

    out["betas"] = small_product(M, out["betas"])
    out["xtx_inv"] = (M @ r_inv) @ (M @ r_inv).T
    for value in out.values():
        value.setflags(write=False)
    return RobustFit(**out, df_resid=int(rows.size - p), norm=norm, tuning=tuning,
                     tolerance=tolerance, max_iterations=max_iterations, convergence=convergence,
                     scale_constant=scale_constant)


def _run_blocks(Y, settings, out):
    """Run the kernel over blocks of points, shared out to numba's number of threads.

    Every point is computed by the same code on the same values whichever thread or chunk it
    falls in, so the split never changes a result.
    """
    kernel, threads = compiled_irls()
    n_points = Y.shape[1]
    targets = (out["betas"], out["scale"], out["covariance_factor"], out["mean_weight"],
               out["iterations"], out["converged"])
    chunk = _CHUNK_POINTS
    starts = range(0, n_points, chunk)
    n_threads = min(threads(), len(starts))

    def run(start):
        kernel(Y, start, min(start + chunk, n_points), *settings, _BLOCK_POINTS, *targets)

    if n_threads <= 1:
        for start in starts:
            run(start)
        return
    with concurrent.futures.ThreadPoolExecutor(max_workers=n_threads) as pool:
        for _ in pool.map(run, starts):  # re-raises a worker's exception here
            pass
