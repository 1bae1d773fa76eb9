"""The guarantees a lab relies on: atomic results, byte-identical reruns, no code from design files.

* A real ``glmeeg run`` process is killed with SIGKILL (no clean-up of any kind) while it writes
  its results over an earlier run's: at three moments (while the test folders are being written;
  between the two renames of the swap used where the system cannot exchange two folders in one
  step; after the swap, before the earlier results are removed). Each time the output folder
  must load as one complete run, the earlier one or the new one, never a mix, and the next run
  must clean up whatever the killed one left.
* Two runs of the same design with the same seeds write byte-identical files (with
  ``SOURCE_DATE_EPOCH`` fixing the time stamp in ``run.json`` and the report; without it, only
  that time stamp differs).
* Injection strings in the formulas and contrasts of a design file are refused before anything
  is evaluated: exit code 2, one line, and no file created anywhere in the working folder.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from glmeeg.testing import HANG_TIMEOUT, write_study
from glmeeg.cli import app
from glmeeg.results import load_run_folder, recover_results

TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
seed = {seed}

[[test]]
name = "intensity"
subject_contrast = "intensity"
correction = "tfce"
permutations = 200
seed = {seed}
"""

# Runs the CLI in a child that SIGKILLs itself at a chosen moment of write_run.
KILL_DURING_WRITE = """\
import os, signal, sys
import glmeeg.results as R, glmeeg.results.store as S
moment = sys.argv[3]
def die():
    os.kill(os.getpid(), signal.SIGKILL)
if moment == "writing":            # after the first test folder is written
    original = R.TestResult.save
    def save(self, folder):
        original(self, folder)
        die()
    R.TestResult.save = save
elif moment == "between-renames":  # the two-rename swap, killed between its renames
    S._exchange = lambda a, b: False
    original_replace = os.replace
    def replace(src, dst):
        original_replace(src, dst)
        if str(dst).endswith(".old"):
            die()
    S.os.replace = replace
elif moment == "after-swap":       # swapped in, the earlier results not yet removed
    def rmtree(path, ignore_errors=False):
        die()
    S.shutil.rmtree = rmtree
sys.argv = ["glmeeg", "run", sys.argv[1], "--out", sys.argv[2], "-q", "--no-report"]
import glmeeg.cli as cli
cli.main()
"""


def _study(root: Path, seed: int) -> Path:
    return write_study(root, n_subjects=8, n_trials=15, n_channels=4, n_times=6, seed=3,
                       effect=1.0, tests=TESTS.format(seed=seed))


def _seeds(out: Path) -> set:
    return {t.resampling.seed for t in load_run_folder(out).tests}


