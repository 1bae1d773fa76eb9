"""An interrupted run resumes from the subject fits cached in its output folder.

A real ``glmeeg run`` process is killed with SIGKILL (no clean-up of any kind) right after its
fourth subject fit was stored. The re-run must take those four fits from the cache untouched,
fit only the other subjects, and end with results bitwise equal to an uninterrupted run.
"""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from glmeeg.subject_level.cache import CACHE_FOLDER, FitCache
from glmeeg.cli import app
from glmeeg.results import load_test_results

from glmeeg.testing import HANG_TIMEOUT, run_glmeeg, write_study

TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "max-statistic"
permutations = 200
seed = 7

[[test]]
name = "intensity"
subject_contrast = "intensity"
correction = "fdr"
"""

# Runs the CLI in a child process that kills itself (SIGKILL) once four subjects are fitted:
# the progress display is the CLI's own, wrapped.
KILL_AFTER_FOUR = """\
import os, signal, sys
import glmeeg.cli, glmeeg.cli.commands as cli
original = cli._progress
def progress(quiet, verbose=False):
    bars = original(quiet, verbose)
    def show(task, done, total):
        if task == "fitting subjects" and done >= 4:
            os.kill(os.getpid(), signal.SIGKILL)
    return show
cli._progress = progress
sys.argv = ["glmeeg", "run", sys.argv[1], "--out", sys.argv[2], "-q"]
glmeeg.cli.main()
"""


def _arrays(folder: Path) -> dict:
    out = {}
    for t in load_test_results(folder):
        for name in ("estimate", "statistic", "p", "p_corrected", "null_distribution", "subject_estimates"):
            a = getattr(t, name)
            if a is not None:
                out[(t.name, name)] = a.tobytes()
    return out


def _write(root: Path) -> Path:
    return write_study(root, n_subjects=10, n_trials=30, n_channels=4, n_times=8, seed=21,
                       effect=1.0, tests=TESTS)


@pytest.fixture
def design(tmp_path) -> Path:
    """A study of the test's own (for tests that change it)."""
    return _write(tmp_path / "study")


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """The same study, which the tests below only read, and one uninterrupted run of it (``-q``,
    with its report) that they copy before changing anything."""
    root = tmp_path_factory.mktemp("resume")
    design = _write(root / "study")
    out = root / "out"
    assert CliRunner().invoke(app, ["run", str(design), "--out", str(out), "-q"]).exit_code == 0
    return design, out


@pytest.mark.slow
def test_killed_run_resumes_without_refitting(shared, tmp_path):
    design, straight = shared
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-c", KILL_AFTER_FOUR, str(design), str(out)],
                          capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert proc.returncode == -signal.SIGKILL, (proc.returncode, proc.stderr)
    # Killed: no results, only the four finished fits (whole files, no temporary left over).
    assert sorted(p.name for p in out.iterdir()) == [CACHE_FOLDER]
    cached = sorted((out / CACHE_FOLDER).iterdir())
    assert len(cached) == 4 and all(p.suffix == ".npz" for p in cached)
    before = {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in cached}
    # Betas of 4 design columns (intercept, b, c, intensity) x 4 channels x 8 times.
    subjects = {FitCache(out / CACHE_FOLDER).load(p.stem, subject=s, shape=(4, 32)) is not None and s
                for p in cached for s in [f"s{i:02d}" for i in range(1, 11)]} - {False}
    assert len(subjects) == 4

    rerun = run_glmeeg("run", design, "--out", out, "--verbose", "--no-report")
    assert rerun.returncode == 0, rerun.stderr
    taken = {line.split()[2].rstrip(":") for line in rerun.stderr.splitlines()
             if line.endswith("fit taken from the cache")}
    fitted = {line.split()[2] for line in rerun.stderr.splitlines() if " fitted: " in line}
    assert taken == subjects
    assert fitted == {f"s{i:02d}" for i in range(1, 11)} - subjects
    # The finished fits were not rewritten: same files, same modification times.
    after = {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in (out / CACHE_FOLDER).iterdir()}
    assert all(after[name] == stamp for name, stamp in before.items())
    assert len(after) == 10

    assert _arrays(out) == _arrays(straight)  # the uninterrupted run
    assert json.loads((out / "run.json").read_text())["subjects"] == \
        json.loads((straight / "run.json").read_text())["subjects"]


