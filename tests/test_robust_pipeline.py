"""Robust subject models and trial weights through the design file and the pipeline."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.cli import app
from glmeeg.subject_level.robust import fit_robust


def _with(design, extra: str):
    text = design.read_text().replace('formula = "condition + intensity"',
                                      'formula = "condition + intensity"\n' + extra)
    design.write_text(text)
    return design


def _subject_data(design, subject):
    root = design.parent
    trials = pd.read_csv(root / "trials.csv")
    rows = trials[trials["subject"] == subject]
    y = np.load(root / "epochs" / f"{subject}.npy")[rows["epoch"].to_numpy()]
    return rows, y.reshape(len(rows), -1).astype(np.float64)


@pytest.mark.parametrize("extra, options", [
    ("", {}),
    ('robust_convergence = "relative-residuals"\nrobust_tolerance = 1e-4\nrobust_scale_constant = 0.6745',
     dict(convergence="relative-residuals", tolerance=1e-4, scale_constant=0.6745)),
])
def test_robust_subject_model_matches_fit_robust_on_each_subject(tmp_path, extra, options):
    design = _with(write_study(tmp_path / "s", seed=8, n_subjects=6, effect=1.0),
                   'robust = "bisquare"\n' + extra)
    run = glmeeg.run_analysis(design)
    plan = glmeeg.plan_analysis(design)
    est = glmeeg.fit_subjects(plan)
    c = plan.tests[0].subject_contrast.matrix
    for i, s in enumerate(plan.study.subject_ids):
        _, y = _subject_data(design, s)
        direct = fit_robust(plan.subject_matrices[s].matrix, y, norm="bisquare", **options)
        # The pipeline must hand the same rows and design to the robust fit (same arithmetic).
        np.testing.assert_allclose(est.estimates[i], c @ direct.betas, rtol=1e-12, atol=1e-12)
    assert all(s.robust_iterations_max is not None for s in run.subjects)


def test_trial_weights_with_least_squares_equal_statsmodels_wls(tmp_path):
    design = _with(write_study(tmp_path / "s", seed=9, n_subjects=5), 'trial_weights = "rt"')
    plan = glmeeg.plan_analysis(design)
    est = glmeeg.fit_subjects(plan)
    c = plan.tests[0].subject_contrast.matrix[0]
    s = plan.study.subject_ids[2]
    rows, y = _subject_data(design, s)
    X = plan.subject_matrices[s].matrix
    for j in (0, 5, 17):
        # Weighted least squares with weights w_i (statsmodels WLS, the outside reference).
        ref = sm.WLS(y[:, j], X, weights=rows["rt"].to_numpy()).fit()
        assert est.estimates[2, 0, j] == pytest.approx(c @ ref.params, rel=1e-10, abs=1e-12)


@pytest.mark.parametrize(("extra", "fragment"), [
    ('robust = "tukey"', "subject_model.robust"),
    ('robust_tuning = 2.0', "robust_tuning applies only with robust"),
    ('robust = "huber"\nrobust_tuning = -1.0', "subject_model.robust_tuning"),
    ('trial_weights = "no_such_column"', "no_such_column"),
    ('robust = "huber"\nrobust_convergence = "coefficients"', "subject_model.robust_convergence"),
    ('robust = "huber"\nrobust_scale_constant = 1.4826', "subject_model.robust_scale_constant"),
    ('robust_convergence = "relative-residuals"', "robust_convergence applies only with robust"),
])
def test_bad_robust_settings_are_one_line_errors(tmp_path, extra, fragment):
    design = _with(write_study(tmp_path / "s", n_subjects=4), extra)
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0] and "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


def test_negative_trial_weights_are_refused(tmp_path):
    design = _with(write_study(tmp_path / "s", n_subjects=4), 'trial_weights = "intensity"')
    trials = pd.read_csv(design.parent / "trials.csv")
    trials.loc[3, "intensity"] = -1.0
    trials.to_csv(design.parent / "trials.csv", index=False)
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    assert result.exit_code == 2 and "non-negative trial weights" in result.stderr


@pytest.mark.slow  # the demo study, fitted twice
def test_robust_fit_recovers_the_demo_urgency_effect_better_than_least_squares(tmp_path):
    # The demo keeps blinks (3-12 % of kept trials, 80-200 µV at the frontal pole) and a few
    # spikes and drifts in the trials the rejection let through (glmeeg.demo). Truth: the
    # planted high-vs-low urgency map, 2 steps x 1.5 µV x the planted pattern (DEMO_TRUTH).
    from glmeeg.demo import DEMO_TRUTH, write_demo_study

    design = write_demo_study(tmp_path / "demo", n_subjects=10, seed=20261201)
    header, tests = design.read_text().split("[group_model]", 1)
    truth = 2 * DEMO_TRUTH.urgency.per_unit_uv * DEMO_TRUTH.urgency.pattern().ravel()
    rmse = {}
    for norm in (None, "huber", "bisquare"):
        if norm is not None:
            design.write_text(header + f'robust = "{norm}"\n\n[group_model]' + tests)
        plan = glmeeg.plan_analysis(design)
        est = glmeeg.fit_subjects(plan)
        mean_map = est.estimates[:, est.rows["urgency-high-vs-low"].start].mean(axis=0)
        rmse[norm] = float(np.sqrt(np.mean((mean_map - truth) ** 2)))
    # Both M-estimators land closer to the planted map than least squares (seed fixed: with
    # this seed OLS 0.59, Huber 0.53, bisquare 0.52 µV); the margin asked, 5 %, is well above
    # the ~2.5 % RMSE that M-estimation gives up on clean normal data (95 % efficiency).
    assert rmse["huber"] < 0.95 * rmse[None], rmse
    assert rmse["bisquare"] < 0.95 * rmse[None], rmse
