"""glmeeg never deletes or overwrites a file it did not write.

A result folder may be replaced only when its ``run.json`` is glmeeg's and lists every file in
the folder; anything else is refused with one line naming what glmeeg did not write, and the
folder is left exactly as it was. Single output files are replaced only when they carry
glmeeg's mark (report, schema, PNG, netCDF); tables never are.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from typer.testing import CliRunner

from glmeeg.cli import app
from glmeeg.testing import SMALL_STUDY, assert_one_line_error, write_study


def invoke(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


def snapshot(folder: Path) -> dict:
    """Every entry under ``folder`` (links not followed) with its bytes or link target."""
    out = {}
    for dirpath, dirnames, files in os.walk(folder):
        for name in dirnames + files:
            p = Path(dirpath) / name
            rel = p.relative_to(folder).as_posix()
            if p.is_symlink():
                out[rel] = ("link", os.readlink(p))
            elif p.is_file():
                out[rel] = p.read_bytes()
            else:
                out[rel] = "folder"
    return out


def hidden_beside(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.parent.iterdir() if p.name.startswith("."))


@pytest.fixture
def design(tmp_path):
    return write_study(tmp_path / "study", **SMALL_STUDY)


def test_a_foreign_run_json_does_not_make_a_result_folder(design, tmp_path):
    """The reported case: an empty run.json beside the user's thesis."""
    keep = tmp_path / "keep"
    keep.mkdir()
    (keep / "run.json").write_text("{}\n")
    (keep / "thesis.docx").write_text("work\n")
    before = snapshot(keep)
    result = invoke("run", design, "--out", keep, "--no-report")
    line = assert_one_line_error(result, [str(keep), "files glmeeg did not write", "run.json", "thesis.docx"])
    assert "not written by this version of glmeeg" in line
    assert snapshot(keep) == before
    assert (keep / "thesis.docx").read_text() == "work\n"
    assert hidden_beside(keep) == []


@pytest.mark.slow  # runs with their reports
def test_user_files_added_to_a_real_result_folder_are_kept(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    listed = json.loads((out / "run.json").read_text())
    assert listed["written_by"] == "glmeeg run"
    # The list is exactly what the run wrote (the cache has its own names).
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*")
                   if p.is_file() and p.parent.name != "subject-fits" and p.name != "run.json")
    assert sorted(listed["files"]) == files
    # Each with the SHA-256 of its bytes (hashlib, computed here independently).
    import hashlib
    assert all(listed["files"][f] == hashlib.sha256((out / f).read_bytes()).hexdigest() for f in files)
    for extra in ("thesis.docx", "b-vs-a/my-figure.svg"):
        (out / extra).write_text("mine")
        before = snapshot(out)
        assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["files glmeeg did not write", extra])
        assert snapshot(out) == before
        (out / extra).unlink()
    (out / "subject-fits" / "notes.txt").write_text("mine")
    assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["subject-fits/notes.txt"])
    (out / "subject-fits" / "notes.txt").unlink()
    (out / "drafts").mkdir()  # an empty folder of the user's is not glmeeg's either
    assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["drafts/"])
    (out / "drafts").rmdir()
    assert invoke("run", design, "--out", out, "-q").exit_code == 0


def test_a_forged_file_list_still_refuses_what_it_does_not_list(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q", "--no-report").exit_code == 0
    doc = json.loads((out / "run.json").read_text())
    (out / "data.csv").write_text("mine")
    for forged in ({**doc, "files": {**doc["files"], "../outside.txt": "0" * 64}},  # not a plain relative path
                   {**doc, "files": {**doc["files"], "data.csv": "not a digest"}},
                   {**doc, "files": sorted(doc["files"])},   # a list without digests
                   {**doc, "schema_version": 99},
                   {k: v for k, v in doc.items() if k != "provenance"},
                   {k: v for k, v in doc.items() if k != "files"}):
        (out / "run.json").write_text(json.dumps(forged))
        assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["data.csv"])
        assert (out / "data.csv").read_text() == "mine"


def test_a_link_inside_the_folder_is_refused_and_its_target_kept(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q", "--no-report").exit_code == 0
    precious = tmp_path / "precious.csv"
    precious.write_text("keep")
    (out / "b-vs-a" / "points.csv").unlink()
    (out / "b-vs-a" / "points.csv").symlink_to(precious)  # listed name, but a link
    assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["b-vs-a/points.csv"])
    assert precious.read_text() == "keep"


@pytest.mark.slow  # runs with their reports
def test_out_as_a_symbolic_link_is_resolved_and_no_link_left_behind(design, tmp_path):
    real = tmp_path / "real"
    assert invoke("run", design, "--out", real, "-q").exit_code == 0
    link = tmp_path / "link"
    link.symlink_to(real, target_is_directory=True)
    assert invoke("run", design, "--out", link, "-q").exit_code == 0
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert (real / "run.json").is_file()
    assert hidden_beside(real) == [] and hidden_beside(link) == []
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    assert_one_line_error(invoke("run", design, "--out", dangling, "-q"), ["symbolic link", "does not exist"])
    assert not (tmp_path / "nowhere").exists()