@pytest.mark.slow
def test_rerun_takes_every_fit_from_the_cache_and_refit_ignores_it(shared, tmp_path):
    design, first_run = shared
    out = tmp_path / "out"
    shutil.copytree(first_run, out)  # a finished run's folder
    first = _arrays(out)
    second = run_glmeeg("run", design, "--out", out, "-v")
    assert second.returncode == 0, second.stderr
    assert second.stderr.count("fit taken from the cache") == 10 and " fitted: " not in second.stderr
    assert _arrays(out) == first
    third = run_glmeeg("run", design, "--out", out, "-v", "--refit")
    assert third.returncode == 0, third.stderr
    assert "fit taken from the cache" not in third.stderr and third.stderr.count(" fitted: ") == 10
    assert _arrays(out) == first


@pytest.mark.slow
def test_changed_data_or_model_is_refitted(design, tmp_path):
    """The key covers the data file's bytes and the model: a change refits that subject only,
    and entries no longer used are removed."""
    out = tmp_path / "out"
    assert CliRunner().invoke(app, ["run", str(design), "--out", str(out), "-q"]).exit_code == 0
    old = set(FitCache(out / CACHE_FOLDER).keys())
    path = design.parent / "epochs" / "s03.npy"
    y = np.load(path)
    y[0, 0, 0] += 1.0
    np.save(path, y)
    rerun = run_glmeeg("run", design, "--out", out, "-v")
    assert rerun.returncode == 0, rerun.stderr
    assert [line.split()[2] for line in rerun.stderr.splitlines() if " fitted: " in line] == ["s03"]
    new = set(FitCache(out / CACHE_FOLDER).keys())
    assert len(new) == 10 and len(new - old) == 1 and len(old - new) == 1
    design.write_text(design.read_text().replace('formula = "condition + intensity"', 'formula = "condition"')
                      .replace('subject_contrast = "intensity"', 'subject_contrast = "condition[T.c]"'))
    rerun = run_glmeeg("run", design, "--out", out, "-v")
    assert rerun.returncode == 0, rerun.stderr
    assert rerun.stderr.count(" fitted: ") == 10
    assert not (set(FitCache(out / CACHE_FOLDER).keys()) & new)


@pytest.mark.slow
def test_damaged_cache_entry_is_refitted(shared, tmp_path):
    design, first_run = shared
    out = tmp_path / "out"
    shutil.copytree(first_run, out)  # a finished run's folder
    first = _arrays(out)
    victim = sorted((out / CACHE_FOLDER).iterdir())[0]
    victim.write_bytes(victim.read_bytes()[:100])  # a truncated file
    rerun = run_glmeeg("run", design, "--out", out, "-v")
    assert rerun.returncode == 0, rerun.stderr
    assert "unreadable" in rerun.stderr and rerun.stderr.count(" fitted: ") == 1
    assert _arrays(out) == first


def test_memory_limit_too_small_for_a_subject(design, tmp_path):
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out), "--memory-limit", "1kB"])
    assert result.exit_code == 2
    line = result.stderr.strip()
    assert "\n" not in line and line.startswith("error: subject s01: its fit needs about"), line
    assert "raise --memory-limit" in line
    assert not out.exists()


@pytest.mark.parametrize("value", ["12", "lots", "-1GB", "0MB", "9" * 400 + "GB"])
def test_memory_limit_must_be_a_size(design, tmp_path, value):
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "o"), "--memory-limit", value])
    assert result.exit_code == 2
    assert result.stderr.startswith("error: --memory-limit: ") and result.stderr.count("\n") == 1
    assert not (tmp_path / "o").exists()
