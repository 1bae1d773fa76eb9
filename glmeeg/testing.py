"""Helpers for tests of glmeeg and of code built on it.

:func:`write_study` writes a small synthetic study in glmeeg's study layout (design file, trial
and subject tables, channel list, one epoch array per subject), optionally with an effect
planted at a known place, so that a test can check that it is found. The data are invented
(seeded normal noise), for synthetic tests only: they resemble no recording and no published
study, and no reference value should be derived from them.

:func:`assert_results_close` and :func:`assert_results_identical` compare the maps of two
results (a :class:`~glmeeg.results.TestResult`, a :class:`~glmeeg.results.RunResult` or a list
of test results) and name the test and the field that differ. :func:`assert_one_line_error`
checks the command line's error contract (exit code 2, one ``error:`` line on stderr), and
:func:`run_glmeeg` runs the command line in a real process.

This module imports neither pytest, numba nor matplotlib: it is importable wherever glmeeg is.

Examples
--------
>>> import tempfile
>>> from pathlib import Path
>>> from glmeeg.testing import SMALL_STUDY, write_study
>>> design = write_study(Path(tempfile.mkdtemp()) / "study", **SMALL_STUDY, effect=1.5)
>>> design.name
'design.toml'
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from types import MappingProxyType
from typing import Any, Iterable, Mapping

import numpy as np

__all__ = ["DEFAULT_TESTS", "HANG_TIMEOUT", "SMALL_STUDY", "assert_one_line_error",
           "assert_results_close", "assert_results_identical", "run_glmeeg", "write_study"]

#: Seconds after which a child process started by a test is taken to hang. Far beyond any
#: normal run, on an idle or a loaded machine: a guard against a hang, never a measure of speed.
HANG_TIMEOUT = 600.0

#: The ``[[test]]`` block :func:`write_study` writes unless given others: condition b against
#: condition a (the reference level), Holm-corrected over all points.
DEFAULT_TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"
"""

#: Keywords of :func:`write_study` for a study small enough that a run takes well under a
#: second: 6 subjects x 12 trials x 3 channels x 5 time samples.
SMALL_STUDY: Mapping[str, int] = MappingProxyType(
    dict(n_subjects=6, n_trials=12, n_channels=3, n_times=5, seed=7))

_DESIGN = """\
[data]
trials = "trials.csv"
subjects = "subjects.csv"
channels = "channels.tsv"
epochs = "epochs/{{subject}}.npy"
time_start = -0.1
sampling_rate = 100.0
{extra_data}
[subject_model]
formula = "{formula}"
levels = {{ condition = ["a", "b", "c"] }}

[group_model]
formula = "1"

{tests}
"""

_CHANNELS = ["Fz", "Cz", "Pz", "Oz", "C3", "C4", "P3", "P4"]


