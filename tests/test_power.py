"""Power and sample-size planning (glmeeg.planning.analytic and `glmeeg power`) against outside values.

Outside sources: statsmodels.stats.power (TTestIndPower, TTestPower, FTestAnovaPower), which
computes power from the same exact noncentral distributions with its own code; Cohen (1992),
"A power primer", Table 2 (values from memory; Cohen's tables come from approximations, hence
agreement within one participant); the 16-32 participant range of EEG group studies (common
practice).
"""

from __future__ import annotations

import json
import math

import pandas as pd
import pytest
from pydantic import ValidationError
from statsmodels.stats.power import FTestAnovaPower, TTestIndPower, TTestPower
from typer.testing import CliRunner

from glmeeg.cli import app
from glmeeg.errors import GlmeegError
from glmeeg.planning.analytic import PowerSolution, power_curve, solve_power

# statsmodels spells the one-sided alternatives differently; for "less" it expects the effect
# with its sign (negative), glmeeg the size in the direction of the test.
SM_ALTERNATIVE = {"two-sided": ("two-sided", 1.0), "greater": ("larger", 1.0), "less": ("smaller", -1.0)}


def invoke(*args: str):
    return CliRunner().invoke(app, ["power", *[str(a) for a in args]])


# --------------------------------------------------------------------------- solving n


@pytest.mark.parametrize(("d", "n_table", "n_exact"), [(0.2, 394, 393.4), (0.5, 64, 63.8), (0.8, 26, 25.5)])
def test_two_sample_n_agrees_with_statsmodels(d, n_table, n_exact):
    s = solve_power(design="two-sample", effect_size=d, alpha=0.05, power=0.8)
    # statsmodels TTestIndPower.solve_power (exact noncentral t): n per group.
    reference = TTestIndPower().solve_power(effect_size=d, alpha=0.05, power=0.8, alternative="two-sided")
    # 1e-6: statsmodels stops its root search near 1e-8 relative; both solve the same equation.
    assert s.n_exact == pytest.approx(reference, rel=1e-6)
    # Rounded-up values of statsmodels' solution (393.41 / 63.77 / 25.52), read from its output.
    assert s.n == n_table == math.ceil(reference)
    assert s.n_exact == pytest.approx(n_exact, abs=0.05)  # one decimal, as quoted above
    assert s.total_n == 2 * n_table
    assert s.solved == "n" and s.df == 2 * n_table - 2


@pytest.mark.parametrize("design", ["one-sample", "paired"])
@pytest.mark.parametrize(("d", "n_table"), [(0.2, 199), (0.5, 34), (0.8, 15)])
def test_one_sample_and_paired_n_agree_with_statsmodels(design, d, n_table):
    s = solve_power(design=design, effect_size=d, alpha=0.05, power=0.8)
    # statsmodels TTestPower.solve_power: one-sample (paired = one-sample on differences).
    reference = TTestPower().solve_power(effect_size=d, alpha=0.05, power=0.8, alternative="two-sided")
    assert s.n_exact == pytest.approx(reference, rel=1e-6)  # solver tolerance, as above
    assert s.n == n_table == math.ceil(reference)
    assert s.total_n == n_table and s.df == n_table - 1


@pytest.mark.parametrize("alternative", ["greater", "less"])
@pytest.mark.parametrize("design", ["one-sample", "two-sample"])
def test_one_sided_n_agrees_with_statsmodels(design, alternative):
    s = solve_power(design=design, effect_size=0.4, alpha=0.05, power=0.9, alternative=alternative)
    sm_alt, sign = SM_ALTERNATIVE[alternative]
    engine = TTestIndPower() if design == "two-sample" else TTestPower()
    # statsmodels solve_power, one-sided.
    reference = engine.solve_power(effect_size=sign * 0.4, alpha=0.05, power=0.9, alternative=sm_alt)
    assert s.n_exact == pytest.approx(reference, rel=1e-6)  # solver tolerance, as above


def test_n_is_the_smallest_whole_n_reaching_the_power():
    s = solve_power(design="two-sample", effect_size=0.5, alpha=0.05, power=0.8)
    # statsmodels TTestIndPower.power at the whole n and the one below it.
    at_n = TTestIndPower().power(effect_size=0.5, nobs1=s.n, alpha=0.05)
    below = TTestIndPower().power(effect_size=0.5, nobs1=s.n - 1, alpha=0.05)
    assert below < 0.8 <= at_n
    assert s.achieved_power == pytest.approx(at_n, rel=1e-10)  # same distribution functions


