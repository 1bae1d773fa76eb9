"""The public test helpers (glmeeg.testing): the study builder, the result comparisons, the
command line's error contract and the real-process runner."""

from __future__ import annotations

import hashlib
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import glmeeg
from glmeeg.cli import app
from glmeeg.testing import (DEFAULT_TESTS, HANG_TIMEOUT, SMALL_STUDY, assert_one_line_error,
                            assert_results_close, assert_results_identical, run_glmeeg,
                            write_study)


def _digests(root: Path) -> dict[str, str]:
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> glmeeg.RunResult:
    return glmeeg.run_analysis(write_study(tmp_path_factory.mktemp("testing") / "study",
                                           **SMALL_STUDY, effect=1.5))


def test_the_module_imports_neither_pytest_nor_numba_nor_matplotlib():
    code = ("import sys, glmeeg.testing\n"
            "print(','.join(m for m in ('pytest', 'numba', 'matplotlib', 'dask') if m in sys.modules))")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=HANG_TIMEOUT)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == ""


def test_the_same_arguments_write_the_same_bytes(tmp_path):
    a = write_study(tmp_path / "a", **SMALL_STUDY, effect=1.5)
    write_study(tmp_path / "b", **SMALL_STUDY, effect=1.5)
    assert a == tmp_path / "a" / "design.toml"
    assert _digests(tmp_path / "a") == _digests(tmp_path / "b")
    write_study(tmp_path / "c", **{**SMALL_STUDY, "seed": 8}, effect=1.5)
    assert _digests(tmp_path / "c")["epochs/s01.npy"] != _digests(tmp_path / "a")["epochs/s01.npy"]


def test_the_study_has_the_documented_layout_and_planted_effect(tmp_path):
    design = write_study(tmp_path / "s", n_subjects=4, n_trials=9, n_channels=10, n_times=6,
                         n_freqs=2, effect=1000.0, dtype=np.float64, with_epoch_column=False)
    text = design.read_text()
    assert DEFAULT_TESTS in text and "frequencies = [4.0, 6.0]" in text
    trials = pd.read_csv(tmp_path / "s" / "trials.csv", dtype={"subject": str})
    assert list(trials.columns) == ["subject", "condition", "intensity", "rt"]
    assert (trials.groupby("subject")["condition"].value_counts() == 3).all()
    subjects = pd.read_csv(tmp_path / "s" / "subjects.csv", dtype={"subject": str})
    assert subjects["subject"].tolist() == ["s01", "s02", "s03", "s04"]
    assert subjects["group"].tolist() == ["x", "y", "x", "y"]
    channels = pd.read_csv(tmp_path / "s" / "channels.tsv", sep="\t")["name"].tolist()
    assert channels == ["Fz", "Cz", "Pz", "Oz", "C3", "C4", "P3", "P4", "E8", "E9"]
    y = np.load(tmp_path / "s" / "epochs" / "s01.npy")
    assert y.shape == (9, 10, 2, 6) and y.dtype == np.float64
    b = (trials[trials["subject"] == "s01"]["condition"] == "b").to_numpy()
    # Planted: condition b, channel 1 (Cz), samples 2-4, at every frequency; noise elsewhere.
    assert (y[b][:, 1, :, 2:5] > 500).all()
    assert (np.abs(np.delete(y[b], 1, axis=1)) < 100).all() and (np.abs(y[~b]) < 100).all()


def test_results_close_to_themselves_and_a_change_is_named(run):
    assert_results_close(run, run)
    assert_results_close(run.tests[0], run.tests[0], rtol=0)
    assert_results_close(list(run.tests), list(run.tests))
    t = run.tests[0]
    nudged = t.model_copy(update={"statistic": t.statistic * (1 + 1e-9)})
    assert_results_close(nudged, t, rtol=1e-8)
    with pytest.raises(AssertionError, match=r"test 'b-vs-a', field 'statistic'"):
        assert_results_close(nudged, t, rtol=1e-10)
    flipped = t.model_copy(update={"significant": ~t.significant})
    with pytest.raises(AssertionError, match=r"field 'significant'"):
        assert_results_close(flipped, t, rtol=1.0)  # booleans compare exactly, whatever rtol
    shorter = t.model_copy(update={"p": t.p[:-1]})
    with pytest.raises(AssertionError, match=r"field 'p': shape"):
        assert_results_close(shorter, t)
    renamed = t.model_copy(update={"name": "other"})
    with pytest.raises(AssertionError, match="tests differ"):
        assert_results_close(renamed, t)


def test_results_identical_only_bit_for_bit(run):
    t = run.tests[0]
    assert_results_identical(run, run)
    signed = t.estimate.copy()
    signed[signed == 0] = -0.0
    signed.flat[0] = np.nextafter(signed.flat[0], np.inf)  # one unit in the last place
    changed = t.model_copy(update={"estimate": signed})
    assert_results_close(changed, t, rtol=1e-12)
    with pytest.raises(AssertionError, match=r"test 'b-vs-a', field 'estimate': not bitwise equal"):
        assert_results_identical(changed, t)
    as32 = t.model_copy(update={"p": t.p.astype(np.float32)})
    with pytest.raises(AssertionError, match=r"field 'p': float32"):
        assert_results_identical(as32, t)


def test_one_line_error_contract(tmp_path):
    design = write_study(tmp_path / "study", **SMALL_STUDY)
    design.write_text(design.read_text().replace("sampling_rate", "sample_rate"))
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    line = assert_one_line_error(result, ["design.toml", "sampling_rate"])
    assert line.startswith("error: ") and "\n" not in line
    with pytest.raises(AssertionError, match="'not in the message' not in "):
        assert_one_line_error(result, ["not in the message"])
    ok = CliRunner().invoke(app, ["--version"])
    with pytest.raises(AssertionError, match="exit code 0, expected 2"):
        assert_one_line_error(ok)


def test_run_glmeeg_is_a_real_process():
    proc = run_glmeeg("--version")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == f"glmeeg {glmeeg.__version__}"
