"""Figures: each is rendered to PNG, read back and checked for size, labels and content.

Results come from small synthetic studies run through the whole pipeline (glmeeg.testing.write_study),
with an effect planted at channel Cz (index 1), samples 2-4.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib")
from matplotlib.image import imread  # noqa: E402

import glmeeg  # noqa: E402
from glmeeg.report import figures, plotting  # noqa: E402
from glmeeg.errors import GlmeegError  # noqa: E402

from glmeeg.testing import HANG_TIMEOUT, write_study  # noqa: E402

DPI = 80
TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"

[[test]]
name = "condition"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "fdr"
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    design = write_study(tmp_path_factory.mktemp("study"), effect=1.5, seed=1, tests=TESTS)
    return glmeeg.run_analysis(design)


@pytest.fixture(scope="module")
def tf_result(tmp_path_factory):
    design = write_study(tmp_path_factory.mktemp("tf"), effect=1.5, seed=1, n_freqs=3,
                         extra_data="frequencies = [4.0, 8.0, 12.0]")
    return glmeeg.run_analysis(design).test("b-vs-a")


def render(fig, tmp_path: Path, name: str = "figure.png") -> np.ndarray:
    """Save at DPI, read back, check it is not blank and has the figure's size in pixels."""
    path = tmp_path / name
    fig.savefig(path, dpi=DPI)
    image = imread(path)
    width, height = fig.get_size_inches()
    assert image.shape[:2] == (round(height * DPI), round(width * DPI))
    assert image[..., :3].std() > 0.02
    return image


def main_axes(fig):
    """The plotting axes (not the colour bar)."""
    return fig.axes[0]


def outline_segments(ax) -> int:
    return sum(len(c.get_segments()) for c in ax.collections if c.get_gid() == "significance-outline")


def test_statistic_image(run, tmp_path):
    result = run.test("b-vs-a")
    assert result.n_significant > 0
    fig = figures.statistic_image(result, size=(6, 4))
    render(fig, tmp_path)
    ax = main_axes(fig)
    assert ax.get_xlabel() == "time (ms)"
    assert ax.get_ylabel() == "channel (front to back)"
    assert [t.get_text() for t in ax.get_yticklabels()] == ["Fz", "Cz", "Pz", "Oz"]
    assert fig.axes[1].get_ylabel().startswith("t")
    # Each significant cell adds up to 4 edges; a solid block of them has at least 4.
    assert outline_segments(ax) >= 4
    mesh = ax.collections[0]
    assert mesh.cmap.name.startswith("RdBu_r")
    assert mesh.norm.vmin == -mesh.norm.vmax
    # Times are shown in ms: the first sample is at -100 ms.
    assert ax.get_xlim()[0] < -99


def test_statistic_image_f_test_and_saved_result(run, tmp_path):
    glmeeg.write_run(run, tmp_path / "out")
    folder = next(p.parent for p in (tmp_path / "out").rglob("result.npz")
                  if glmeeg.load_result(p).name == "condition")
    fig = figures.statistic_image(folder)
    render(fig, tmp_path)
    mesh = main_axes(fig).collections[0]
    assert mesh.cmap.name.startswith("viridis") and mesh.norm.vmin == 0
    assert fig.axes[1].get_ylabel().startswith("F")


def test_statistic_image_no_outline_when_nothing_significant(tmp_path):
    design = write_study(tmp_path / "null", seed=3, n_channels=2, n_times=4, n_subjects=6,
                         n_trials=12)
    result = glmeeg.run_analysis(design).test("b-vs-a")
    if result.n_significant:  # pragma: no cover - the seed gives none
        pytest.skip("something significant by chance")
    fig = figures.statistic_image(result)
    render(fig, tmp_path)
    assert outline_segments(main_axes(fig)) == 0


def test_estimate_time_courses(run, tmp_path):
    result = run.test("b-vs-a")
    fig = figures.estimate_time_courses(result, size=(6, 3.5))
    render(fig, tmp_path)
    ax = main_axes(fig)
    lines = [ln for ln in ax.get_lines() if ln.get_gid() == "channel-line"]
    assert len(lines) == len(result.axes.channels)
    assert {ln.get_label() for ln in lines} == set(result.axes.channels)
    assert ax.get_xlabel() == "time (ms)"
    assert ax.get_ylabel().startswith("estimate")
    spans = [p for p in ax.patches if p.get_gid() == "significant-span"]
    assert spans
    # The span covers the planted samples 2-4 (-80 to -60 ms), half-way to the neighbours.
    x0, x1 = spans[0].get_x(), spans[0].get_x() + spans[0].get_width()
    assert x0 == pytest.approx(-85.0) and x1 == pytest.approx(-55.0)


