"""Assumption checks: artefact trials, outlying subjects, residual normality."""

import numpy as np
import scipy.stats
from typer.testing import CliRunner

from glmeeg.testing import write_study
from glmeeg.group_level.assumptions import group_checks, outlying_trials, robust_z
from glmeeg.cli import app


def test_check_data_flags_a_planted_artefact_trial(tmp_path):
    design = write_study(tmp_path / "s", n_subjects=6, n_trials=30, seed=12)
    path = design.parent / "epochs" / "s03.npy"
    y = np.load(path)
    y[17] += 60.0          # one epoch with a large drift on every channel (an artefact)
    np.save(path, y)
    result = CliRunner().invoke(app, ["check", str(design), "--data"])
    assert result.exit_code == 0, result.output
    line = [ln for ln in result.stdout.splitlines() if "subject s03" in ln and "outlying trial" in ln]
    assert line and "17" in line[0]
    assert "robust" in result.stdout


def test_outlying_trials_on_clean_data_are_rare():
    rng = np.random.default_rng(13)
    X = np.column_stack([np.ones(200), rng.normal(size=200)])
    y = rng.normal(size=(200, 300))
    # Residual energy of clean trials is a scaled chi-square with 300 df: nearly symmetric in
    # log; |robust z| > 3.5 should almost never happen (normal tail 2e-4 per trial).
    assert outlying_trials(X, y).size <= 1


def test_group_checks_normality_p_is_scipy_normaltest_of_residuals():
    rng = np.random.default_rng(14)
    y = rng.standard_t(3, size=(30, 20))
    checks = group_checks(y, np.ones((30, 1)), tuple(f"s{i}" for i in range(30)))
    # D'Agostino-Pearson omnibus test (scipy.stats.normaltest) on the mean-centred values.
    ref = scipy.stats.normaltest(y - y.mean(axis=0), axis=0).pvalue
    np.testing.assert_allclose(checks.normality_p, ref, rtol=1e-10)
    np.testing.assert_allclose(checks.skewness, scipy.stats.skew(y, axis=0, bias=False), rtol=1e-10)


def test_an_outlying_subject_is_named():
    rng = np.random.default_rng(15)
    y = rng.normal(size=(20, 50))
    y[4] += 8.0
    checks = group_checks(y, np.ones((20, 1)), tuple(f"s{i:02d}" for i in range(20)))
    assert checks.outlying_subjects == ("s04",)


def test_robust_z_of_a_constant_is_zero():
    assert np.all(robust_z(np.ones((5, 2))) == 0)


def test_check_finds_the_demo_artefact_trials(tmp_path):
    # The demo plants 50-150 µV drifts or spikes on 1-4 channels in 1-3 % of the kept trials and
    # blinks in 3-12 % (glmeeg.demo), and lists them in planted_artefacts.csv, which the
    # analysis never reads.
    import pandas as pd

    import glmeeg
    from glmeeg.demo import write_demo_study

    design = write_demo_study(tmp_path / "demo", n_subjects=6, seed=3)
    plan = glmeeg.plan_analysis(design)
    truth = pd.read_csv(tmp_path / "demo" / "planted_artefacts.csv", dtype={"subject": str})
    found = planted = hits = 0
    for s in plan.study.subject_ids:
        X = plan.subject_matrices[s]
        epochs = plan.study.subject_trials(s)["epoch"].to_numpy()[X.kept]
        flagged = set(epochs[outlying_trials(X.matrix, plan.study.read_epochs(s, epochs), n_channels=32)])
        true = set(truth.loc[truth["subject"] == s, "epoch"])
        found, planted, hits = found + len(flagged), planted + len(true), hits + len(flagged & true)
    # Weak artefacts (50 µV on one channel) can hide in the noise: most, not all, are found;
    # almost nothing else is flagged.
    assert hits / planted >= 0.75
    assert hits / max(found, 1) >= 0.9


def test_results_carry_the_residual_checks_of_every_single_contrast_test(tmp_path):
    import statsmodels.api as sm

    import glmeeg

    tests = '''
[[test]]
name = "group-diff"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
correction = "holm"
'''
    design = write_study(tmp_path / "s", n_subjects=12, seed=14, tests=tests)
    plan = glmeeg.plan_analysis(design)
    t = glmeeg.run_analysis(plan).test("group-diff")
    Y = glmeeg.fit_subjects(plan).estimates[:, 0, :]
    G = plan.tests[0].group_matrix.matrix
    for j in (0, 7, 20):
        # Source: residuals of statsmodels OLS on the group design; scipy's bias-corrected
        # skewness and excess kurtosis and D'Agostino-Pearson test of those residuals.
        resid = sm.OLS(Y[:, j], G).fit().resid
        # Tolerances: both fit the same 12 x 2 least-squares problem (rounding ~1e-15 relative);
        # the standardized moments and the test amplify that by far less than 1e6.
        assert abs(t.residual_skewness[j] - scipy.stats.skew(resid, bias=False)) < 1e-9
        assert abs(t.residual_kurtosis[j] - scipy.stats.kurtosis(resid, bias=False)) < 1e-9
        assert abs(t.normality_p[j] - scipy.stats.normaltest(resid).pvalue) < 1e-9
    rc = t.residual_checks
    assert rc.share_rejected == np.mean(t.normality_p < 0.05)
    assert "residual checks: normality" in str(t)
    assert t.summary()["residual_checks"]["share_rejected"] == rc.share_rejected
    assert {"residual_skewness", "residual_kurtosis", "normality_p"} <= set(t.to_frame().columns)