# --------------------------------------------------------------------------- power, effect size, alpha


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize(("d", "n"), [(0.0, 20), (0.2, 16), (0.5, 24), (0.8, 32), (1.5, 6), (4.0, 3)])
def test_t_power_agrees_with_statsmodels(d, n, alternative):
    sm_alt, sign = SM_ALTERNATIVE[alternative]
    two = solve_power(design="two-sample", effect_size=d, n=n, alpha=0.05, alternative=alternative)
    one = solve_power(design="paired", effect_size=d, n=n, alpha=0.05, alternative=alternative)
    # statsmodels TTestIndPower.power / TTestPower.power: exact noncentral t, both tails.
    ref_two = TTestIndPower().power(effect_size=sign * d, nobs1=n, alpha=0.05, alternative=sm_alt)
    ref_one = TTestPower().power(effect_size=sign * d, nobs=n, alpha=0.05, alternative=sm_alt)
    # 1e-9: the same scipy distributions evaluated in a different but equivalent form.
    assert two.power == pytest.approx(ref_two, rel=1e-9)
    assert one.power == pytest.approx(ref_one, rel=1e-9)
    assert two.solved == one.solved == "power"
    assert two.n == two.n_exact == n


@pytest.mark.parametrize(("design", "engine", "n_key"), [("two-sample", TTestIndPower, "nobs1"),
                                                         ("one-sample", TTestPower, "nobs")])
@pytest.mark.parametrize(("n", "power"), [(16, 0.8), (28, 0.9), (100, 0.5)])
def test_effect_size_agrees_with_statsmodels(design, engine, n_key, n, power):
    s = solve_power(design=design, n=n, alpha=0.05, power=power)
    # statsmodels solve_power for the effect size.
    reference = engine().solve_power(effect_size=None, alpha=0.05, power=power, **{n_key: n})
    # 1e-5: statsmodels' root search stops early for the effect size (1.6e-6 relative seen at
    # n = 100, power 0.5); the check below holds glmeeg's root to machine precision instead.
    assert s.effect_size == pytest.approx(reference, rel=1e-5)
    # statsmodels' power function at glmeeg's solution gives back the target.
    at_solution = engine().power(effect_size=s.effect_size, alpha=0.05, **{n_key: n})
    assert at_solution == pytest.approx(power, abs=1e-10)  # root found to machine precision
    assert s.solved == "effect_size"


@pytest.mark.parametrize(("d", "n", "power"), [(0.5, 20, 0.8), (0.8, 26, 0.9), (0.3, 50, 0.3)])
def test_alpha_agrees_with_statsmodels(d, n, power):
    s = solve_power(design="two-sample", effect_size=d, n=n, power=power)
    # statsmodels TTestIndPower.power at glmeeg's alpha gives back the target power.
    at_solution = TTestIndPower().power(effect_size=d, nobs1=n, alpha=s.alpha)
    assert at_solution == pytest.approx(power, abs=1e-10)  # root found to machine precision
    # statsmodels' own alpha: its root search stops earlier (2e-6 relative seen at d = 0.5).
    reference = TTestIndPower().solve_power(effect_size=d, nobs1=n, alpha=None, power=power)
    assert s.alpha == pytest.approx(reference, rel=1e-5)
    assert s.solved == "alpha"


# --------------------------------------------------------------------------- F test


@pytest.mark.parametrize("k", [2, 3, 4, 5])
@pytest.mark.parametrize("f", [0.10, 0.25, 0.40])
def test_anova_n_agrees_with_statsmodels(k, f):
    s = solve_power(design="f", effect_size=f, alpha=0.05, power=0.8, df_numerator=k - 1, groups=k)
    # statsmodels FTestAnovaPower.solve_power: total N, lambda = f^2 N, df = (k - 1, N - k).
    reference = FTestAnovaPower().solve_power(effect_size=f, alpha=0.05, power=0.8, k_groups=k)
    assert s.n_exact == pytest.approx(reference, rel=1e-6)  # statsmodels' solver tolerance
    assert s.n == math.ceil(reference) == s.total_n
    assert (s.df_numerator, s.df) == (k - 1, s.n - k)