def _clean(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


@pytest.mark.parametrize("moment", ["writing", "between-renames", "after-swap"])
@pytest.mark.slow  # runs, one in a real process
def test_a_run_killed_while_writing_leaves_a_complete_result(tmp_path, moment):
    out = tmp_path / "out"
    runner = CliRunner()
    first = runner.invoke(app, ["run", str(_study(tmp_path / "s", seed=1)), "--out", str(out),
                                "-q", "--no-report"])
    assert first.exit_code == 0, first.output
    assert _seeds(out) == {1}
    design = _study(tmp_path / "s", seed=2)  # the same study, other seeds: another result
    proc = subprocess.run([sys.executable, "-c", KILL_DURING_WRITE, str(design), str(out), moment],
                          capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert proc.returncode == -signal.SIGKILL, (proc.returncode, proc.stderr)
    # The output folder loads as one whole run: the earlier one unless the swap was done.
    expected = {2} if moment == "after-swap" else {1}
    assert _seeds(out) == expected
    run = load_run_folder(out)
    assert [t.name for t in run.tests] == ["b-vs-a", "intensity"]
    # The next run cleans up what the killed one left beside the output folder.
    again = runner.invoke(app, ["run", str(design), "--out", str(out), "-q", "--no-report"])
    assert again.exit_code == 0, again.output
    assert _seeds(out) == {2}
    assert _clean(tmp_path) == ["out", "s"]


def test_recovery_restores_the_earlier_results_when_the_output_is_missing(tmp_path):
    """The repair alone: a dead writer's ``.NAME.PID.old`` goes back when NAME is missing."""
    out = tmp_path / "out"
    runner = CliRunner()
    assert runner.invoke(app, ["run", str(_study(tmp_path / "s", seed=1)), "--out", str(out),
                               "-q", "--no-report"]).exit_code == 0
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, timeout=HANG_TIMEOUT).stdout.strip()
    os.replace(out, tmp_path / f".out.{dead}.old")
    partial = tmp_path / f".out.{dead}.abc123_x.partial"  # a killed writer's, with its mark
    partial.mkdir()
    (partial / ".glmeeg-writing").write_text(json.dumps({"host": socket.gethostname(), "pid": int(dead)}))
    # Look-alikes of the user's own: never glmeeg's to remove or move.
    mine = tmp_path / f".out.{dead}.mine.partial"
    mine.mkdir()
    (mine / "notes.txt").write_text("mine")
    unmarked = tmp_path / f".out.{dead}.zz9_abcd.partial"
    unmarked.mkdir()
    (unmarked / "notes.txt").write_text("mine")
    assert _seeds(out) == {1}  # loading repairs
    recover_results(out)
    assert _clean(tmp_path) == sorted([mine.name, unmarked.name, "out", "s"])
    assert (mine / "notes.txt").read_text() == "mine" and (unmarked / "notes.txt").read_text() == "mine"


def test_a_folder_of_the_user_named_like_a_leftover_is_never_moved(tmp_path):
    """A read-only command repairs only glmeeg's own leftovers: a user's ``.NAME.PID.old``
    holding their files stays where it is."""
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, timeout=HANG_TIMEOUT).stdout.strip()
    theirs = tmp_path / f".lo.{dead}.old"
    theirs.mkdir()
    (theirs / "data.txt").write_text("mine")
    result = CliRunner().invoke(app, ["show", str(tmp_path / "lo")])
    assert result.exit_code == 2
    assert (theirs / "data.txt").read_text() == "mine" and not (tmp_path / "lo").exists()


