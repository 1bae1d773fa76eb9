"""What every figure shares: the colour maps and their conventions, outlines of significant
points, channel order and ticks, the footnote, and reading a result given as a path.

Colours
-------
Signed t maps use the diverging map ``"RdBu_r"`` (ColorBrewer red-blue, readable with the
common colour-vision deficiencies) centred at 0 with a symmetric range: positive t is red,
negative t blue, zero white. F maps (never negative) use ``"viridis"``, perceptually uniform and
colour-blind safe, from 0. Points whose statistic is not finite are drawn grey. Significant
points are outlined in black. Time courses of several channels take colours from ``"viridis"``
in front-to-back channel order.

Sensors on scalp maps
---------------------
A sensor with a significant point at the time shown is a black diamond with a white rim
(``SIGNIFICANT_SENSOR``): black stands out from every colour of ``"RdBu_r"`` and ``"viridis"``
but their darkest ends (deep blue, deep purple), where the white rim carries it. The other
sensors are small open rings in dark grey with a faint white halo (``OTHER_SENSOR``,
``OTHER_SENSOR_HALO``), drawn beneath: a different shape, no fill, so the two never read alike,
and the map shows through them. The footnote (``SCALP_FOOTNOTE``) says so in words."""

from __future__ import annotations

from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from ..errors import GlmeegError

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.axes import Axes as PlotAxes
    from matplotlib.figure import Figure

    from ..results import TestResult



FOOTNOTE = "Outlined or shaded: significant points; these do not establish exact onset or extent."


# Keyword arguments of ``Axes.scatter`` for the sensors of a scalp map (see the module docstring).
SIGNIFICANT_SENSOR = MappingProxyType({"marker": "D", "s": 40.0, "facecolors": "black",
                                       "edgecolors": "white", "linewidths": 1.0, "zorder": 4,
                                       "label": "significant", "gid": "significant-sensors"})
OTHER_SENSOR = MappingProxyType({"marker": "o", "s": 14.0, "facecolors": "none",
                                 "edgecolors": "0.2", "linewidths": 0.8, "zorder": 3,
                                 "label": "not significant", "gid": "other-sensors"})
# A thin light halo under the rings (patheffects.withStroke), so they read on the darkest colours.
OTHER_SENSOR_HALO = MappingProxyType({"linewidth": 2.2, "foreground": "white", "alpha": 0.6})


SCALP_FOOTNOTE = ("Black diamonds: significant sensors; rings: the others. Interpolated, not a "
                  "source estimate.")


T_MAP = "RdBu_r"


F_MAP = "viridis"


