"""The demo's folder: what may be replaced (only files the demo wrote, listed with their SHA-256
in ``demo.json``), and moving a staged demo into place as one step."""

from __future__ import annotations

import re
from pathlib import Path

# demo.json lists the files a demo wrote (glmeeg.results.ownership); the results folder has its own list.
DEMO_LIST = "glmeeg demo"


_DEMO_LIST_VERSION = 1


_STAGE = re.compile(r"\.glmeeg-demo\.[a-z0-9_]{8}\.partial")


def check_demo_folder(directory: str | Path) -> Path:
    """Refuse a demo folder holding files the demo did not write; return it (links resolved).

    A demo may write into a new or empty folder, or into an earlier demo's folder whose files
    are all listed in its ``demo.json`` (the ``results`` folder is checked by
    :func:`glmeeg.results.check_output_folder`).

    Raises
    ------
    GlmeegError
        ``directory`` is not a folder, or holds files the demo did not write.
    """
    import os
    import shutil

    from ..errors import GlmeegError
    from ..results.ownership import describe, read_file_list, unowned_entries

    root = Path(os.path.abspath(directory))
    try:
        if root.is_symlink():
            root = root.resolve(strict=False)
        exists, is_dir = root.exists(), root.is_dir()
    except (OSError, RuntimeError) as e:  # RuntimeError: pathlib's "Symlink loop"
        raise GlmeegError(f"{root}: cannot be used for the demo ({getattr(e, 'strerror', None) or e})") from None
    if exists and not is_dir:
        raise GlmeegError(f"{root}: exists and is not a folder; expected a folder for the demo")
    if not exists:
        return root
    for stage in root.glob(".glmeeg-demo.*.partial"):  # what a killed demo was writing
        if _STAGE.fullmatch(stage.name) and stage.is_dir() and not stage.is_symlink():
            shutil.rmtree(stage, ignore_errors=True)
    owned = read_file_list(root / "demo.json", schema_version=_DEMO_LIST_VERSION, kind=DEMO_LIST)
    foreign = unowned_entries(root, owned, listing="demo.json", delegated=("results",))
    if foreign:
        raise GlmeegError(f"{root}: holds files the demo did not write ({describe(foreign)}); "
                          "choose a new or empty folder for the demo")
    return root


def _move_into_place(stage: Path, root: Path, earlier: dict[str, str]) -> None:
    """Move the staged demo files into ``root`` and write ``demo.json`` (files of an earlier
    demo that this one does not write stay listed). Ctrl-C is held back while the files move,
    so the folder never holds half of each demo."""
    import os
    import signal

    from ..results.ownership import digests, relative_files

    names = relative_files(stage)
    listed = {**{f: d for f, d in earlier.items() if (root / f).is_file()}, **digests(stage, names)}
    blocking = hasattr(signal, "pthread_sigmask")
    if blocking:
        held = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        for name in names:
            (root / name).parent.mkdir(parents=True, exist_ok=True)
            os.replace(stage / name, root / name)
        listed.pop("demo.json", None)
        _write_demo_list(root, listed)
    finally:
        if blocking:
            signal.pthread_sigmask(signal.SIG_SETMASK, held)


def _earlier_demo_files(root: Path) -> dict[str, str]:
    from ..results.ownership import read_file_list

    return read_file_list(root / "demo.json", schema_version=_DEMO_LIST_VERSION, kind=DEMO_LIST) or {}


def _write_demo_list(root: Path, files: dict[str, str]) -> None:
    """``demo.json``: the demo's files with their SHA-256 (written atomically)."""
    import json
    import os

    from .._version import __version__

    doc = {"written_by": DEMO_LIST, "schema_version": _DEMO_LIST_VERSION,
           "provenance": {"glmeeg_version": __version__}, "files": dict(sorted(files.items()))}
    tmp = root / ".demo.json.partial"
    tmp.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, root / "demo.json")