def _digests(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.mark.slow  # three runs with their reports
def test_reruns_are_byte_identical(tmp_path, monkeypatch):
    design = _study(tmp_path / "s", seed=5)
    runner = CliRunner()
    outs = []
    for k, epoch in enumerate(["1700000000", "1700000000", None]):
        if epoch is None:
            monkeypatch.delenv("SOURCE_DATE_EPOCH", raising=False)
        else:
            monkeypatch.setenv("SOURCE_DATE_EPOCH", epoch)
        out = tmp_path / f"out{k}"
        r = runner.invoke(app, ["run", str(design), "--out", str(out), "-q"])
        assert r.exit_code == 0, r.output
        outs.append(_digests(out))
    assert outs[0] == outs[1]
    assert len(outs[0]) >= 9 and "report.html" in outs[0] and "b-vs-a/result.npz" in outs[0]
    # Without SOURCE_DATE_EPOCH the time stamp is the clock's: run.json and the report differ
    # from the fixed one only there.
    differ = {k for k in outs[0] if outs[0][k] != outs[2][k]}
    assert differ <= {"run.json", "report.html", "b-vs-a/result.npz", "intensity/result.npz"}
    for name in ("b-vs-a", "intensity"):  # result.npz holds the provenance too
        with np.load(tmp_path / "out0" / name / "result.npz") as f0, \
                np.load(tmp_path / "out2" / name / "result.npz") as f2:
            assert sorted(f0.files) == sorted(f2.files)
            for key in f0.files:
                if key == "meta":
                    m0, m2 = json.loads(str(f0[key])), json.loads(str(f2[key]))
                    m0["provenance"].pop("created"), m2["provenance"].pop("created")
                    assert m0 == m2
                else:
                    assert f0[key].tobytes() == f2[key].tobytes(), key
    a = json.loads((tmp_path / "out0" / "run.json").read_text())
    b = json.loads((tmp_path / "out2" / "run.json").read_text())
    assert a["provenance"]["created"] == "2023-11-14T22:13:20+00:00"  # 1.7e9 s after 1970-01-01 UTC
    a["provenance"].pop("created"), b["provenance"].pop("created")
    # The file list's digests differ exactly for the files that hold the time stamp.
    changed = {f for f in a["files"] if a["files"][f] != b["files"][f]}
    assert changed == differ - {"run.json"} and set(a["files"]) == set(b["files"])
    a.pop("files"), b.pop("files")
    assert a == b


def test_bad_source_date_epoch_is_one_line(tmp_path, monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "yesterday")
    r = CliRunner().invoke(app, ["run", str(_study(tmp_path / "s", seed=5)), "--out",
                                 str(tmp_path / "out"), "-q"])
    assert r.exit_code == 2 and "SOURCE_DATE_EPOCH" in r.output
    assert not (tmp_path / "out").exists()


FORMULA_INJECTIONS = [
    "__import__('os').system('touch hacked')",
    "condition + open('hacked', 'w').write('x')",
    "condition + intensity.__class__",
    "condition + exec('open(\\\"hacked\\\", \\\"w\\\")')",
    "condition + eval('1')",
    "condition + globals()",
    "condition + getattr(intensity, 'real')",
    "condition + [c for c in intensity]",
    "condition + (lambda: open('hacked', 'w'))()",
    "condition + Q('__builtins__')",
    "condition + I(9 ** 9 ** 9 ** 9)",
    "condition + I('a' * 999999999)",
    "condition + I([0] * 999999999)",
    "condition + C(condition, **{'levels': 1})",
    "condition + intensity[0]",
    "condition + __builtins__",
    "condition + compile('1', 'f', 'eval')",
    "condition + breakpoint()",
]
CONTRAST_INJECTIONS = [
    "__import__('os').system('touch hacked')",
    "open('hacked', 'w')",
    "condition[T.b].__class__",
    "intensity; import os",
    "exec('1')",
    "condition[T.b] - __builtins__",
]


def _toml_string(text: str) -> str:
    return json.dumps(text)  # a JSON string is a valid TOML basic string


def _refused_creating_nothing(design: Path, tmp_path: Path, monkeypatch, *, key: str) -> None:
    """``glmeeg run`` from the working folder ``tmp_path``: exit 2, one error line naming
    ``key``, and not one file created or removed anywhere under it."""
    before = sorted(str(p) for p in tmp_path.rglob("*"))
    monkeypatch.chdir(tmp_path)
    r = CliRunner().invoke(app, ["run", str(design), "--out", str(tmp_path / "out")])
    assert r.exit_code == 2, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:") and key in lines[0], lines
    assert sorted(str(p) for p in tmp_path.rglob("*")) == before
    assert not any(p.name == "hacked" for p in tmp_path.rglob("*"))


@pytest.mark.parametrize("formula", FORMULA_INJECTIONS)
def test_formula_injection_is_refused_and_creates_nothing(tmp_path, monkeypatch, formula):
    root = tmp_path / "s"
    design = write_study(root, n_subjects=4, n_trials=9, n_channels=2, n_times=3, seed=1)
    text = design.read_text().replace('formula = "condition + intensity"',
                                      f"formula = {_toml_string(formula)}")
    design.write_text(text)
    _refused_creating_nothing(design, tmp_path, monkeypatch, key="subject_model.formula")


@pytest.mark.parametrize("contrast", CONTRAST_INJECTIONS)
def test_contrast_injection_is_refused_and_creates_nothing(tmp_path, monkeypatch, contrast):
    root = tmp_path / "s"
    tests = f'[[test]]\nname = "t"\nsubject_contrast = {_toml_string(contrast)}\n'
    design = write_study(root, n_subjects=4, n_trials=9, n_channels=2, n_times=3, seed=1,
                         tests=tests)
    _refused_creating_nothing(design, tmp_path, monkeypatch, key="subject_contrast")


def test_near_singular_group_design_is_reported_with_its_condition_number(tmp_path):
    """A covariate in huge units next to the intercept: cond(G) = s_max / s_min of the group
    design (numpy.linalg.cond, the definition) is above 1e8, and the plan says so."""
    import numpy as np
    import pandas as pd

    from glmeeg.pipeline import plan_analysis

    tests = ('[[test]]\nname = "age"\nsubject_contrast = "condition[T.b]"\n'
             'group_formula = "age_ms"\ngroup_contrast = "age_ms"\n')
    design = write_study(tmp_path / "s", n_subjects=6, n_trials=9, n_channels=2, n_times=3,
                         seed=1, tests=tests)
    subjects = pd.read_csv(tmp_path / "s" / "subjects.csv")
    subjects["age_ms"] = subjects["age"] * 3.15576e10 + 1e12  # age in milliseconds, offset
    subjects.to_csv(tmp_path / "s" / "subjects.csv", index=False)
    plan = plan_analysis(design)
    G = np.column_stack([np.ones(6), subjects["age_ms"].to_numpy(float)])
    assert np.linalg.cond(G) > 1e8
    [w] = [w for w in plan.warnings if "group design condition number" in w]
    assert f"{np.linalg.cond(G):.3g}" in w and "test 'age'" in w


# --- interrupts and warnings ------------------------------------------------------------------

# Sends SIGINT to itself while the command line's libraries are being imported (typer), the
# moment a Ctrl-C at start-up lands in; then runs the console script's entry point.
INTERRUPT_AT_START_UP = """\
import builtins, os, signal, sys
real_import = builtins.__import__
def importer(name, *args, **kwargs):
    if name == "typer":
        builtins.__import__ = real_import
        os.kill(os.getpid(), signal.SIGINT)
    return real_import(name, *args, **kwargs)
builtins.__import__ = importer
sys.argv = ["glmeeg", "--version"]
from glmeeg.cli import main
main()
"""


def test_interrupt_during_start_up_is_one_line_and_exit_130(tmp_path):
    proc = subprocess.run([sys.executable, "-c", INTERRUPT_AT_START_UP], capture_output=True,
                          text=True, cwd=tmp_path, timeout=HANG_TIMEOUT)
    assert proc.returncode == 130, proc.stderr
    assert proc.stderr == "interrupted; no results were written\n"
    assert proc.stdout == ""


def test_library_warnings_become_one_line_notes(tmp_path, monkeypatch):
    """A warning raised by a library inside a command is one 'note:' line, not the raw warning
    with its file, line number and source line."""
    import warnings

    import logging

    import glmeeg.pipeline as pipeline

    # A command run earlier in this process left its log handler (on its own stream); `check`
    # sets up none, as in a fresh process.
    monkeypatch.setattr(logging.getLogger("glmeeg"), "handlers", [])
    design = write_study(tmp_path / "study", n_subjects=6, n_trials=12, n_channels=3, n_times=5)
    original = pipeline.plan_analysis

    def plan_with_warning(*args, **kwargs):
        warnings.warn("invalid value encountered\n  in divide", RuntimeWarning)
        return original(*args, **kwargs)

    monkeypatch.setattr(pipeline, "plan_analysis", plan_with_warning)
    result = CliRunner().invoke(app, ["check", str(design)])
    assert result.exit_code == 0, result.output
    notes = [line for line in result.stderr.splitlines() if "invalid value" in line]
    assert notes == ["note: invalid value encountered in divide"], result.stderr
    assert "RuntimeWarning" not in result.stderr and "warnings.warn" not in result.stderr


def test_text_cells_that_spreadsheets_would_evaluate_are_written_as_text(tmp_path):
    """OWASP "CSV Injection": cells starting with =, +, -, @ are prefixed with ' in every CSV
    glmeeg writes, and glmeeg's own reader takes the prefix off again."""
    import pandas as pd

    from glmeeg.study import read_table

    root = tmp_path / "study"
    design = write_study(root, n_subjects=6, n_trials=12, n_channels=3, n_times=5)
    names = ["=HYPERLINK(\"http://x\")", "+Cz", "@Pz"]
    pd.DataFrame({"name": names}).to_csv(root / "channels.tsv", sep="\t", index=False)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out), "-q", "--no-report"])
    assert result.exit_code == 0, result.output
    import csv

    with open(out / "b-vs-a" / "points.csv", newline="") as fh:
        cells = {row[0] for row in list(csv.reader(fh))[1:]}
    assert cells == {"'" + n for n in names}
    table = read_table(out / "b-vs-a" / "points.csv", sep=",", label="points.csv", required=("channel",))
    assert sorted(set(table["channel"])) == sorted(names)
    assert (table["estimate"].abs() >= 0).all()  # numbers (negative ones too) stay numbers


