"""A methods paragraph generated from the settings of a finished run, ready to paste.

Every setting that changes a result is stated: the subject-level model and its coding, the
estimator (least squares or M-estimation with its norm, tuning constant, scale and stopping
rule), trial weights, the group-level model, contrast and method, the alternative and alpha,
the correction with all of its parameters (resamplings, seed, scheme, cluster-forming
threshold and statistic, TFCE exponents), the effect sizes with their intervals and the
bootstrap, and the software versions. The text describes what was done; the reader still has
to say why.
"""

from __future__ import annotations

from statistics import median

from ..results import RunResult, TestResult

__all__ = ["methods_paragraph"]

_SCHEMES = {"sign-flip": "sign-flipping of the participants' contrast estimates",
            "permute": "permutation of participants (Freedman & Lane, 1983)"}


def _list(items) -> str:
    items = list(items)
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _subject_model(run: RunResult) -> str:
    sm = run.design["subject_model"]
    data = run.design["data"]
    t = run.tests[0]
    ax = t.axes
    used = [s.trials_used for s in run.subjects]
    dropped = sum(s.rows_dropped for s in run.subjects)
    where = (f"{len(ax.channels)} channels x {len(ax.frequencies)} frequencies x {len(ax.times)} "
             "time samples" if ax.frequencies is not None else
             f"{len(ax.channels)} channels x {len(ax.times)} time samples")
    text = (f"For each of the {len(run.subjects)} participants, the single-trial data at every "
            f"point ({where}, {1000 * ax.times[0]:g} to {1000 * ax.times[-1]:g} ms at "
            f"{data['sampling_rate']:g} Hz; {ax.n_points} points) were modelled with the linear "
            f"model y ~ {run.subject_formula} (columns: {', '.join(run.subject_columns)})")
    levels = sm.get("levels") or {}
    if levels:
        text += ("; factors in treatment coding with reference level "
                 + _list(f"'{lv[0]}' for {name}" for name, lv in levels.items()))
    text += ". "
    if sm.get("robust"):
        norm = {"huber": "Huber's", "bisquare": "Tukey's bisquare"}[sm["robust"]]
        from ..subject_level.robust import robust_options

        o = robust_options(sm["robust"], tuning=sm.get("robust_tuning"),
                           max_iterations=sm.get("robust_max_iterations"),
                           tolerance=sm.get("robust_tolerance"), convergence=sm.get("robust_convergence"),
                           scale_constant=sm.get("robust_scale_constant"))
        tuning, constant, rule, tol = o["tuning"], o["scale_constant"], o["convergence"], o["tolerance"]
        stop = ("no standardized residual changed by more than" if rule == "standardized-residuals"
                else "the residual vector changed by less than a relative")
        text += (f"Betas were estimated by M-estimation with {norm} norm (tuning constant "
                 f"{tuning:g}) by iteratively reweighted least squares from the least-squares "
                 f"start, the scale re-estimated at every step as the median absolute residual "
                 f"divided by {constant:.6g}; iterations stopped when {stop} {tol:g}, after at "
                 f"most {o['max_iterations']} steps (Huber, 1964; Holland & "
                 "Welsch, 1977). ")
    else:
        text += "Betas were estimated by ordinary least squares (QR factorization). "
    if sm.get("trial_weights"):
        text += f"Trials were weighted by the column '{sm['trial_weights']}' (inverse variances). "
    text += (f"Participants contributed a median of {median(used):g} trials (range {min(used)}-"
             f"{max(used)})" + (f"; {dropped} trial rows with missing values were left out" if dropped else "")
             + ".")
    return text