def write_study(root: str | Path, *, n_subjects: int = 10, n_trials: int = 30, n_channels: int = 4,
                n_times: int = 8, n_freqs: int | None = None, seed: int = 0,
                formula: str = "condition + intensity", tests: str = DEFAULT_TESTS,
                effect: float = 0.0, dtype: Any = np.float32, with_epoch_column: bool = True,
                extra_data: str = "") -> Path:
    """Write a small synthetic study and its design file.

    Every subject has ``n_trials`` trials of conditions a, b and c in equal numbers (shuffled),
    a trial covariate ``intensity`` (normal, mean 50, sd 10) and a response time ``rt``; the
    subject table holds a group (``x`` / ``y``, alternating) and an age. Epochs are standard
    normal noise. The same arguments write the same bytes.

    Parameters
    ----------
    root : str or Path
        Folder of the study (created; files in it are overwritten).
    n_subjects : int, default 10
        Subjects ``s01``, ``s02``, ...
    n_trials : int, default 30
        Trials (epochs) per subject.
    n_channels : int, default 4
        Channels, named from Fz, Cz, Pz, Oz, C3, C4, P3, P4, then E8, E9, ...
    n_times : int, default 8
        Time samples per epoch (100 Hz, starting at -0.1 s).
    n_freqs : int, optional
        Frequencies (4, 6, 8, ... Hz) between channel and time: epochs of shape
        (trials, channels, frequencies, times) and a ``frequencies`` key in ``[data]``.
    seed : int, default 0
        Seed of the random data (``numpy.random.default_rng``).
    formula : str, default "condition + intensity"
        Subject-level formula of the design file.
    tests : str, default DEFAULT_TESTS
        ``[[test]]`` blocks of the design file.
    effect : float, default 0
        Added to the condition-b epochs at channel 1 (Cz) and time samples 2-4 (0.0 to 0.02 s),
        at every frequency: the planted effect a test should find.
    dtype : numpy dtype, default numpy.float32
        Type of the saved epoch arrays.
    with_epoch_column : bool, default True
        Whether the trial table has an ``epoch`` column (without it, rows map to epochs in order).
    extra_data : str, default ""
        Lines added to the ``[data]`` table of the design file.

    Returns
    -------
    Path
        The design file, ``root / "design.toml"``.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> root = Path(tempfile.mkdtemp()) / "study"
    >>> design = write_study(root, n_subjects=4, n_trials=6, effect=2.0)
    >>> sorted(p.name for p in (root / "epochs").iterdir())
    ['s01.npy', 's02.npy', 's03.npy', 's04.npy']
    """
    import pandas as pd  # here, so that importing this module stays light

    root = Path(root)
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    (root / "epochs").mkdir(exist_ok=True)
    rows = []
    for i in range(n_subjects):
        s = f"s{i + 1:02d}"
        cond = np.array(["a", "b", "c"])[np.arange(n_trials) % 3]
        rng.shuffle(cond)
        shape = (n_trials, n_channels) + ((n_freqs,) if n_freqs else ()) + (n_times,)
        y = rng.standard_normal(shape)
        y[cond == "b", 1, ..., 2:5] += effect
        np.save(root / "epochs" / f"{s}.npy", y.astype(dtype))
        intensity = rng.normal(50, 10, n_trials).round(2)
        for j in range(n_trials):
            rows.append({"subject": s, "epoch": j, "condition": cond[j], "intensity": intensity[j],
                         "rt": round(float(rng.uniform(0.3, 0.9)), 3)})
    trials = pd.DataFrame(rows)
    if not with_epoch_column:
        trials = trials.drop(columns="epoch")
    trials.to_csv(root / "trials.csv", index=False)
    pd.DataFrame({"subject": [f"s{i + 1:02d}" for i in range(n_subjects)],
                  "group": ["x", "y"] * (n_subjects // 2) + ["x"] * (n_subjects % 2),
                  "age": rng.integers(20, 60, n_subjects)}).to_csv(root / "subjects.csv", index=False)
    names = _CHANNELS[:n_channels]
    names += [f"E{k}" for k in range(len(names), n_channels)]
    pd.DataFrame({"name": names}).to_csv(root / "channels.tsv", sep="\t", index=False)
    if n_freqs and "frequencies" not in extra_data:
        extra_data += f"\nfrequencies = {[float(4 + 2 * k) for k in range(n_freqs)]}\n"
    design = root / "design.toml"
    design.write_text(_DESIGN.format(formula=formula, tests=tests, extra_data=extra_data))
    return design


# --- comparing results ---------------------------------------------------------------------------

def _tests_of(result: Any) -> list:
    """The test results of a TestResult, a RunResult or a sequence of TestResults."""
    if hasattr(result, "tests"):
        return list(result.tests)
    if hasattr(result, "estimate") and hasattr(result, "name"):
        return [result]
    return list(result)


def _array_fields(a: Any, b: Any) -> list[str]:
    """Names of the fields that hold an array in either result, in the model's order."""
    names = list(getattr(type(a), "model_fields", None) or vars(a))
    return [n for n in names
            if isinstance(getattr(a, n, None), np.ndarray) or isinstance(getattr(b, n, None), np.ndarray)]


def _pairs(actual: Any, desired: Any):
    """(test name, actual test, desired test), after checking both hold the same tests."""
    a, b = _tests_of(actual), _tests_of(desired)
    names_a, names_b = [t.name for t in a], [t.name for t in b]
    if names_a != names_b:
        raise AssertionError(f"tests differ: {names_a} != {names_b}")
    return zip(names_a, a, b)


def assert_results_close(actual: Any, desired: Any, *, rtol: float = 1e-7, atol: float = 0.0) -> None:
    """Assert that two results hold the same tests with the same maps, within a tolerance.

    Every array of every test (``estimate``, ``standard_error``, ``statistic``, ``p``,
    ``p_corrected``, ``significant``, effect sizes and their intervals, permutation p-values,
    ``tfce``, ``cluster``, ``null_distribution``, the subject estimates, the residual maps, the
    contrasts and group design) must be present in both or in neither, have the same shape, and
    agree: floating-point arrays within ``|actual - desired| <= atol + rtol * |desired|``
    (:func:`numpy.testing.assert_allclose`, NaN where NaN, infinities equal), boolean and integer
    arrays exactly.

    Parameters
    ----------
    actual, desired : TestResult, RunResult or sequence of TestResult
        The results to compare (a run's tests in the same order, by the same names).
    rtol : float, default 1e-7
        Relative tolerance of floating-point arrays.
    atol : float, default 0
        Absolute tolerance of floating-point arrays (p-values near 0 or estimates near 0 may
        need one).

    Raises
    ------
    AssertionError
        The tests differ in name or number, or an array differs; the message names the test and
        the field, and shows the mismatch.

    See Also
    --------
    assert_results_identical : bit-for-bit equality, as any backend or worker count must give.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> from glmeeg import run_analysis
    >>> design = write_study(Path(tempfile.mkdtemp()) / "study", **SMALL_STUDY)
    >>> assert_results_close(run_analysis(design), run_analysis(design), rtol=0)
    """
    for name, ta, tb in _pairs(actual, desired):
        for field in _array_fields(ta, tb):
            x, y = getattr(ta, field), getattr(tb, field)
            where = f"test {name!r}, field {field!r}"
            if (x is None) != (y is None):
                raise AssertionError(f"{where}: {'missing' if x is None else 'present'} in actual, "
                                     f"{'missing' if y is None else 'present'} in desired")
            if x is None:
                continue
            x, y = np.asarray(x), np.asarray(y)
            if x.shape != y.shape:
                raise AssertionError(f"{where}: shape {x.shape} != {y.shape}")
            if np.issubdtype(x.dtype, np.inexact) or np.issubdtype(y.dtype, np.inexact):
                np.testing.assert_allclose(x, y, rtol=rtol, atol=atol, equal_nan=True, err_msg=where)
            elif not np.array_equal(x, y):
                np.testing.assert_array_equal(x, y, err_msg=where)


def assert_results_identical(actual: Any, desired: Any) -> None:
    """Assert that two results are the same bit for bit.

    Every array of every test has the same dtype, shape and bytes (so NaN where NaN, and -0.0
    where -0.0); the tests' clusters and resampling settings are equal; for two
    :class:`~glmeeg.results.RunResult` objects the subject summaries are equal too. This is what
    glmeeg promises for any backend, number of workers or batch size.

    Parameters
    ----------
    actual, desired : TestResult, RunResult or sequence of TestResult
        The results to compare.

    Raises
    ------
    AssertionError
        Naming the test and the field that differ.

    See Also
    --------
    assert_results_close : equality within a tolerance.
    """
    for name, ta, tb in _pairs(actual, desired):
        for field in _array_fields(ta, tb):
            x, y = getattr(ta, field), getattr(tb, field)
            where = f"test {name!r}, field {field!r}"
            if (x is None) != (y is None):
                raise AssertionError(f"{where}: present in one result only")
            if x is None:
                continue
            if x.dtype != y.dtype or x.shape != y.shape:
                raise AssertionError(f"{where}: {x.dtype}{list(x.shape)} != {y.dtype}{list(y.shape)}")
            if x.tobytes() != y.tobytes():
                differ = np.flatnonzero(np.frombuffer(x.tobytes(), np.uint8)
                                        != np.frombuffer(y.tobytes(), np.uint8))
                raise AssertionError(f"{where}: not bitwise equal (first differing byte {differ[0]} "
                                     f"of {x.nbytes})")
        for field in ("clusters", "resampling"):
            if getattr(ta, field, None) != getattr(tb, field, None):
                raise AssertionError(f"test {name!r}, field {field!r}: {getattr(ta, field, None)!r} "
                                     f"!= {getattr(tb, field, None)!r}")
    if hasattr(actual, "subjects") and hasattr(actual, "tests") and hasattr(desired, "tests"):
        if actual.subjects != desired.subjects:
            raise AssertionError(f"subjects differ: {actual.subjects!r} != {desired.subjects!r}")


# --- the command line ----------------------------------------------------------------------------

def assert_one_line_error(result: Any, fragments: Iterable[str] = ()) -> str:
    """Assert the command line's error contract on a finished command and return the line.

    Exit code 2, nothing on stdout, exactly one line on stderr, starting with ``error:`` and
    holding every fragment, no traceback and no carriage return.

    Parameters
    ----------
    result : click.testing.Result
        What ``typer.testing.CliRunner().invoke(glmeeg.cli.app, [...])`` returned.
    fragments : iterable of str, default ()
        Texts the line must contain (a file, subject or key name, the rule broken ...).

    Returns
    -------
    str
        The error line, without its newline.

    Raises
    ------
    AssertionError
        Naming what of the contract is broken.
    """
    def fail(what: str) -> None:  # raised, not asserted: the checks hold under python -O too
        raise AssertionError(what)

    err = result.stderr
    if result.exit_code != 2:
        fail(f"exit code {result.exit_code}, expected 2; output {result.output!r}, "
             f"exception {result.exception!r}")
    if "Traceback" in result.output:
        fail(f"a traceback in the output: {result.output!r}")
    if result.stdout != "":
        fail(f"stdout not empty: {result.stdout!r}")
    if not err.endswith("\n") or err.count("\n") != 1:
        fail(f"stderr is not one line: {err!r}")
    line = err.rstrip("\n")
    if not line.startswith("error: ") or len(line) == len("error: "):
        fail(f"stderr does not start with 'error: ' and a message: {line!r}")
    if "\r" in line:
        fail(f"a carriage return in the line: {line!r}")
    for f in fragments:
        if f not in line:
            fail(f"{f!r} not in {line!r}")
    return line


def run_glmeeg(*args: str | Path, cwd: str | Path | None = None, env: Mapping[str, str] | None = None,
               timeout: float = HANG_TIMEOUT, **kwargs: Any) -> subprocess.CompletedProcess:
    """Run ``python -m glmeeg ARGS`` in a new process of this interpreter and wait for it.

    Parameters
    ----------
    *args : str or Path
        The command line after ``glmeeg`` (``"run", design, "--out", out``).
    cwd : str or Path, optional
        Working folder of the process.
    env : mapping, optional
        Its environment (default: this process's).
    timeout : float, default HANG_TIMEOUT
        Seconds after which the process is killed and :class:`subprocess.TimeoutExpired`
        raised: a guard against a hang, not a measure of speed.
    **kwargs
        Passed to :func:`subprocess.run` (``preexec_fn`` for resource limits, ...).

    Returns
    -------
    subprocess.CompletedProcess
        With ``returncode`` (negative: killed by that signal) and ``stdout`` / ``stderr`` as text.
    """
    return subprocess.run([sys.executable, "-m", "glmeeg", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, env=None if env is None else dict(env),
                          timeout=timeout, **kwargs)