def test_a_long_note_on_a_terminal_stays_one_line():
    """On a terminal the log is printed above the progress bars; a note longer than the
    terminal is one line (the terminal may fold it), never broken by glmeeg."""
    import io
    import logging

    from rich.console import Console

    from glmeeg.progress import configure_logging

    stream = io.StringIO()
    console = Console(file=stream, force_terminal=True, width=40, color_system=None)
    configure_logging(stream, console=console)
    try:
        note = "subject s03: cached fit 0123456789ab failed verification (digest mismatch); refitting"
        logging.getLogger("glmeeg").warning(note)
    finally:
        configure_logging(io.StringIO())
    assert stream.getvalue() == f"glmeeg: {note}\n"


# --- numbers that are not results ---------------------------------------------------------------

def _numbers_study(root: Path, transform) -> Path:
    design = write_study(root, n_subjects=8, n_trials=12, n_channels=2, n_times=4, seed=5,
                         tests='[[test]]\nname = "b"\nsubject_contrast = "condition[T.b]"\n'
                               'correction = "max-statistic"\npermutations = 500\nseed = 1\n')
    for f in (root / "epochs").glob("*.npy"):
        np.save(f, transform(np.load(f).astype(np.float64)))
    return design


@pytest.mark.parametrize("transform", [
    pytest.param(lambda a: np.full_like(a, 5.0), id="constant-5"),
    pytest.param(lambda a: np.full_like(a, 1e6), id="constant-1e6"),
    pytest.param(lambda a: a.astype(np.float64) * 1e-170, id="scaled-1e-170"),
])
def test_data_without_a_digit_of_signal_give_no_statistic(tmp_path, transform):
    """Constant recordings fit exactly: the subjects' contrast estimates are rounding residue
    (about 1e-16), and a t of them would be a number, not a result. Data scaled by 1e-170
    have variances that underflow. Neither gives a statistic, a p-value or a significant point."""
    from glmeeg.results import load_result

    design = _numbers_study(tmp_path / "s", transform)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(design), "--out", str(out), "--no-report"])
    assert result.exit_code == 0, result.output
    t = load_result(out / "b")
    assert not np.isfinite(t.statistic).any() and not np.isfinite(t.p).any()
    assert not t.significant.any()
    assert "not finite at 8 points" in result.stdout


def test_unusable_variance_rule():
    """rss <= n eps total (the rounding bound of a sum of n squares; Higham 2002, section 4.2),
    zero, underflowed or non-finite: unusable; anything above: usable."""
    from glmeeg.subject_level import unusable_variance

    eps, tiny = np.finfo(float).eps, np.finfo(float).tiny
    total = np.array([1.0, 1.0, 1.0, 1.0, 1e-300, 1.0])
    rss = np.array([0.0, 10 * eps * 0.99, 10 * eps * 1.01, np.nan, tiny / 2, 1e-3])
    assert unusable_variance(rss, total, 10).tolist() == [True, True, False, True, True, False]