def test_estimate_time_courses_rows(run, tmp_path):
    result = run.test("condition")
    fig = figures.estimate_time_courses(result, row=1)
    render(fig, tmp_path)
    assert result.estimate_labels[1] in main_axes(fig).get_ylabel()
    with pytest.raises(GlmeegError, match="row"):
        figures.estimate_time_courses(result, row="nope")
    with pytest.raises(GlmeegError, match="row"):
        figures.estimate_time_courses(result, row=5)


def test_frequency_time_image(tf_result, tmp_path):
    fig = figures.frequency_time_image(tf_result, channel="Cz")
    render(fig, tmp_path)
    ax = main_axes(fig)
    assert ax.get_xlabel() == "time (ms)"
    assert ax.get_ylabel() == "frequency (Hz)"
    assert outline_segments(ax) >= 4
    # Cells run half-way between the frequencies 4, 8, 12 Hz.
    assert ax.get_ylim() == pytest.approx((2.0, 14.0))


def test_frequency_time_image_errors(run, tf_result):
    with pytest.raises(GlmeegError, match="no frequency axis"):
        figures.frequency_time_image(run.test("b-vs-a"), channel="Cz")
    with pytest.raises(GlmeegError, match="'T9' is not in"):
        figures.frequency_time_image(tf_result, channel="T9")


def test_statistic_image_time_frequency_needs_a_frequency(tf_result, tmp_path):
    with pytest.raises(GlmeegError, match="frequency="):
        figures.statistic_image(tf_result)
    with pytest.raises(GlmeegError, match="not in the result"):
        figures.statistic_image(tf_result, frequency=5.0)
    fig = figures.statistic_image(tf_result, frequency=8.0)
    render(fig, tmp_path)
    assert "8 Hz" in main_axes(fig).get_title()


def test_design_image(tmp_path):
    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(20), np.arange(20) % 2, rng.normal(50, 10, 20)])
    names = ["Intercept", "condition[T.b]", "intensity"]
    fig = figures.design_image(x, names, title="Subject s01")
    render(fig, tmp_path)
    ax = main_axes(fig)
    assert [t.get_text() for t in ax.get_xticklabels()] == names
    assert ax.get_xlabel() and ax.get_ylabel()
    assert ax.get_title() == "Subject s01"
    with pytest.raises(GlmeegError, match="2 names for 3 columns"):
        figures.design_image(x, names[:2])
    with pytest.raises(GlmeegError, match="2-D"):
        figures.design_image(np.ones(3), ["a"])


def test_power_curve_figure(tmp_path):
    curve = glmeeg.power_curve(design="paired", effect_size=0.5, n_values=range(5, 61, 5))
    fig = figures.power_curve_figure(curve, target=0.8)
    render(fig, tmp_path)
    ax = main_axes(fig)
    assert ax.get_xlabel().startswith("n") and ax.get_ylabel() == "power"
    gids = {ln.get_gid(): ln for ln in ax.get_lines()}
    assert list(gids["target-line"].get_ydata()) == [0.8, 0.8]
    assert len(gids["power-curve"].get_xdata()) == len(curve)
    # Paired, dz = 0.5, two-sided alpha 0.05: n = 34 is the first whole n with power 0.8,
    # so on this grid 35 is the first value reaching it.
    assert gids["target-n"].get_xdata()[0] == 35
    with pytest.raises(GlmeegError, match="columns 'n' and 'power'"):
        figures.power_curve_figure(curve.rename(columns={"power": "p"}))
    with pytest.raises(GlmeegError, match="target"):
        figures.power_curve_figure(curve, target=1.5)


def test_draws_into_given_axes(run, tmp_path):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8, 3))
    left, right = fig.subplots(1, 2)
    assert figures.statistic_image(run.test("b-vs-a"), ax=left, footnote=False) is fig
    assert figures.estimate_time_courses(run.test("b-vs-a"), ax=right, footnote=False) is fig
    render(fig, tmp_path)


def test_command_line_does_not_import_matplotlib():
    code = "import sys, glmeeg, glmeeg.cli; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         timeout=HANG_TIMEOUT)
    assert out.stdout.strip() == "False"


