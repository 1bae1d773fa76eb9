"""The fresh-clone check (.ci/fresh-clone-check) reads its commands from the README.

The check itself takes about ten minutes (it installs glmeeg twice and runs the demo and the
suite); here only its reading of the README is tried, through ``--list``, so that a change of
the README's "Two commands" section that the check could not follow fails at once.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from glmeeg.testing import HANG_TIMEOUT

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / ".ci" / "fresh-clone-check"

pytestmark = pytest.mark.skipif(shutil.which("bash") is None or shutil.which("git") is None
                                or not (ROOT / ".git").exists(),
                                reason="needs bash, git and the repository's own checkout")


def test_the_check_lists_the_readme_two_commands_in_order():
    assert os.access(SCRIPT, os.X_OK)
    out = subprocess.run([str(SCRIPT), "--list"], capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert out.returncode == 0, out.stderr
    commands = out.stdout.splitlines()
    # The README shows them as the only two ```bash blocks of "## Two commands".
    section = re.search(r"^## Two commands\n(.*?)^## ", (ROOT / "README.md").read_text(),
                        re.M | re.S).group(1)
    shown = [b.strip() for b in re.findall(r"^```bash\n(.*?)^```$", section, re.M | re.S)]
    assert commands == shown and len(commands) == 2
    assert "glmeeg demo" in commands[0] and "pytest" in commands[1]


def test_the_check_refuses_arguments_it_does_not_know():
    out = subprocess.run([str(SCRIPT), "--fast"], capture_output=True, text=True, timeout=HANG_TIMEOUT)
    assert out.returncode == 2 and out.stderr.startswith("usage: ")