@pytest.mark.parametrize(("k", "n", "f"), [(2, 40, 0.25), (3, 60, 0.25), (4, 30, 0.5), (6, 120, 0.1), (3, 21, 0.0)])
def test_anova_power_agrees_with_statsmodels(k, n, f):
    s = solve_power(design="f", effect_size=f, n=n, alpha=0.05, df_numerator=k - 1)
    # statsmodels FTestAnovaPower.power (noncentral F, total N); groups defaults to k.
    reference = FTestAnovaPower().power(effect_size=f, nobs=n, alpha=0.05, k_groups=k)
    assert s.power == pytest.approx(reference, rel=1e-10)  # same scipy distributions
    assert s.groups == k and s.statistic == "F"


def test_anova_effect_size_agrees_with_statsmodels():
    s = solve_power(design="f", n=60, alpha=0.05, power=0.8, df_numerator=2)
    # statsmodels FTestAnovaPower.solve_power for the effect size f.
    reference = FTestAnovaPower().solve_power(effect_size=None, nobs=60, alpha=0.05, power=0.8, k_groups=3)
    assert s.effect_size == pytest.approx(reference, rel=1e-6)  # statsmodels' solver tolerance


def test_f_with_one_numerator_df_is_the_squared_two_sided_t():
    # F(1, v) = t(v)^2 and f = d / 2 for two equal groups (Cohen 1988, ch. 8; from memory), so
    # the two-group ANOVA needs twice the per-group n of the two-sample t test.
    t = solve_power(design="two-sample", effect_size=0.5, alpha=0.05, power=0.8)
    f = solve_power(design="f", effect_size=0.25, alpha=0.05, power=0.8, df_numerator=1)
    assert f.n_exact == pytest.approx(2 * t.n_exact, rel=1e-9)  # root-finding tolerance


def test_regression_denominator_df_uses_groups():
    # A test of 2 predictors in a model with 5 parameters: df = (2, N - 5) (Cohen 1988, ch. 9;
    # from memory); statsmodels' F power with those df is the reference.
    from statsmodels.stats.power import ftest_power

    s = solve_power(design="f", effect_size=0.3, n=50, alpha=0.05, df_numerator=2, groups=5)
    # statsmodels ftest_power(effect_size, df2, df1, alpha, ncc): lambda = f^2 (df2 + df1 + ncc),
    # so ncc = 3 makes lambda = f^2 N with N = 50.
    reference = ftest_power(0.3, 45, 2, 0.05, ncc=3)
    assert s.df == 45 and s.noncentrality == pytest.approx(0.3 ** 2 * 50, rel=1e-12)
    assert s.power == pytest.approx(reference, rel=1e-10)  # same scipy distributions


# --------------------------------------------------------------------------- Cohen (1992)


@pytest.mark.parametrize(("d", "table"), [(0.2, 393), (0.5, 64), (0.8, 26)])
def test_two_sample_n_within_one_of_cohen_1992(d, table):
    # Cohen (1992), Table 2, "mean dif", alpha .05 two-sided, power .80 (from memory); Cohen's
    # values come from a normal approximation, so one participant of difference is expected.
    s = solve_power(design="two-sample", effect_size=d, alpha=0.05, power=0.8)
    assert abs(s.n - table) <= 1


@pytest.mark.parametrize(("k", "f", "table"), [(3, 0.10, 322), (3, 0.25, 52), (3, 0.40, 21),
                                              (4, 0.10, 274), (4, 0.25, 45), (4, 0.40, 18),
                                              (5, 0.10, 240), (5, 0.25, 39), (5, 0.40, 16)])
def test_anova_n_per_group_within_one_of_cohen_1992(k, f, table):
    # Cohen (1992), Table 2, "ANOVA", k groups, alpha .05, power .80, n per group (from memory).
    s = solve_power(design="f", effect_size=f, alpha=0.05, power=0.8, df_numerator=k - 1, groups=k)
    assert abs(math.ceil(s.n_exact / k) - table) <= 1


# --------------------------------------------------------------------------- warnings


def test_small_samples_get_the_eeg_range_warning():
    # 16-32 participants: the range common in EEG group studies (common practice).
    small = solve_power(design="paired", effect_size=0.8, alpha=0.05, power=0.8)  # n = 15
    assert small.n == 15 and any("below 16" in w for w in small.warnings)
    assert solve_power(design="paired", effect_size=0.5, n=16, alpha=0.05).warnings == ()
    per_group = solve_power(design="two-sample", effect_size=0.5, n=12, alpha=0.05)
    assert any("12 per group is below 16" in w for w in per_group.warnings)


def test_target_met_at_the_smallest_n_is_reported():
    s = solve_power(design="two-sample", effect_size=60.0, alpha=0.05, power=0.8)
    assert s.n == 2 and any("smallest n" in w for w in s.warnings)


