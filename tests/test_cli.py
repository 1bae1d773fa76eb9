"""The command line, in-process through typer's CliRunner (and once as a real process)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from glmeeg.testing import HANG_TIMEOUT, run_glmeeg, write_study
from glmeeg import __version__
from glmeeg.cli import app
from glmeeg.results import CLINICAL_CAUTION

TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"

[[test]]
name = "condition"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "fdr"

[[test]]
name = "intensity-by-group"
subject_contrast = "intensity"
group_formula = "group"
group_contrast = "group[T.y]"
correction = "bonferroni"
alternative = "greater"
"""
TEST_NAMES = ["b-vs-a", "condition", "intensity-by-group"]
POINT_COLUMNS = ["channel", "time", "estimate", "statistic", "p", "p_corrected", "significant",
                 "effect_size"]


def tree(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (hidden ones included) with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def invoke(*args: str):
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture
def design(tmp_path: Path) -> Path:
    return write_study(tmp_path / "study", n_subjects=8, n_trials=18, n_channels=3, n_times=6,
                       seed=11, effect=1.0, tests=TESTS)


@pytest.mark.slow  # a run with its report
def test_run_writes_one_folder_per_test(design, tmp_path):
    out = tmp_path / "out"
    result = invoke("run", design, "--out", out)
    assert result.exit_code == 0, result.output
    assert f"results written to {out}" in result.stdout
    assert "error" not in result.stderr
    run = json.loads((out / "run.json").read_text())
    assert run["tests"] == TEST_NAMES
    assert [s["subject"] for s in run["subjects"]] == [f"s{i:02d}" for i in range(1, 9)]
    assert sorted(p.name for p in out.iterdir()) == sorted(["run.json", "report.html", "subject-fits"]
                                                           + TEST_NAMES)
    for name in TEST_NAMES:
        points = pd.read_csv(out / name / "points.csv")
        assert set(POINT_COLUMNS) <= set(points.columns), points.columns
        assert "frequency" not in points.columns
        assert len(points) == 3 * 6
        assert points["channel"].tolist()[:6] == ["Fz"] * 6
        summary = json.loads((out / name / "summary.json").read_text())
        assert summary["test"] == name
        assert summary["findings"]["n_points"] == 18
        assert (out / name / "result.npz").is_file()
    assert json.loads((out / "condition" / "summary.json").read_text())["kind"] == "F"
    assert json.loads((out / "intensity-by-group" / "summary.json").read_text())["alternative"] == "greater"
    # No temporary or backup folder is left beside the result.
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "study"]


@pytest.mark.slow  # a run with its report
def test_run_quiet_prints_nothing(design, tmp_path):
    result = invoke("run", design, "--out", tmp_path / "out", "--quiet")
    assert result.exit_code == 0, result.output
    assert result.stdout == "" and result.stderr == ""
    assert (tmp_path / "out" / "run.json").is_file()


@pytest.mark.slow  # a run with its report
def test_run_into_an_empty_folder(design, tmp_path):
    out = tmp_path / "empty"
    out.mkdir()
    result = invoke("run", design, "--out", out, "-q")
    assert result.exit_code == 0, result.output
    assert (out / "run.json").is_file()


def test_check_describes_and_creates_nothing(design, tmp_path):
    before = tree(tmp_path)
    result = invoke("check", design)
    assert result.exit_code == 0, result.output
    text = result.stdout
    for i in range(1, 9):
        assert f"s{i:02d}" in text
    assert "Intercept, condition[T.b], condition[T.c], intensity" in text
    assert "factor condition: levels a, b, c (reference a)" in text
    for name in TEST_NAMES:
        assert f"test {name}:" in text
    assert "test condition: F test" in text
    assert text.rstrip().endswith("design OK")
    assert result.stderr == ""
    assert tree(tmp_path) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study"]


