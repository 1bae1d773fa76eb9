"""A careless or hostile design file or table costs little: refused before the costly step.

Each case runs ``glmeeg check`` in a child process whose address space is limited to 500 MiB
and whose CPU time is limited to 5 s (``setrlimit``): a runaway (a formula that patsy would
expand into millions of terms, a dotted key whose parsing grows with its square, a table of
200,000 columns) is killed by the limit and fails the test. No timing is asserted; the limits
make a runaway fail. Each case must end in one line on stderr and exit code 2.
"""

from __future__ import annotations

import resource
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import write_study
from test_bad_input import SMALL

MEMORY = 500 * 2**20  # bytes of address space
CPU_SECONDS = 5


def _limits() -> None:  # runs in the child before it starts Python
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY, MEMORY))
    resource.setrlimit(resource.RLIMIT_CPU, (CPU_SECONDS, CPU_SECONDS + 1))


def _check(design: Path, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "glmeeg", "check", str(design)], capture_output=True,
                          text=True, cwd=cwd, preexec_fn=_limits)


VARS = "abcdefghijklmnopqrstuv"  # 22 names


def _formula(text: str):
    def mutate(root: Path, design: Path) -> None:
        body = design.read_text().replace('formula = "condition + intensity"',
                                          "formula = '''" + text + "'''")
        design.write_text(body)
    return mutate


def _contrast(text: str):
    def mutate(root: Path, design: Path) -> None:
        design.write_text(design.read_text().replace('subject_contrast = "condition[T.b]"',
                                                     "subject_contrast = '''" + text + "'''"))
    return mutate


def _append(text: str):
    return lambda root, design: design.write_text(design.read_text() + text)


def _levels(n: int):
    def mutate(root: Path, design: Path) -> None:
        levels = ", ".join(f'"l{i}"' for i in range(n))
        design.write_text(design.read_text().replace('condition = ["a", "b", "c"]',
                                                     f'condition = ["a", "b", "c", {levels}]'))
    return mutate


def _wide_trials(n: int):
    def mutate(root: Path, design: Path) -> None:
        header = ",".join(["subject", "epoch", "condition", "intensity", "rt"] + [f"x{i}" for i in range(n)])
        lines = (root / "trials.csv").read_text().splitlines()
        filler = "," * n
        (root / "trials.csv").write_text("\n".join([header] + [l + filler for l in lines[1:]]) + "\n")
    return mutate


def _huge_design(root: Path, design: Path) -> None:
    with open(design, "a") as fh:
        fh.write(("# " + "x" * 1000 + "\n") * 3000)  # 3 MB of comments


CASES = [
    # Formulas: patsy would expand these into 4,194,303 terms (it hangs today).
    ("power-of-a-sum", _formula("(" + " + ".join(VARS) + ")**22"), ["expands to", "terms"]),
    ("product-of-22-factors", _formula("*".join(VARS)), ["expands to", "terms"]),
    ("spline-more-columns-than-rows", _formula("condition + bs(intensity, df=500)"),
     ["design columns for 72 usable rows"]),
    ("spline-huge-df", _formula("bs(intensity, df=100000)"), ["bs()", "degrees of freedom"]),
    ("unary-minus-100000", _formula("-" * 100_000 + "intensity"), ["characters"]),
    ("sum-of-3000-terms", _formula(" + ".join(["intensity"] * 3000)), ["characters"]),
    ("sum-of-1000-short-terms", _formula("+".join(["rt"] * 1000)), ["nests more than"]),
    ("spline-knots-list", _formula("bs(intensity, knots=[" + ",".join(["5"] * 1500) + "])"),
     ["list of 1500 values"]),
    # Contrasts.
    ("contrast-3000-terms", _contrast(" - ".join(["condition[T.b]"] * 3000)), ["characters"]),
    ("contrast-deep", _contrast("-" * 3900 + "condition[T.b]"), ["nested too deeply"]),
    # Design files.
    ("toml-deep-array", _append("\n[extra]\nx = " + "[" * 100_000 + "]" * 100_000 + "\n"), ["nested"]),
    ("toml-deep-inline-table", _append("\nx = " + "{a=" * 50_000 + "1" + "}" * 50_000 + "\n"), ["nested"]),
    ("toml-dotted-key-100000", _append("\n" + ".".join(["a"] * 100_000) + " = 1\n"), ["dotted key"]),
    ("toml-long-array", _append("\nx = [" + "1," * 200_000 + "]\n"), ["elements"]),
    ("toml-huge-file", _huge_design, ["KiB"]),
    ("levels-12000-unused", _levels(12_000), ["elements"]),
    ("levels-2000-unused", _levels(2_000), ["levels", "at most 1000"]),
    # Tables.
    ("trials-200000-columns", _wide_trials(200_000), ["trials.csv", "header row is longer"]),
    ("trials-20000-columns", _wide_trials(20_000), ["trials.csv", "20005 columns", "at most 5000"]),
]


@pytest.mark.parametrize(("mutate", "fragments"), [pytest.param(m, f, id=i) for i, m, f in CASES])
def test_costly_input_is_refused_within_the_limits(tmp_path, mutate, fragments):
    root = tmp_path / "study"
    design = write_study(root, **SMALL)
    mutate(root, design)
    proc = _check(design, tmp_path)
    # A child killed by RLIMIT_CPU (SIGXCPU) or out of memory does not exit with 2.
    assert proc.returncode == 2, (proc.returncode, proc.stderr[-2000:])
    assert proc.stdout == ""
    assert proc.stderr.endswith("\n") and proc.stderr.count("\n") == 1, proc.stderr[-2000:]
    assert proc.stderr.startswith("error: ") and "Traceback" not in proc.stderr
    for f in fragments:
        assert f in proc.stderr, (f, proc.stderr)


def test_the_limits_let_a_normal_check_through(tmp_path):
    """The control: the same limits do not stop an ordinary check (the cases fail for their
    input, not for the limits)."""
    design = write_study(tmp_path / "study", **SMALL)
    proc = _check(design, tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "design OK" in proc.stdout