@pytest.mark.slow  # runs with their reports
def test_report_command_keeps_the_file_list_true(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q", "--no-report").exit_code == 0
    assert invoke("report", out).exit_code == 0
    assert "report.html" in json.loads((out / "run.json").read_text())["files"]
    assert invoke("run", design, "--out", out, "-q").exit_code == 0  # still glmeeg's folder
    assert invoke("report", out).exit_code == 0  # its own report is replaced


@pytest.mark.slow  # a run with its report
def test_single_output_files_of_someone_else_are_never_replaced(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    mine = tmp_path / "mine.html"
    mine.write_text("<html>my page</html>")
    assert_one_line_error(invoke("report", out, "--out", mine), ["mine.html", "did not write"])
    assert mine.read_text() == "<html>my page</html>"
    schema = tmp_path / "schema.json"
    schema.write_text('{"$id": "mine"}')
    assert_one_line_error(invoke("schema", "--out", schema), ["schema.json", "did not write"])
    assert invoke("schema", "--out", tmp_path / "s.json").exit_code == 0
    assert invoke("schema", "--out", tmp_path / "s.json").exit_code == 0  # glmeeg's own: replaced
    table = tmp_path / "neighbours.csv"
    table.write_text("channel,neighbour\nFz,Cz\n")  # hand-edited: never replaced
    assert_one_line_error(invoke("neighbours", design, "--out", table), ["neighbours.csv", "table"])
    assert table.read_text() == "channel,neighbour\nFz,Cz\n"
    plot = tmp_path / "photo.png"
    plot.write_bytes(b"\x89PNG\r\n\x1a\nsomeone's picture")
    result = invoke("power", "--design", "two-sample", "--effect-size", "0.5", "--power", "0.8",
                    "--curve", "10,20", "--plot", plot)
    assert_one_line_error(result, ["photo.png", "did not write"])
    assert plot.read_bytes() == b"\x89PNG\r\n\x1a\nsomeone's picture"


def test_demo_refuses_a_folder_of_someone_else(tmp_path):
    study = tmp_path / "my-study"
    study.mkdir()
    (study / "design.toml").write_text("# my own design\n")
    before = snapshot(study)
    assert_one_line_error(invoke("demo", study, "--subjects", "4", "-q"), ["design.toml", "demo did not write"])
    assert snapshot(study) == before


@pytest.mark.slow  # a run and reports
def test_temporary_names_never_touch_files_of_the_user(design, tmp_path):
    """Single files are written under a new random name beside the target: a file or a link
    of the user's named like glmeeg's temporary files is left alone."""
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    (tmp_path / ".r.html.partial").symlink_to(victim)
    (tmp_path / ".s.html.partial").write_text("mine")
    assert invoke("report", out, "--out", tmp_path / "r.html").exit_code == 0
    assert invoke("report", out, "--out", tmp_path / "s.html").exit_code == 0
    assert victim.read_text() == "precious" and (tmp_path / ".s.html.partial").read_text() == "mine"
    assert not (tmp_path / "r.html").is_symlink()


@pytest.mark.slow  # a run with its report
def test_files_changed_since_glmeeg_wrote_them_are_not_replaced(design, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    for name in ("report.html", "b-vs-a/points.csv"):
        original = (out / name).read_bytes()
        (out / name).write_bytes(original + b"my edit\n")
        assert_one_line_error(invoke("run", design, "--out", out, "-q"), [name, "changed since glmeeg wrote it"])
        assert (out / name).read_bytes() == original + b"my edit\n"
        (out / name).write_bytes(original)
    # A list that claims a file of the user's, without its digest, does not make it glmeeg's.
    doc = json.loads((out / "run.json").read_text())
    (out / "thesis.docx").write_text("work")
    (out / "run.json").write_text(json.dumps({**doc, "files": {**doc["files"], "thesis.docx": "0" * 64}}))
    assert_one_line_error(invoke("run", design, "--out", out, "-q"), ["thesis.docx"])
    assert (out / "thesis.docx").read_text() == "work"


@pytest.mark.slow  # runs with their reports
def test_odd_output_paths_are_one_line_before_any_fitting(design, tmp_path, monkeypatch):
    loop = tmp_path / "loop"
    loop.symlink_to(tmp_path / "loop2")
    (tmp_path / "loop2").symlink_to(loop)
    assert_one_line_error(invoke("run", design, "--out", loop, "-q"), ["loop"])
    assert_one_line_error(invoke("run", design, "--out", tmp_path / ("n" * 300), "-q"), ["too long"])
    assert invoke("run", design, "--out", tmp_path / ("n" * 250), "-q").exit_code == 0  # temporary names fit
    fifo = tmp_path / "pipe.html"
    os.mkfifo(fifo)
    out = tmp_path / "out"
    assert invoke("run", design, "--out", out, "-q").exit_code == 0
    assert_one_line_error(invoke("report", out, "--out", fifo), ["pipe.html", "not a regular file"])
    assert_one_line_error(invoke("schema", "--out", fifo), ["pipe.html", "not a regular file"])
    here = tmp_path / "here"
    here.mkdir()
    monkeypatch.chdir(here)
    assert invoke("run", design, "--out", ".", "-q").exit_code == 0  # '.' by its real name
    assert (here / "run.json").is_file() and hidden_beside(here) == []
    # The run replaced the working folder (as `cd .` would show in a shell): after changing
    # into it again, '.' is the earlier result and is replaced again.
    assert_one_line_error(invoke("run", design, "--out", ".", "-q"), ["working folder no longer exists"])
    monkeypatch.chdir(here)
    assert invoke("run", design, "--out", ".", "-q").exit_code == 0


@pytest.mark.slow  # the demo's analysis
def test_demo_files_edited_by_the_user_are_not_replaced(tmp_path):
    demo = tmp_path / "d"
    assert invoke("demo", demo, "--subjects", "4", "-q").exit_code == 0
    (demo / "design.toml").write_text((demo / "design.toml").read_text() + "# my change\n")
    assert_one_line_error(invoke("demo", demo, "--subjects", "4", "-q"), ["design.toml", "changed since"])
    assert (demo / "design.toml").read_text().endswith("# my change\n")