@pytest.mark.slow  # a run with its report
def test_show_run_folder_and_test_folder(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    whole = invoke("show", out)
    assert whole.exit_code == 0, whole.output
    for name in TEST_NAMES:
        assert f"test {name}:" in whole.stdout
    assert CLINICAL_CAUTION in whole.stdout
    one = invoke("show", out / "condition")
    assert one.exit_code == 0, one.output
    assert "test condition: F(2, " in one.stdout
    assert "test b-vs-a" not in one.stdout
    assert CLINICAL_CAUTION in one.stdout


def test_version():
    result = invoke("--version")
    assert result.exit_code == 0
    assert result.stdout.strip() == f"glmeeg {__version__}"


def test_no_arguments_shows_help():
    result = invoke()
    assert result.exit_code in (0, 2)  # click's no_args_is_help exit code differs across versions
    assert "run" in result.output and "check" in result.output and "Traceback" not in result.output


def test_module_help_in_a_real_process():
    proc = run_glmeeg("--help")
    assert proc.returncode == 0, proc.stderr
    for command in ("run", "check", "show", "demo"):
        assert command in proc.stdout


def test_help_keeps_imports_light():
    code = ("import sys\nfrom typer.testing import CliRunner\nfrom glmeeg.cli import app\n"
            "r = CliRunner().invoke(app, ['run', '--help'])\nassert r.exit_code == 0, r.output\n"
            "print(','.join(m for m in ('numba', 'dask', 'matplotlib') if m in sys.modules))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=HANG_TIMEOUT)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == ""


@pytest.mark.slow  # three runs with their reports
def test_rerun_replaces_the_earlier_result(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    (out / "b-vs-a" / "my-notes.txt").write_text("from the first run")
    text = design.read_text().replace('name = "b-vs-a"', 'name = "b-minus-a"')
    design.write_text(text)
    # A file the user added is never removed with the earlier results: the run is refused.
    refused = invoke("run", design, "--out", out, "-q")
    assert refused.exit_code == 2 and "b-vs-a/my-notes.txt" in refused.stderr, refused.output
    assert (out / "b-vs-a" / "my-notes.txt").read_text() == "from the first run"
    (out / "b-vs-a" / "my-notes.txt").unlink()
    result = invoke("run", design, "--out", out, "-q")
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in out.iterdir()) == sorted(["run.json", "report.html", "b-minus-a", "condition",
                                                            "intensity-by-group", "subject-fits"])
    assert json.loads((out / "run.json").read_text())["tests"][0] == "b-minus-a"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "study"]


def _break_design_key(root: Path, design: Path) -> None:
    design.write_text(design.read_text().replace("sampling_rate", "sample_rate"))


def _nan_in_last_subject(root: Path, design: Path) -> None:
    # Found only while fitting, after every other subject was fitted.
    arr = np.load(root / "epochs" / "s08.npy")
    arr[3, 1, 2] = np.nan
    np.save(root / "epochs" / "s08.npy", arr)


@pytest.mark.parametrize("breakage", [_break_design_key, _nan_in_last_subject],
                         ids=["design-error", "data-error-while-fitting"])
@pytest.mark.slow  # a run with its report
def test_failed_run_leaves_earlier_result_intact(design, tmp_path, breakage):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    before = tree(out)
    breakage(design.parent, design)
    result = invoke("run", design, "--out", out)
    assert result.exit_code == 2
    assert result.stderr.startswith("error: ") and result.stderr.count("\n") == 1
    assert tree(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "study"]


def test_neighbours_prints_and_exports_a_table_that_reads_back(tmp_path):
    design = write_study(tmp_path / "s", n_channels=8)
    result = invoke("neighbours", design, "--out", tmp_path / "pairs.csv")
    assert result.exit_code == 0, result.output
    # Cz and Pz are neighbours on a 10-10 cap (layout geometry); Fz and Oz are not.
    assert "Cz" in result.stdout and "neighbour table written" in result.stdout
    pairs = pd.read_csv(tmp_path / "pairs.csv")
    assert list(pairs.columns) == ["channel", "neighbour"]
    edges = set(zip(pairs["channel"], pairs["neighbour"]))
    assert ("Cz", "Pz") in edges and ("Pz", "Cz") in edges
    assert ("Fz", "Oz") not in edges
    # The exported table is a valid [data] neighbours file and gives the same graph.
    text = design.read_text().replace('sampling_rate = 100.0', 'sampling_rate = 100.0\nneighbours = "../pairs.csv"')
    design.write_text(text)
    again = invoke("neighbours", design)
    assert again.exit_code == 0, again.output
    assert again.stdout.splitlines()[1:] == result.stdout.splitlines()[1:-1]


def test_neighbours_help_names_the_methods():
    result = CliRunner().invoke(app, ["neighbours", "--help"], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    text = " ".join(result.stdout.replace("\u2502", " ").split())  # the help's box lines out
    assert "--method" in text and "pruned-triangulation | radius" in text
    assert "--max-distance" in text and "[data] neighbours" in text


def test_neighbours_methods_and_their_glmeeg_0_1_names(tmp_path):
    design = write_study(tmp_path / "s", n_channels=8)
    default = invoke("neighbours", design)
    pruned = invoke("neighbours", design, "--method", "pruned-triangulation")
    assert default.exit_code == pruned.exit_code == 0, default.output + pruned.output
    assert pruned.stdout == default.stdout and "(pruned-triangulation of " in default.stdout
    radius = invoke("neighbours", design, "--method", "radius", "--max-distance", "2")
    assert radius.exit_code == 0 and radius.stderr == "", radius.output
    assert "(radius of 2 x the median nearest-neighbour spacing of " in radius.stdout
    # The old names give the same graph, with one note line on this command's stderr (also after
    # a command that logged to its own stderr in this process).
    assert invoke("run", design, "--out", tmp_path / "out", "--no-report").exit_code == 0
    for old, new, extra in [("triangulation", pruned, []),
                            ("distance", radius, ["--max-distance", "2"])]:
        result = invoke("neighbours", design, "--method", old, *extra)
        assert result.exit_code == 0, result.output
        assert result.stdout == new.stdout
        assert result.stderr.startswith(f"note: neighbour method '{old}' is now called ")
        assert result.stderr.count("\n") == 1
    bad = invoke("neighbours", design, "--method", "nearest")
    assert bad.exit_code == 2 and bad.stderr.startswith("error: neighbour method must be one of "
                                                        "pruned-triangulation, radius")
    # With a neighbour table in the design file there is nothing to choose.
    assert invoke("neighbours", design, "--out", tmp_path / "pairs.csv").exit_code == 0
    text = design.read_text()
    design.write_text(text.replace('sampling_rate = 100.0',
                                   'sampling_rate = 100.0\nneighbours = "../pairs.csv"'))
    refused = invoke("neighbours", design, "--method", "radius")
    assert refused.exit_code == 2
    assert "--method: applies to neighbours found from positions" in refused.stderr
