"""HTML report: self-contained, every figure embedded as a valid PNG, failures become notes."""

from __future__ import annotations

import base64
import re
import struct

import pytest

import glmeeg
from glmeeg.testing import write_study
from glmeeg.report import render_report

TESTS = '''
[[test]]
name = "cl"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
seed = 2
'''


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    design = write_study(tmp_path_factory.mktemp("rep") / "s", effect=1.5, seed=3, n_subjects=14,
                         n_channels=8, n_times=20, tests=TESTS)
    return glmeeg.run_analysis(design)


def _png_size(data: bytes) -> tuple[int, int]:
    # PNG signature, then the IHDR chunk: width and height as big-endian 32-bit integers
    # (PNG specification, ISO/IEC 15948, section 11.2.2).
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def test_report_embeds_every_figure_and_lists_the_planted_cluster(run):
    page = render_report(run)
    assert page.startswith("<!DOCTYPE html>") and "<script" not in page
    assert not re.search(r'(src|href)="(https?:)?//', page)      # nothing remote
    images = re.findall(r'<img alt="[^"]*" src="data:image/png;base64,([^"]+)"', page)
    assert len(images) >= 3                       # statistic image, time courses, group design
    for b64 in images:
        w, h = _png_size(base64.b64decode(b64))
        assert w > 100 and h > 100
    assert "could not be drawn" not in page
    # The planted effect sits at channel Cz (index 1 of the study), samples 2-4.
    table = page.split("<h3>Clusters and regions</h3>")[1].split("</table>")[0]
    assert "Cz" in table
    for fragment in ("Methods", "glmeeg", "research software", "onset"):
        assert fragment in page


def test_a_figure_that_cannot_be_drawn_becomes_a_note(run, monkeypatch):
    import glmeeg.report.figures as figures

    def broken(*args, **kwargs):
        raise RuntimeError("no positions for this figure")

    monkeypatch.setattr(figures, "statistic_image", broken)
    page = render_report(run)
    assert "could not be drawn: no positions for this figure" in page
    assert len(re.findall(r"<img ", page)) >= 2            # the other figures are still there
    assert "<h3>Clusters and regions</h3>" in page


@pytest.mark.slow  # runs with their reports
def test_run_writes_the_report_and_report_rewrites_it(tmp_path):
    from typer.testing import CliRunner

    from glmeeg.cli import app

    design = write_study(tmp_path / "s", effect=1.5, seed=4, n_subjects=10, tests=TESTS)
    runner = CliRunner()
    out = tmp_path / "out"
    assert runner.invoke(app, ["run", str(design), "--out", str(out), "-q"]).exit_code == 0
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "<h2>Methods</h2>" in page and "data:image/png;base64," in page
    assert 'alt="subject-level design of s01' in page
    back = glmeeg.results.load_run_folder(out)
    assert back.example_design_subject == "s01" and back.example_design.shape == (30, 4)
    (out / "report.html").unlink()
    result = runner.invoke(app, ["report", str(out)])
    assert result.exit_code == 0, result.output
    assert (out / "report.html").read_text(encoding="utf-8").count("<img ") == page.count("<img ")
    bare = tmp_path / "bare"
    assert runner.invoke(app, ["run", str(design), "--out", str(bare), "-q", "--no-report"]).exit_code == 0
    assert not (bare / "report.html").exists() and (bare / "run.json").is_file()


def test_report_of_a_folder_that_is_no_run_is_a_one_line_error(tmp_path):
    from typer.testing import CliRunner

    from glmeeg.cli import app

    result = CliRunner().invoke(app, ["report", str(tmp_path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "run.json" in lines[0] and "Traceback" not in result.output
    assert not (tmp_path / "report.html").exists()
