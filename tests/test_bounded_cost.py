"""A careless or hostile design file or table costs little: refused before the costly step.

Each case runs ``glmeeg check`` in a child process whose address space is limited to 500 MiB
and whose CPU time is limited to 5 s (``setrlimit``): a runaway (a formula that patsy would
expand into millions of terms, a dotted key whose parsing grows with its square, a table of
200,000 columns) is killed by the limit and fails the test. No timing is asserted; the limits
make a runaway fail. Each case must end in one line on stderr and exit code 2.

The children are independent, so the module starts them together (as many at a time as the
machine has cores, each under its own limits) and each test then checks its own case's.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest

from glmeeg.testing import HANG_TIMEOUT, SMALL_STUDY, write_study

pytestmark = pytest.mark.slow  # a child process per case

MEMORY = 500 * 2**20  # bytes of address space
CPU_SECONDS = 5


def _limits() -> None:  # runs in the child before it starts Python
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY, MEMORY))
    resource.setrlimit(resource.RLIMIT_CPU, (CPU_SECONDS, CPU_SECONDS + 1))


def _start_check(design: Path, cwd: Path) -> SimpleNamespace:
    """``glmeeg check DESIGN`` in a child under the limits, its output in files beside it (no
    pipe to drain while other children run)."""
    out, err = open(cwd / "stdout.txt", "w+"), open(cwd / "stderr.txt", "w+")
    proc = subprocess.Popen([sys.executable, "-m", "glmeeg", "check", str(design)], stdout=out,
                            stderr=err, text=True, cwd=cwd, preexec_fn=_limits)
    return SimpleNamespace(proc=proc, out=out, err=err)


def _finish(child: SimpleNamespace) -> SimpleNamespace:
    try:
        child.proc.wait(timeout=HANG_TIMEOUT)  # RLIMIT_CPU cannot stop a child that hangs idle
    except subprocess.TimeoutExpired:
        child.proc.kill()
        child.proc.wait()
    texts = []
    for fh in (child.out, child.err):
        fh.seek(0)
        texts.append(fh.read())
        fh.close()
    return SimpleNamespace(returncode=child.proc.returncode, stdout=texts[0], stderr=texts[1])


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


CONTROL = "control"  # the unchanged study


@pytest.fixture(scope="module")
def checks(tmp_path_factory, request) -> dict:
    """Each selected case's study, mutated, and the result of its child's check, by case id.

    The children run side by side, at most one per core; each is waited for in the order
    started, from this (the main) thread, so ``preexec_fn`` runs in no threaded child.
    """
    mutations = {case: mutate for case, mutate, _ in CASES} | {CONTROL: None}
    selected = {item.callspec.id if hasattr(item, "callspec") else CONTROL
                for item in request.session.items if item.module is request.module}
    todo = [case for case in mutations if case in selected]
    window = max(1, os.cpu_count() or 1)
    running: list = []
    results = {}
    for case in todo + [None] * window:
        if case is not None:
            folder = tmp_path_factory.mktemp(case)
            root = folder / "study"
            design = write_study(root, **SMALL_STUDY)
            if mutations[case] is not None:
                mutations[case](root, design)
            running.append((case, _start_check(design, folder)))
        if running and (case is None or len(running) >= window):
            done, child = running.pop(0)
            results[done] = _finish(child)
    return results


@pytest.mark.parametrize("case", [pytest.param(c, id=c) for c, _, _ in CASES])
def test_costly_input_is_refused_within_the_limits(checks, case):
    fragments = next(f for c, _, f in CASES if c == case)
    proc = checks[case]
    # A child killed by RLIMIT_CPU (SIGXCPU) or out of memory does not exit with 2.
    assert proc.returncode == 2, (proc.returncode, proc.stderr[-2000:])
    assert proc.stdout == ""
    assert proc.stderr.endswith("\n") and proc.stderr.count("\n") == 1, proc.stderr[-2000:]
    assert proc.stderr.startswith("error: ") and "Traceback" not in proc.stderr
    for f in fragments:
        assert f in proc.stderr, (f, proc.stderr)


def test_the_limits_let_a_normal_check_through(checks):
    """The control: the same limits do not stop an ordinary check (the cases fail for their
    input, not for the limits)."""
    proc = checks[CONTROL]
    assert proc.returncode == 0, proc.stderr
    assert "design OK" in proc.stdout