def _test(t: TestResult) -> str:
    s = t.spec
    contrast = "; ".join(f"{lab}" for lab in t.subject_contrast_labels)
    group = "; ".join(t.group_contrast_labels)
    model = ("an intercept-only group model (one sample)" if t.group_formula.strip() == "1"
             else f"the group model {t.group_formula}")
    if s.group_method == "trimmed":
        trim = s.trim_used
        how = (f"{100 * trim:g} % trimmed means (one-sample trimmed t, Tukey & McLaughlin, 1963; or "
               "Yuen's two-sample test, Yuen, 1974)")
    elif s.group_method == "welch":
        how = "Welch's unequal-variance t test (Welch, 1947)"
    elif t.kind == "F" and t.subject_contrast.shape[0] > 1:
        how = (f"{model} and Hotelling's T-squared, reported as its exact "
               f"F({t.df[0]:g}, {t.df[1]:g})")
    else:
        stat = f"t({t.df[1]:g})" if t.kind == "t" else f"F({t.df[0]:g}, {t.df[1]:g})"
        how = f"{model} (ordinary least squares) and {stat}"
    tail = ("upper-tailed" if t.kind == "F" else
            {"two-sided": "two-sided", "greater": "one-sided (greater)", "less": "one-sided (less)"}[t.alternative])
    text = (f"Test '{t.name}': the subject-level contrast {contrast} of {t.n_subjects} participants "
            f"was tested against the group contrast {group} with {how}, {tail}, alpha = {t.alpha:g}. ")
    c = t.correction
    n_points = t.axes.n_points
    if c.method in ("none", "bonferroni", "holm", "fdr"):
        text += {"none": f"p-values were not corrected over the {n_points} points.",
                 "bonferroni": f"The family-wise error rate over the {n_points} points was controlled "
                               "with the Bonferroni correction.",
                 "holm": f"The family-wise error rate over the {n_points} points was controlled with "
                         "Holm's step-down procedure (Holm, 1979).",
                 "fdr": f"The false discovery rate over the {n_points} points was controlled with the "
                        "Benjamini-Hochberg procedure (Benjamini & Hochberg, 1995)."}[c.method]
    else:
        r = t.resampling
        scheme = _SCHEMES.get(r.scheme, r.scheme) if r is not None else "resampling"
        count = (f"all {r.n_resamplings} possible resamplings" if r is not None and r.exhaustive
                 else f"{c.permutations} random resamplings (seed {c.seed})")
        if c.method == "max-statistic":
            text += ("The family-wise error rate over all points was controlled with the permutation "
                     "distribution of the maximum statistic")
        elif c.method == "cluster":
            thr = (f"{r.cluster_threshold:.4g}" if r is not None and r.cluster_threshold is not None
                   else "parametric p < 0.05")
            what = "summed statistic (mass)" if c.statistic == "mass" else "number of points (extent)"
            text += (f"Clusters of neighbouring points beyond a cluster-forming threshold of {thr} "
                     f"were formed and their {what} compared with the permutation distribution of "
                     "the largest cluster (Maris & Oostenveld, 2007)")
        else:
            text += (f"The statistic was enhanced by threshold-free cluster enhancement (E = "
                     f"{c.extent_exponent:g}, H = {c.height_exponent:g}; Smith & Nichols, 2009) and "
                     "compared with the permutation distribution of the maximum enhanced value")
        text += f", with {count} by {scheme}"
        text += "; p = (b + 1) / (m + 1) (Phipson & Smyth, 2010)." if not (r and r.exhaustive) else "."
        if c.method == "cluster":
            text += " A significant cluster shows that an effect exists, not its exact onset or extent."
    level = f"{100 * t.confidence_level:g} %"
    if t.effect_size_low is not None:
        source = "noncentral t" if t.kind == "t" else "noncentral F"
        text += (f" Effect sizes ({t.effect_size_name}) are given with {level} confidence intervals "
                 f"from the {source} distribution.")
    else:
        text += f" Effect sizes: {t.effect_size_name}."
    if s.bootstrap:
        text += (f" {level} bootstrap intervals of the group estimate ({s.bootstrap} resamples of "
                 f"participants, {'BCa' if s.bootstrap_method == 'bca' else 'percentile'}, seed "
                 f"{s.seed if s.seed is not None else 0}) are reported.")
    return text


def methods_paragraph(run: RunResult) -> str:
    """The methods text of a run: the subject-level model, then one paragraph per test.

    Parameters
    ----------
    run : RunResult
        A finished run (:func:`glmeeg.run_analysis`).

    Returns
    -------
    str
        Paragraphs separated by blank lines, stating every setting that changes a result and
        the software versions.

    References
    ----------
    .. [1] Freedman, D., & Lane, D. (1983). A nonstochastic interpretation of reported
       significance levels. Journal of Business & Economic Statistics, 1(4), 292-298.
    .. [2] Phipson, B., & Smyth, G. K. (2010). Permutation p-values should never be zero.
       Statistical Applications in Genetics and Molecular Biology, 9(1), 39.
    """
    p = run.provenance
    software = (f"Analyses were run with glmeeg {p.glmeeg_version} (Python {p.python_version}, NumPy "
                f"{p.numpy_version}, SciPy {p.scipy_version}, pandas {p.pandas_version}, patsy "
                f"{p.patsy_version}), fitting a two-level mass-univariate general linear model: "
                "single-trial regressions within each participant, then group-level tests of the "
                "participants' contrast estimates at every point.")
    return "\n\n".join([software + " " + _subject_model(run)] + [_test(t) for t in run.tests])
