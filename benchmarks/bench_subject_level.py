"""Subject-level fit benchmark: throughput of glmeeg's batched OLS on one subject's epochs.

Data: 500 epochs x 64 channels x 500 samples, float32 (64 MB), design with 5 regressors
(intercept, two dummies of a three-level factor, two covariates); see ``--help`` to change sizes.

Printed, all measured in this run (the machines are shared and noisy, so only ratios measured
side by side mean anything):

* glmeeg ``fit_ols`` throughput in GB/s of epoch data (best of ``--repeats``, after a warm-up
  call that compiles the kernel);
* the ratio to statsmodels OLS fitted point by point and to ``numpy.linalg.lstsq`` point by
  point, both timed on a random sample of points and scaled to all points;
* the ratio to this machine's memory-read bandwidth, measured as ``numpy.sum`` over an array of
  the same size and dtype.

Targets (issue 2): >= 200x statsmodels, >= 20x the lstsq loop, >= 25 % of read bandwidth.

Run: ``python benchmarks/bench_subject_level.py``
"""

from __future__ import annotations

import argparse

import numpy as np

from timing import best_of


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=500)
    ap.add_argument("--channels", type=int, default=64)
    ap.add_argument("--times", type=int, default=500)
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--sample-statsmodels", type=int, default=200, help="points timed with statsmodels")
    ap.add_argument("--sample-lstsq", type=int, default=2000, help="points timed with lstsq")
    ap.add_argument("--seed", type=int, default=12345)
    args = ap.parse_args()

    import statsmodels.api as sm

    from glmeeg.subject_level import fit_ols

    rng = np.random.default_rng(args.seed)
    n, n_points = args.epochs, args.channels * args.times
    level = rng.integers(0, 3, n)
    X = np.column_stack([np.ones(n), level == 1, level == 2, rng.normal(0, 3, n),
                         rng.normal(0, 1, n)]).astype(np.float64)
    Y = (rng.standard_normal((n, n_points)) * 10 + 3).astype(np.float32)
    gb = Y.nbytes / 1e9
    print(f"data: {n} epochs x {args.channels} channels x {args.times} samples, float32, "
          f"{Y.nbytes / 2**20:.0f} MiB; design: {X.shape[1]} regressors")

    fit_ols(X, Y)  # warm-up: compiles (or loads the cached) kernel
    t_fit = best_of(lambda: fit_ols(X, Y), args.repeats)
    t_sum = best_of(lambda: Y.sum(), args.repeats)

    cols = rng.choice(n_points, size=min(args.sample_statsmodels, n_points), replace=False)
    Yd = Y.astype(np.float64)

    def sm_loop():
        for j in cols:
            sm.OLS(Yd[:, j], X).fit()
    t_sm = best_of(sm_loop, max(1, args.repeats // 3)) / cols.size * n_points

    cols_l = rng.choice(n_points, size=min(args.sample_lstsq, n_points), replace=False)

    def lstsq_loop():
        for j in cols_l:
            b, res, *_ = np.linalg.lstsq(X, Yd[:, j], rcond=None)
    t_ls = best_of(lstsq_loop, max(1, args.repeats // 3)) / cols_l.size * n_points

    fit = fit_ols(X, Y)
    ref = sm.OLS(Yd[:, cols[0]], X).fit()
    agree = np.max(np.abs(fit.betas[:, cols[0]] - ref.params) / np.abs(ref.params))

    rows = [("glmeeg fit_ols (all points)", t_fit, gb / t_fit),
            ("numpy sum (read bandwidth)", t_sum, gb / t_sum),
            (f"statsmodels OLS per point (est. from {cols.size})", t_sm, gb / t_sm),
            (f"numpy lstsq per point (est. from {cols_l.size})", t_ls, gb / t_ls)]
    print(f"{'':48s} {'seconds':>10s} {'GB/s':>8s}")
    for name, t, rate in rows:
        print(f"{name:48s} {t:10.4f} {rate:8.3f}")
    checks = [("speed-up over statsmodels per point", t_sm / t_fit, 200.0),
              ("speed-up over lstsq per point", t_ls / t_fit, 20.0),
              ("share of read bandwidth", t_sum / t_fit, 0.25)]
    for name, value, target in checks:
        verdict = "meets" if value >= target else "BELOW"
        print(f"{name:40s} {value:10.3g}   target >= {target:g}: {verdict}")
    print(f"agreement with statsmodels at one point: max relative difference {agree:.2e}")


if __name__ == "__main__":
    main()
