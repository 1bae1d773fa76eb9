"""The package's stages and the direction of their imports.

Each stage may import from the stages before it (and from itself), never from one after it: the
order below is the one place it is declared. Every import counts, also those inside functions
(lazy imports keep start-up short; they do not make a dependency go away).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "glmeeg"

# Upstream first. Modules of one line may import each other.
STAGES = [
    ("_version", "errors", "defaults"),
    ("axes",),
    ("spec", "formula"),
    ("study",),
    ("sensors",),
    ("progress", "parallel"),
    ("subject_level",),
    ("group_level",),
    ("inference",),
    ("results",),
    ("planning",),
    ("report",),
    ("pipeline",),
    ("demo",),
    ("testing",),
    ("cli",),
]
RANK = {name: i for i, line in enumerate(STAGES) for name in line}
# The package root re-exports the public names (lazily) and runs the command line.
ROOT_MODULES = {"__init__", "__main__"}


def stage_of(path: Path) -> str:
    return path.relative_to(PACKAGE).with_suffix("").parts[0]


def imported_stages(path: Path, source: str | None = None):
    """(line, stage) of every glmeeg stage that the module at ``path`` imports."""
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    package = parts[:-1]  # a package's __init__ and its modules resolve relative imports alike
    tree = ast.parse(path.read_text() if source is None else source)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[:len(package) - (node.level - 1)]
                full = base + (node.module.split(".") if node.module else [])
                if len(full) == 1:  # `from .. import x` at the package root: x is the stage
                    for alias in node.names:
                        yield node.lineno, alias.name
                    continue
                yield node.lineno, full[1]
            elif node.module and node.module.split(".")[0] == "glmeeg" and "." in node.module:
                yield node.lineno, node.module.split(".")[1]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("glmeeg."):
                    yield node.lineno, alias.name.split(".")[1]


def violations(path: Path, source: str | None = None) -> list[str]:
    stage = stage_of(path)
    out = []
    for line, target in imported_stages(path, source):
        if target in RANK and RANK[target] > RANK[stage]:
            out.append(f"{path.relative_to(PACKAGE.parent)}:{line}: {stage} imports {target}, a later stage")
    return out


MODULES = sorted(p for p in PACKAGE.rglob("*.py") if "__pycache__" not in p.parts)


def test_every_module_belongs_to_a_declared_stage():
    unknown = {stage_of(p) for p in MODULES} - set(RANK) - ROOT_MODULES
    assert not unknown, f"modules or packages without a stage in STAGES: {sorted(unknown)}"


@pytest.mark.parametrize("path", [p for p in MODULES if stage_of(p) not in ROOT_MODULES],
                         ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_module_imports_a_later_stage(path):
    assert violations(path) == []


@pytest.mark.parametrize("line", ["from ..pipeline import run_analysis",
                                  "    from ..cli.commands import app",
                                  "from glmeeg.report import figures",
                                  "import glmeeg.planning.simulated"])
def test_the_check_fails_when_a_downstream_import_is_added(line):
    """The same check on a stage's module with one downstream import added."""
    path = PACKAGE / "group_level" / "glm.py"
    source = path.read_text()
    if line.startswith("    "):
        source += f"\n\ndef _added():\n{line}\n"
    else:
        source += f"\n{line}\n"
    found = violations(path, source)
    assert len(found) == 1 and "group_level imports" in found[0], found


def test_a_same_stage_or_upstream_import_passes():
    path = PACKAGE / "group_level" / "glm.py"
    source = path.read_text() + "\nfrom ..subject_level import fit_ols\nfrom .robust import welch_test\n"
    assert violations(path, source) == []