# --------------------------------------------------------------------------- bad settings


@pytest.mark.parametrize(("kwargs", "fragment"), [
    (dict(effect_size=0.5, power=0.8), "more than one unknown"),
    (dict(effect_size=0.5, alpha=0.05, power=0.8, n=20), "all four were given"),
    (dict(effect_size=0.5, alpha=0.05, power=1.2), "power: expected a number strictly between 0 and 1"),
    (dict(effect_size=0.5, alpha=0.05, power=1.0), "power: expected"),
    (dict(effect_size=0.5, alpha=0.0, power=0.8), "alpha: expected"),
    (dict(effect_size=0.5, alpha=1.5, power=0.8), "alpha: expected"),
    (dict(effect_size=-0.5, alpha=0.05, power=0.8), "effect_size: expected a size >= 0"),
    (dict(effect_size=0.0, alpha=0.05, power=0.8), "effect_size: expected a size > 0 to solve n"),
    (dict(effect_size=0.5, alpha=0.05, power=0.04), "power: expected more than alpha"),
    (dict(effect_size=1e-4, alpha=0.05, power=0.99), "not reached by any n up to 10,000,000"),
    (dict(effect_size=0.5, alpha=0.05, n=1), "n: expected at least 2 per group"),
    (dict(effect_size=0.5, alpha=0.05, n=2.5), "n: expected a whole number"),
    (dict(effect_size=0.5, alpha=0.05, power=0.8, alternative="bigger"), "alternative: expected one of"),
    (dict(effect_size=0.5, alpha=0.05, power=0.8, groups=3), "groups: applies to design 'f' only"),
])
def test_bad_settings_raise_one_line(kwargs, fragment):
    with pytest.raises(GlmeegError, match=fragment) as err:
        solve_power(design="two-sample", **kwargs)
    assert "\n" not in str(err.value)


@pytest.mark.parametrize(("kwargs", "fragment"), [
    (dict(design="anova"), "design: expected one of"),
    (dict(design="f"), "df_numerator: required"),
    (dict(design="f", df_numerator=2, groups=2), "groups: expected a whole number >= df_numerator"),
    (dict(design="f", df_numerator=2, alternative="greater"), "alternative: an F test has no direction"),
    (dict(design="f", df_numerator=0), "df_numerator: expected a whole number >= 1"),
])
def test_bad_designs_raise_one_line(kwargs, fragment):
    with pytest.raises(GlmeegError, match=fragment):
        solve_power(effect_size=0.25, alpha=0.05, power=0.8, **kwargs)


def test_solution_is_frozen():
    s = solve_power(design="paired", effect_size=0.5, alpha=0.05, power=0.8)
    assert isinstance(s, PowerSolution)
    with pytest.raises(ValidationError):
        s.n = 3
    text = str(s)
    assert "<- solved" in text and "Assumes" in text


# --------------------------------------------------------------------------- power curve


def test_power_curve_agrees_with_statsmodels():
    table = power_curve(design="two-sample", effect_size=0.5, alpha=0.05, n_values=[32, 16, 64, 24.5])
    assert list(table.columns) == ["n", "power"] and list(table["n"]) == [32, 16, 64, 24.5]
    # statsmodels TTestIndPower.power at each n (non-integer n included).
    reference = [TTestIndPower().power(effect_size=0.5, nobs1=n, alpha=0.05) for n in table["n"]]
    assert table["power"].to_numpy() == pytest.approx(reference, rel=1e-10)  # same distributions
    f = power_curve(design="f", effect_size=0.25, n_values=[30, 60], df_numerator=2)
    # statsmodels FTestAnovaPower.power, three groups.
    assert f["power"].to_numpy() == pytest.approx(
        [FTestAnovaPower().power(effect_size=0.25, nobs=n, alpha=0.05, k_groups=3) for n in (30, 60)], rel=1e-10)


def test_power_curve_bad_settings():
    with pytest.raises(GlmeegError, match="n_values: expected at least one"):
        power_curve(design="paired", effect_size=0.5, n_values=[])
    with pytest.raises(GlmeegError, match="n_values: expected at least 2"):
        power_curve(design="paired", effect_size=0.5, n_values=[16, 1])
    with pytest.raises(GlmeegError, match="effect_size"):
        power_curve(design="paired", effect_size=-1.0, n_values=[16])
    assert isinstance(power_curve(design="paired", effect_size=0.5, n_values=[16]), pd.DataFrame)


# --------------------------------------------------------------------------- command line


