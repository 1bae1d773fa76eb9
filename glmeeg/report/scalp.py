"""Scalp maps: the statistic at one time (and frequency) drawn over the head, sensors placed by
their positions (azimuthal equidistant projection from the vertex), significant sensors marked.

The look of the sensors is glmeeg's own: a sensor with a significant point at the time (or in
the window) shown is a black diamond with a white rim, readable on the red-white-blue map of t
and on viridis of F; every other sensor is a small open dark-grey ring with a faint white halo.
The footnote says so. The styles and the footnote's text are
:data:`glmeeg.report.plotting.SIGNIFICANT_SENSOR`, ``OTHER_SENSOR`` (with
``OTHER_SENSOR_HALO``) and ``SCALP_FOOTNOTE``; the two sets of markers carry the labels
``"significant"`` and ``"not significant"``, for a legend.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..errors import GlmeegError

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.axes import Axes as PlotAxes
    from matplotlib.figure import Figure

    from ..results import TestResult

from .plotting import (OTHER_SENSOR, OTHER_SENSOR_HALO, SCALP_FOOTNOTE, SIGNIFICANT_SENSOR,
                       add_footnote, as_result, at_frequency, colormap, frequency_index, new_figure,
                       statistic_label, statistic_style)


def _disc_coordinates(positions: np.ndarray) -> np.ndarray:
    """Azimuthal equidistant projection from the vertex: the angle from the vertex becomes the
    distance from the centre (1 at 90 degrees), the azimuth is kept; +y (front) points up."""
    p = positions / np.linalg.norm(positions, axis=1, keepdims=True)
    theta = np.arccos(np.clip(p[:, 2], -1.0, 1.0)) / (np.pi / 2)
    azimuth = np.arctan2(p[:, 1], p[:, 0])
    return np.column_stack([theta * np.cos(azimuth), theta * np.sin(azimuth)])


def scalp_map(result: "TestResult | str | Path", *, time: float | None = None,
              window: tuple[float, float] | None = None, frequency: float | None = None,
              positions: np.ndarray | None = None, ax: "PlotAxes | None" = None,
              size: tuple[float, float] = (5.0, 4.6), title: str | None = None,
              footnote: bool = True) -> "Figure":
    """The statistic over the scalp at one time (or averaged over a window), on a head outline.

    Parameters
    ----------
    result : TestResult or path
    time : float, optional
        Time in seconds (the nearest sample). Default: the time of the largest |statistic|.
    window : (float, float), optional
        Average the statistic over samples in ``[start, stop]`` seconds instead of one time.
    frequency : float, optional
        Time-frequency results only (required there).
    positions : numpy.ndarray, optional
        ``(n_channels, 3)`` sensor positions in the result's channel order (x right, y front,
        z up). Default: the standard 10-10 positions of the channel names.
    ax, size, title, footnote
        As for :func:`statistic_image`.

    Raises
    ------
    GlmeegError
        No positions for some channel, fewer than 4 channels, both or neither-valid ``time``
        and ``window``, a window holding no sample.

    Notes
    -----
    Positions are projected from the vertex keeping angles as distances (azimuthal
    equidistant; the 90-degree ring at radius 1, nose up) and the values interpolated by a
    thin-plate spline (scipy's RBFInterpolator) inside the head outline. Sensors where some
    point of the shown time(s) is significant are drawn as black diamonds with a white rim,
    the others as small open grey rings (see the module docstring). An interpolated map shows
    the sensors' values smoothly; it is not a source estimate.
    """
    import scipy.interpolate

    result = as_result(result)
    fi = frequency_index(result, frequency)
    names = list(result.axes.channels)
    if len(names) < 4:
        raise GlmeegError(f"scalp map: {len(names)} channels; at least 4 are needed to interpolate")
    positions = _positions(names, positions)
    stat = at_frequency(result.map("statistic"), fi)
    sig = at_frequency(result.map("significant"), fi).astype(bool)
    times = np.asarray(result.axes.times)
    cols, when = _time_columns(stat, times, time=time, window=window)
    with np.errstate(all="ignore"):
        values = np.nanmean(stat[:, cols], axis=1)
    marked = sig[:, cols].any(axis=1)
    xy = _disc_coordinates(positions)
    radius = max(1.0, float(np.max(np.hypot(xy[:, 0], xy[:, 1]))) * 1.05)
    fig, ax = new_figure(ax, size)
    style = statistic_style(result, values)
    ok = np.isfinite(values)
    grid = np.linspace(-radius, radius, 121)
    gx, gy = np.meshgrid(grid, grid)
    inside = np.hypot(gx, gy) <= radius
    image = np.full(gx.shape, np.nan)
    span = np.linalg.matrix_rank(np.column_stack([xy[ok], np.ones(int(ok.sum()))]), tol=1e-6)
    if ok.sum() >= 4 and span < 3:
        raise GlmeegError("scalp map: the sensor positions do not span the scalp (all on one line); "
                          "a map cannot be interpolated")
    if ok.sum() >= 4:
        try:
            spline = scipy.interpolate.RBFInterpolator(xy[ok], values[ok], kernel="thin_plate_spline")
        except (np.linalg.LinAlgError, ValueError):
            raise GlmeegError("scalp map: the sensor positions do not span the scalp (all on one "
                              "line?); a map cannot be interpolated") from None
        image[inside] = spline(np.column_stack([gx[inside], gy[inside]]))
    outside_clear = colormap(style["cmap"], bad=(0.0, 0.0, 0.0, 0.0))  # off the head: nothing
    mesh = ax.pcolormesh(gx, gy, np.ma.masked_invalid(image), cmap=outside_clear,
                         vmin=style["vmin"], vmax=style["vmax"], shading="auto")
    _head(ax, radius)
    if (~marked).any():
        from matplotlib import patheffects

        rings = ax.scatter(xy[~marked, 0], xy[~marked, 1], **OTHER_SENSOR)
        rings.set_path_effects([patheffects.withStroke(**OTHER_SENSOR_HALO)])
    if marked.any():
        ax.scatter(xy[marked, 0], xy[marked, 1], **SIGNIFICANT_SENSOR)
    ax.set_aspect("equal")
    ax.set_xlim(-1.2 * radius, 1.2 * radius)
    ax.set_ylim(-1.15 * radius, 1.2 * radius)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_xlabel("left - right")
    ax.set_ylabel("back - front")
    bar = fig.colorbar(mesh, ax=ax, shrink=0.8)
    bar.set_label(statistic_label(result))
    at = f", {result.axes.frequencies[fi]:g} Hz" if fi is not None else ""
    ax.set_title(title if title is not None else f"{result.name}: {result.kind} at {when}{at}",
                 fontsize="medium")
    if footnote:
        add_footnote(fig, SCALP_FOOTNOTE)
    return fig


def _positions(names: list[str], positions) -> np.ndarray:
    """The sensors' positions: given, or the 10-10 positions of their names; checked."""
    if positions is None:
        from ..sensors.positions import standard_positions

        positions = standard_positions(names)
        missing = [n for n, p in zip(names, positions) if not np.isfinite(p).all()]
        if missing:
            raise GlmeegError(f"scalp map: no position for channel(s) {', '.join(missing[:5])} (not "
                              "10-10 names); pass positions=")
    positions = np.asarray(positions, dtype=np.float64)
    if positions.shape != (len(names), 3) or not np.isfinite(positions).all():
        raise GlmeegError(f"scalp map: positions must be ({len(names)}, 3) finite values; got "
                          f"shape {positions.shape}")
    return positions


def _time_columns(stat: np.ndarray, times: np.ndarray, *, time, window) -> tuple[np.ndarray, str]:
    """The samples the map shows (one time, the peak's, or a window) and their label."""
    if time is not None and window is not None:
        raise GlmeegError("scalp map: give time or window, not both")
    if window is not None:
        cols = np.flatnonzero((times >= window[0]) & (times <= window[1]))
        if cols.size == 0:
            raise GlmeegError(f"scalp map: window {window[0]:g}-{window[1]:g} s holds no sample "
                              f"(times {times[0]:g} to {times[-1]:g} s)")
        return cols, f"{1000 * window[0]:.0f}-{1000 * window[1]:.0f} ms"
    if time is None:
        filled = np.nan_to_num(np.abs(stat), nan=-1.0)
        col = int(np.unravel_index(np.argmax(filled), filled.shape)[1])
    else:
        col = int(np.argmin(np.abs(times - time)))
    return np.array([col]), f"{1000 * times[col]:.0f} ms"


def _head(ax, radius: float) -> None:
    """The head's outline, nose and ears."""
    angle = np.linspace(0, 2 * np.pi, 200)
    ax.plot(radius * np.cos(angle), radius * np.sin(angle), color="0.15", lw=1.5)
    ax.plot([-0.09 * radius, 0.0, 0.09 * radius], [0.995 * radius, 1.09 * radius, 0.995 * radius],
            color="0.15", lw=1.5)                                    # nose
    for side in (-1, 1):                                             # ears
        ax.plot(side * radius * (1 + 0.04 * np.sin(np.linspace(0, np.pi, 20))),
                radius * 0.16 * np.cos(np.linspace(0, np.pi, 20)), color="0.15", lw=1.5)