@pytest.fixture(scope="module")
def scalp_result(tmp_path_factory):
    design = write_study(tmp_path_factory.mktemp("scalp"), effect=2.0, seed=5, n_channels=8,
                         n_subjects=12, tests=TESTS)
    return glmeeg.run_analysis(design).test("b-vs-a")


def test_scalp_map_peaks_at_the_planted_channel(scalp_result, tmp_path):
    from matplotlib.markers import MarkerStyle

    from glmeeg.sensors import standard_position

    t = scalp_result
    assert t.map("significant")[1].any()                 # the effect: Cz, samples 2-4
    fig = figures.scalp_map(t, time=float(t.axes.times[3]), size=(5, 4.6))
    render(fig, tmp_path)
    ax = main_axes(fig)
    assert ax.get_xlabel() == "left - right" and ax.get_ylabel() == "back - front"
    assert fig.axes[1].get_ylabel().startswith("t")
    mesh = ax.collections[0]
    image = np.ma.masked_invalid(mesh.get_array()).reshape(121, 121)
    iy, ix = np.unravel_index(np.ma.argmax(image), image.shape)
    # Cz is the vertex: projected to the centre of the disc (azimuthal equidistant). The
    # interpolated maximum lies at the planted channel's position, within a quarter radius.
    assert np.allclose(standard_position("Cz"), [0, 0, 1], atol=1e-6)
    radius = max(abs(ax.get_xlim()[0]) / 1.2, 1.0)
    centre = np.hypot(*(np.array([ix, iy]) / 120 * 2 * radius - radius))
    assert centre < 0.25 * radius
    # The significant sensor (one: Cz) is a black diamond with a white rim, the other seven open
    # dark-grey rings with a light halo (glmeeg's own look; plotting's module docstring).
    marks = {c.get_label(): c for c in ax.collections
             if c.get_label() in ("significant", "not significant")}
    diamonds, rings = marks["significant"], marks["not significant"]
    assert diamonds.get_gid() == "significant-sensors" and rings.get_gid() == "other-sensors"
    assert np.allclose(diamonds.get_offsets(), [[0.0, 0.0]], atol=1e-9)   # Cz, at the centre
    assert len(rings.get_offsets()) == 7
    diamond = MarkerStyle("D")
    ring = MarkerStyle("o")
    assert np.array_equal(diamonds.get_paths()[0].vertices,
                          diamond.get_path().transformed(diamond.get_transform()).vertices)
    assert np.array_equal(rings.get_paths()[0].vertices,
                          ring.get_path().transformed(ring.get_transform()).vertices)
    assert np.allclose(diamonds.get_facecolor(), [[0, 0, 0, 1]])          # black
    assert np.allclose(diamonds.get_edgecolor(), [[1, 1, 1, 1]])          # white rim
    assert diamonds.get_sizes()[0] > 2 * rings.get_sizes()[0]
    assert len(rings.get_facecolor()) == 0 or np.allclose(rings.get_facecolor()[:, 3], 0)  # open
    assert np.allclose(rings.get_edgecolor(), [[0.2, 0.2, 0.2, 1]])       # dark grey
    assert rings.get_path_effects() and diamonds.get_zorder() > rings.get_zorder()
    footnote = [t for t in fig.texts if t.get_gid() == "footnote"]
    assert [t.get_text() for t in footnote] == [plotting.SCALP_FOOTNOTE]
    assert "Black diamonds: significant sensors; rings: the others" in plotting.SCALP_FOOTNOTE
    # The footnote fits the figure's width.
    assert footnote[0].get_window_extent().x1 <= fig.bbox.width


def test_scalp_map_window_and_errors(scalp_result, run, tmp_path):
    t = scalp_result
    fig = figures.scalp_map(t, window=(float(t.axes.times[2]), float(t.axes.times[4])))
    render(fig, tmp_path)
    assert " ms" in main_axes(fig).get_title()
    with pytest.raises(GlmeegError, match="not both"):
        figures.scalp_map(t, time=0.0, window=(0.0, 0.01))
    with pytest.raises(GlmeegError, match="holds no sample"):
        figures.scalp_map(t, window=(5.0, 6.0))
    with pytest.raises(GlmeegError, match="one line"):    # Fz, Cz, Pz, Oz: the midline only
        figures.scalp_map(run.test("b-vs-a"))