def test_cli_json_gives_one_object_with_every_quantity():
    result = invoke("--design", "two-sample", "--effect-size", "0.5", "--power", "0.8", "--json")
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout)  # the whole output is one JSON object
    # statsmodels TTestIndPower: 63.77 per group, rounded up to 64.
    assert record["n"] == 64 and record["n_exact"] == pytest.approx(63.77, abs=0.005)  # 2 decimals
    assert record["solved"] == "n" and record["design"] == "two-sample"
    assert record["alternative"] == "two-sided" and record["warnings"] == []
    assert record["alpha"] == 0.05 and record["power"] == 0.8 and record["effect_size"] == 0.5
    for key in ("total_n", "achieved_power", "df", "noncentrality", "critical_value"):
        assert key in record


def test_cli_plain_marks_the_solved_quantity_and_assumptions():
    result = invoke("--design", "paired", "--effect-size", "0.5", "--n", "12", "--curve", "12,24,36")
    assert result.exit_code == 0, result.output
    solved = [line for line in result.stdout.splitlines() if "<- solved" in line]
    assert len(solved) == 1 and solved[0].strip().startswith("power")
    # 16-32 participants: the range common in EEG group studies (common practice).
    assert "warning: n = 12 is below 16" in result.stdout
    assert "Assumes" in result.stdout and "36" in result.stdout.splitlines()[-1]


def test_cli_solves_alpha_and_the_effect_size():
    alpha = json.loads(invoke("--design", "two-sample", "--effect-size", "0.5", "--n", "20",
                              "--power", "0.8", "--solve", "alpha", "--json").stdout)
    # statsmodels TTestIndPower.power at the solved alpha gives back the target.
    assert TTestIndPower().power(effect_size=0.5, nobs1=20, alpha=alpha["alpha"]) == pytest.approx(0.8, abs=1e-10)
    es = json.loads(invoke("--design", "f", "--n", "60", "--power", "0.8", "--df-numerator", "2",
                           "--json").stdout)
    # statsmodels FTestAnovaPower.solve_power for f, three groups.
    reference = FTestAnovaPower().solve_power(effect_size=None, nobs=60, alpha=0.05, power=0.8, k_groups=3)
    assert es["solved"] == "effect_size" and es["effect_size"] == pytest.approx(reference, rel=1e-6)


@pytest.mark.parametrize(("args", "fragment"), [
    (["--design", "two-sample", "--effect-size", "0.5"], "more than one unknown"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "1.2"], "--power: expected"),
    (["--design", "two-sample", "--effect-size", "-0.5", "--power", "0.8"], "--effect-size: expected"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "0.8", "--alpha", "1.5"], "--alpha: expected"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "0.8", "--n", "20"], "nothing to solve"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "0.04"], "--power: expected more than alpha"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "0.8", "--solve", "n", "--n", "3"], "--solve n"),
    (["--design", "two-sample", "--effect-size", "0.5", "--n", "20", "--power", "0.8", "--solve", "alpha",
      "--alpha", "0.05"], "--solve alpha"),
    (["--design", "two-sample", "--effect-size", "0.5", "--power", "0.8", "--curve", "a,b"], "--curve: expected"),
    (["--design", "anova", "--effect-size", "0.5", "--power", "0.8"], "--design: expected"),
])
def test_cli_bad_settings_exit_2_with_one_line(args, fragment):
    result = invoke(*args)
    assert result.exit_code == 2
    assert result.stderr.startswith("error: ") and result.stderr.count("\n") == 1
    assert fragment in result.stderr
    assert result.stdout == ""


def test_power_curve_plot_is_written_and_needs_a_curve(tmp_path):
    from matplotlib.image import imread
    from typer.testing import CliRunner

    from glmeeg.cli import app

    runner = CliRunner()
    png = tmp_path / "curve.png"
    args = ["power", "--design", "two-sample", "--effect-size", "0.5", "--power", "0.8"]
    result = runner.invoke(app, args + ["--curve", "16,32,64,100", "--plot", str(png)])
    assert result.exit_code == 0, result.output
    image = imread(png)
    assert image.shape[0] > 100 and image[..., :3].std() > 0.02
    result = runner.invoke(app, args + ["--plot", str(tmp_path / "other.png")])
    assert result.exit_code == 2 and "--curve" in result.stderr
    assert not (tmp_path / "other.png").exists()
    result = runner.invoke(app, args + ["--curve", "16,32", "--plot", str(tmp_path / "no" / "x.png")])
    assert result.exit_code == 2 and len(result.stderr.strip().splitlines()) == 1