def new_figure(ax: "PlotAxes | None", size: tuple[float, float]) -> tuple["Figure", "PlotAxes"]:
    """A new Agg figure with one axes, or the figure of ``ax``."""
    if ax is not None:
        return ax.figure, ax
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:  # pragma: no cover - depends on the environment
        raise GlmeegError("figures need matplotlib: pip install 'glmeeg[plots]'") from None
    w, h = (float(v) for v in size)
    if not (w > 0 and h > 0):
        raise GlmeegError(f"size: expected (width, height) in inches, both > 0, got {size!r}")
    fig = Figure(figsize=(w, h), layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def as_result(result: "TestResult | str | Path") -> "TestResult":
    if isinstance(result, (str, Path)):
        from ..results import load_result

        return load_result(result)
    return result


def cell_edges(centres: np.ndarray) -> np.ndarray:
    """Cell edges around (possibly uneven) centres; a single centre gets width 1."""
    c = np.asarray(centres, dtype=float)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = (c[1:] + c[:-1]) / 2.0
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def outline_significant(ax: "PlotAxes", mask: np.ndarray, x_edges: np.ndarray, y_edges: np.ndarray) -> Any:
    """Draw the boundary of the ``True`` cells of ``mask`` (rows along y, columns along x)."""
    from matplotlib.collections import LineCollection

    m = np.pad(np.asarray(mask, dtype=bool), 1)
    segments = []
    rows, cols = np.nonzero(m[1:-1, 1:-1])
    for r, c in zip(rows, cols):
        x0, x1, y0, y1 = x_edges[c], x_edges[c + 1], y_edges[r], y_edges[r + 1]
        if not m[r, c + 1]:
            segments.append([(x0, y0), (x1, y0)])
        if not m[r + 2, c + 1]:
            segments.append([(x0, y1), (x1, y1)])
        if not m[r + 1, c]:
            segments.append([(x0, y0), (x0, y1)])
        if not m[r + 1, c + 2]:
            segments.append([(x1, y0), (x1, y1)])
    lines = LineCollection(segments, colors="black", linewidths=1.2, gid="significance-outline")
    ax.add_collection(lines)
    return lines


def statistic_style(result: "TestResult", values: np.ndarray) -> dict:
    finite = values[np.isfinite(values)]
    top = float(np.max(np.abs(finite))) if finite.size else 1.0
    top = top if top > 0 else 1.0
    if result.kind == "t":
        return {"cmap": T_MAP, "vmin": -top, "vmax": top}
    return {"cmap": F_MAP, "vmin": 0.0, "vmax": top}


def statistic_label(result: "TestResult") -> str:
    df1, df2 = result.df
    if result.kind == "t":
        return f"t ({df2:g} df)"
    return f"F ({df1:g}, {df2:g} df)"


def colormap(name: str, *, bad: Any = "0.75"):
    """The colour map ``name`` with non-finite values drawn in ``bad`` (grey by default)."""
    import matplotlib

    return matplotlib.colormaps[name].with_extremes(bad=bad)


def frequency_index(result: "TestResult", frequency: float | None) -> int | None:
    freqs = result.axes.frequencies
    if freqs is None:
        if frequency is not None:
            raise GlmeegError(f"frequency: result {result.name!r} has no frequency axis, got "
                              f"frequency={frequency:g}")
        return None
    if frequency is None:
        raise GlmeegError(f"frequency: result {result.name!r} has a frequency axis "
                          f"({', '.join(f'{f:g}' for f in freqs)} Hz); choose one with "
                          "frequency=..., or use frequency_time_image for one channel")
    i = int(np.argmin(np.abs(np.asarray(freqs) - float(frequency))))
    if not np.isclose(freqs[i], float(frequency)):
        raise GlmeegError(f"frequency: {frequency:g} Hz is not in the result; frequencies: "
                          f"{', '.join(f'{f:g}' for f in freqs)}")
    return i


def at_frequency(a: np.ndarray, index: int | None) -> np.ndarray:
    """Take one frequency of a (..., channel, [frequency,] time) map."""
    return a if index is None else a[..., index, :]


def channel_order(channels: Sequence[str]) -> tuple[np.ndarray, bool]:
    """Order of channels from front to back of the head.

    Parameters
    ----------
    channels : sequence of str
        Channel names.

    Returns
    -------
    order : numpy.ndarray of int
        Indices into ``channels``: channels with a standard 10-10 position sorted by their
        front-back coordinate (front first; ties keep file order), then the others in file
        order.
    by_position : bool
        True when at least one channel has a standard position.

    Examples
    --------
    >>> channel_order(["Pz", "Fz", "EXG1", "Cz"])
    (array([1, 3, 0, 2]), True)
    """
    from ..sensors.positions import standard_positions

    y = standard_positions(list(channels))[:, 1]
    known = np.flatnonzero(np.isfinite(y))
    unknown = np.flatnonzero(~np.isfinite(y))
    known = known[np.argsort(-y[known], kind="stable")]
    return np.concatenate([known, unknown]).astype(int), bool(known.size)


def channel_ticks(ax: "PlotAxes", names: Sequence[str], *, max_labels: int = 40) -> None:
    step = max(1, int(np.ceil(len(names) / max_labels)))
    ticks = np.arange(0, len(names), step)
    ax.set_yticks(ticks, [names[i] for i in ticks])


def add_footnote(fig: "Figure", text: str) -> None:
    """A small line of text along the bottom, with room kept for it by the layout."""
    engine = fig.get_layout_engine()
    height = fig.get_figheight()
    room = min(0.22 / height, 0.2) if height > 0 else 0.05
    if engine is not None and hasattr(engine, "set"):
        try:
            engine.set(rect=(0.0, room, 1.0, 1.0 - room))
        except TypeError:  # pragma: no cover - a layout engine without rect
            pass
    fig.text(0.01, room * 0.2, text, fontsize="x-small", color="0.3", ha="left", va="bottom",
             gid="footnote")
