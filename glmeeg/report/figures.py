"""Figures of results, designs and power curves (needs matplotlib: ``pip install 'glmeeg[plots]'``).

Every function returns a :class:`matplotlib.figure.Figure` drawn with the non-interactive Agg
canvas; save it with ``fig.savefig("map.png", dpi=150)``. Functions that draw one panel also take
an ``ax`` to draw into, in which case the figure returned is ``ax.figure``. matplotlib is
imported inside the functions, so importing glmeeg (or running its command line) never needs it.

Colours
-------
Signed t maps use the diverging map ``"RdBu_r"`` (ColorBrewer red-blue, readable with the
common colour-vision deficiencies) centred at 0 with a symmetric range: positive t is red,
negative t blue, zero white. F maps (never negative) use ``"viridis"``, perceptually uniform and
colour-blind safe, from 0. Points whose statistic is not finite are drawn grey. Significant
points are outlined in black. Time courses of several channels take colours from ``"viridis"``
in front-to-back channel order.

Significant points are where the test rejects the null hypothesis under the chosen error
control; they do not establish the exact onset, offset or extent of an effect, and the figures
say so in a footnote.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from ..errors import GlmeegError

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd
    from matplotlib.axes import Axes as PlotAxes
    from matplotlib.figure import Figure

    from ..results import TestResult

__all__ = ["statistic_image", "estimate_time_courses", "frequency_time_image", "design_image",
           "power_curve_figure", "channel_order", "scalp_map"]

FOOTNOTE = "Outlined or shaded: significant points; these do not establish exact onset or extent."
_T_MAP = "RdBu_r"
_F_MAP = "viridis"


# --------------------------------------------------------------------------- helpers


def _figure(ax: "PlotAxes | None", size: tuple[float, float]) -> tuple["Figure", "PlotAxes"]:
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


def _result(result: "TestResult | str | Path") -> "TestResult":
    if isinstance(result, (str, Path)):
        from ..results import load_result

        return load_result(result)
    return result


def _edges(centres: np.ndarray) -> np.ndarray:
    """Cell edges around (possibly uneven) centres; a single centre gets width 1."""
    c = np.asarray(centres, dtype=float)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = (c[1:] + c[:-1]) / 2.0
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def _outline(ax: "PlotAxes", mask: np.ndarray, x_edges: np.ndarray, y_edges: np.ndarray) -> Any:
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


def _statistic_style(result: "TestResult", values: np.ndarray) -> dict:
    finite = values[np.isfinite(values)]
    top = float(np.max(np.abs(finite))) if finite.size else 1.0
    top = top if top > 0 else 1.0
    if result.kind == "t":
        return {"cmap": _T_MAP, "vmin": -top, "vmax": top}
    return {"cmap": _F_MAP, "vmin": 0.0, "vmax": top}


def _statistic_label(result: "TestResult") -> str:
    df1, df2 = result.df
    if result.kind == "t":
        return f"t ({df2:g} df)"
    return f"F ({df1:g}, {df2:g} df)"


def _colormap(name: str, *, bad: Any = "0.75"):
    """The colour map ``name`` with non-finite values drawn in ``bad`` (grey by default)."""
    import matplotlib

    return matplotlib.colormaps[name].with_extremes(bad=bad)


def _frequency_index(result: "TestResult", frequency: float | None) -> int | None:
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


def _at_frequency(a: np.ndarray, index: int | None) -> np.ndarray:
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


def _channel_ticks(ax: "PlotAxes", names: Sequence[str], *, max_labels: int = 40) -> None:
    step = max(1, int(np.ceil(len(names) / max_labels)))
    ticks = np.arange(0, len(names), step)
    ax.set_yticks(ticks, [names[i] for i in ticks])


def _footnote(fig: "Figure", text: str) -> None:
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


# --------------------------------------------------------------------------- result figures


def statistic_image(result: "TestResult | str | Path", *, frequency: float | None = None,
                    ax: "PlotAxes | None" = None, size: tuple[float, float] = (8.0, 5.0),
                    title: str | None = None, footnote: bool = True) -> "Figure":
    """Channel x time image of a test's statistic, significant points outlined.

    Parameters
    ----------
    result : TestResult or path
        A result, or the folder (or ``result.npz``) of a saved one.
    frequency : float, optional
        Time-frequency results only (required there): the frequency (Hz) to show.
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; by default a new figure of ``size`` is made.
    size : (float, float), default (8.0, 5.0)
        Width and height of a new figure, in inches.
    title : str, optional
        Default: the test's name, kind and correction.
    footnote : bool, default True
        Add a line saying that significant points do not establish onset or extent.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    GlmeegError
        ``frequency`` missing for a time-frequency result, given for one without frequencies,
        or not one of its frequencies.

    Notes
    -----
    Rows are channels from front to back (by the standard 10-10 position of their names;
    channels without one follow in file order; file order when none has one), time runs in
    ms along x. t uses the diverging ``"RdBu_r"`` map centred at 0, F the sequential
    ``"viridis"`` map from 0; non-finite values are grey. The black outline surrounds the
    significant points.
    """
    result = _result(result)
    fi = _frequency_index(result, frequency)
    stat = _at_frequency(result.map("statistic"), fi)
    sig = _at_frequency(result.map("significant"), fi).astype(bool)
    order, by_position = channel_order(result.axes.channels)
    stat, sig = stat[order], sig[order]
    names = [result.axes.channels[i] for i in order]
    times_ms = np.asarray(result.axes.times) * 1000.0
    x_edges, y_edges = _edges(times_ms), np.arange(len(names) + 1) - 0.5

    fig, ax = _figure(ax, size)
    style = _statistic_style(result, stat)
    mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(stat), cmap=_colormap(style["cmap"]),
                         vmin=style["vmin"], vmax=style["vmax"], shading="flat")
    if sig.any():
        _outline(ax, sig, x_edges, y_edges)
    ax.set_ylim(y_edges[-1], y_edges[0])  # front channels at the top
    _channel_ticks(ax, names)
    ax.set_xlabel("time (ms)")
    from ..sensors.positions import standard_positions

    placed = int(np.isfinite(standard_positions(names)[:, 1]).sum())
    ax.set_ylabel("channel (file order)" if not by_position else "channel (front to back)"
                  if placed == len(names) else "channel (front to back, others after)")
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(_statistic_label(result))
    at = f" at {result.axes.frequencies[fi]:g} Hz" if fi is not None else ""
    ax.set_title(title if title is not None else
                 f"{result.name}: {result.kind} statistic{at}, {result.n_significant} significant "
                 f"point{'' if result.n_significant == 1 else 's'} ({result.correction.method})", fontsize="medium")
    if footnote:
        _footnote(fig, FOOTNOTE)
    return fig


def estimate_time_courses(result: "TestResult | str | Path", *, row: int | str = 0,
                          frequency: float | None = None, ax: "PlotAxes | None" = None,
                          size: tuple[float, float] = (8.0, 4.5), title: str | None = None,
                          legend: bool | None = None, footnote: bool = True) -> "Figure":
    """The group estimate over time, one thin line per channel, significant spans shaded.

    Parameters
    ----------
    result : TestResult or path
        A result, or the folder (or ``result.npz``) of a saved one.
    row : int or str, default 0
        Contrast row to draw (F tests have several), by position or by its label.
    frequency : float, optional
        Time-frequency results only (required there): the frequency (Hz) to show.
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; by default a new figure of ``size`` is made.
    size : (float, float), default (8.0, 4.5)
        Width and height of a new figure, in inches.
    title : str, optional
        Default: the test's name and the row's label.
    legend : bool, optional
        Name the channels in a legend; default when there are at most 12 channels.
    footnote : bool, default True
        Add a line saying that significant points do not establish onset or extent.

    Returns
    -------
    matplotlib.figure.Figure
        Channel lines carry the channel name as their label, in front-to-back order.

    Raises
    ------
    GlmeegError
        An unknown ``row``; ``frequency`` as in :func:`statistic_image`.

    Notes
    -----
    Grey bands along the time axis cover every time at which at least one channel is
    significant (each sample widened to half-way to its neighbours).
    """
    result = _result(result)
    labels = list(result.estimate_labels)
    if isinstance(row, str):
        if row not in labels:
            raise GlmeegError(f"row: {row!r} is not a contrast row of {result.name!r}; rows: "
                              f"{', '.join(labels)}")
        row = labels.index(row)
    if not (isinstance(row, (int, np.integer)) and 0 <= row < len(labels)):
        raise GlmeegError(f"row: expected 0 to {len(labels) - 1} or a row label, got {row!r}")
    fi = _frequency_index(result, frequency)
    est = _at_frequency(result.map("estimate")[row], fi)
    sig = _at_frequency(result.map("significant"), fi).astype(bool)
    order, _ = channel_order(result.axes.channels)
    times_ms = np.asarray(result.axes.times) * 1000.0
    x_edges = _edges(times_ms)

    fig, ax = _figure(ax, size)
    import matplotlib

    any_sig = sig.any(axis=0)
    starts = np.flatnonzero(any_sig & ~np.concatenate([[False], any_sig[:-1]]))
    ends = np.flatnonzero(any_sig & ~np.concatenate([any_sig[1:], [False]]))
    for s, e in zip(starts, ends):
        ax.axvspan(x_edges[s], x_edges[e + 1], color="0.85", zorder=0, lw=0, gid="significant-span")
    cmap = matplotlib.colormaps[_F_MAP]
    n = len(order)
    for k, i in enumerate(order):
        ax.plot(times_ms, est[i], lw=0.9, color=cmap(0.9 * k / max(n - 1, 1)),
                label=result.axes.channels[i], gid="channel-line")
    ax.set_xlim(x_edges[0], x_edges[-1])
    ax.set_xlabel("time (ms)")
    ax.set_ylabel(f"estimate: {labels[row]}")
    if legend if legend is not None else n <= 12:
        ax.legend(fontsize="x-small", ncols=1 + (n > 6), frameon=False, loc="best")
    at = f" at {result.axes.frequencies[fi]:g} Hz" if fi is not None else ""
    ax.set_title(title if title is not None else f"{result.name}: group estimate{at}",
                 fontsize="medium")
    if footnote:
        _footnote(fig, FOOTNOTE)
    return fig


def frequency_time_image(result: "TestResult | str | Path", *, channel: str,
                         ax: "PlotAxes | None" = None, size: tuple[float, float] = (7.0, 4.5),
                         title: str | None = None, footnote: bool = True) -> "Figure":
    """Frequency x time image of the statistic at one channel, significant points outlined.

    Parameters
    ----------
    result : TestResult or path
        A time-frequency result (channel x frequency x time), or the folder of a saved one.
    channel : str
        The channel to show.
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; by default a new figure of ``size`` is made.
    size : (float, float), default (7.0, 4.5)
        Width and height of a new figure, in inches.
    title : str, optional
        Default: the test's name and the channel.
    footnote : bool, default True
        Add a line saying that significant points do not establish onset or extent.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    GlmeegError
        The result has no frequency axis, or ``channel`` is not one of its channels.

    Notes
    -----
    Colours as in :func:`statistic_image`; the colour range is that of the channel shown.
    Frequencies need not be evenly spaced: each cell reaches half-way to its neighbours.
    """
    result = _result(result)
    if result.axes.frequencies is None:
        raise GlmeegError(f"result {result.name!r} has no frequency axis (channel x time only); "
                          "use statistic_image")
    channels = list(result.axes.channels)
    if channel not in channels:
        shown = ", ".join(channels[:20]) + (", ..." if len(channels) > 20 else "")
        raise GlmeegError(f"channel: {channel!r} is not in result {result.name!r}; channels: {shown}")
    i = channels.index(channel)
    stat = result.map("statistic")[i]
    sig = result.map("significant")[i].astype(bool)
    freqs = np.asarray(result.axes.frequencies, dtype=float)
    times_ms = np.asarray(result.axes.times) * 1000.0
    x_edges, y_edges = _edges(times_ms), _edges(freqs)

    fig, ax = _figure(ax, size)
    style = _statistic_style(result, stat)
    mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(stat), cmap=_colormap(style["cmap"]),
                         vmin=style["vmin"], vmax=style["vmax"], shading="flat")
    if sig.any():
        _outline(ax, sig, x_edges, y_edges)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("frequency (Hz)")
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(_statistic_label(result))
    ax.set_title(title if title is not None else
                 f"{result.name}: {result.kind} statistic at {channel}", fontsize="medium")
    if footnote:
        _footnote(fig, FOOTNOTE)
    return fig


# --------------------------------------------------------------------------- designs and power


def design_image(matrix: Any, column_names: Sequence[str] | None = None, *,
                 title: str = "Design matrix", row_label: str = "row (trial or subject)",
                 ax: "PlotAxes | None" = None, size: tuple[float, float] | None = None) -> "Figure":
    """A design matrix as an image, one column per regressor, named along x.

    Parameters
    ----------
    matrix : array-like or pandas.DataFrame
        Rows are trials (subject level) or subjects (group level), columns regressors.
    column_names : sequence of str, optional
        One name per column; default the DataFrame's columns, else ``"column 1"``, ...
    title : str, default "Design matrix"
    row_label : str, default "row (trial or subject)"
        The y axis label.
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; by default a new figure of ``size`` is made.
    size : (float, float), optional
        Width and height of a new figure in inches; default grows with the number of columns.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    GlmeegError
        ``matrix`` is not 2-D numbers with at least one row and column, or the number of names
        differs from the number of columns.

    Notes
    -----
    Each column is divided by its largest absolute value so that regressors on different
    scales (an intercept of 1, a covariate near 50) are all visible; the diverging
    ``"RdBu_r"`` map shows -1 blue, 0 white, 1 red. Non-finite entries are grey.
    """
    if column_names is None and hasattr(matrix, "columns"):
        column_names = [str(c) for c in matrix.columns]
    try:
        x = np.asarray(matrix, dtype=float)
    except (TypeError, ValueError):
        raise GlmeegError("matrix: expected a 2-D array of numbers") from None
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise GlmeegError(f"matrix: expected a 2-D array with at least one row and column, got shape "
                          f"{x.shape}")
    if column_names is None:
        column_names = [f"column {k + 1}" for k in range(x.shape[1])]
    column_names = [str(c) for c in column_names]
    if len(column_names) != x.shape[1]:
        raise GlmeegError(f"column_names: {len(column_names)} names for {x.shape[1]} columns")
    scale = np.nanmax(np.where(np.isfinite(x), np.abs(x), np.nan), axis=0) if np.isfinite(x).any() \
        else np.ones(x.shape[1])
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    shown = x / scale

    if size is None:
        size = (min(2.5 + 0.6 * x.shape[1], 14.0), 5.0)
    fig, ax = _figure(ax, size)
    image = ax.imshow(np.ma.masked_invalid(shown), aspect="auto", interpolation="nearest",
                      cmap=_colormap(_T_MAP), vmin=-1.0, vmax=1.0)
    ax.set_xticks(np.arange(x.shape[1]), column_names, rotation=45, ha="right",
                  rotation_mode="anchor")
    ax.yaxis.get_major_locator().set_params(integer=True)
    ax.set_xlabel("regressor")
    ax.set_ylabel(row_label)
    bar = fig.colorbar(image, ax=ax)
    bar.set_label("value / largest |value| of the column")
    ax.set_title(title, fontsize="medium")
    return fig


def power_curve_figure(curve: "pd.DataFrame", *, target: float | None = 0.8,
                       n_label: str = "n (participants)", title: str | None = None,
                       ax: "PlotAxes | None" = None,
                       size: tuple[float, float] = (6.0, 4.0)) -> "Figure":
    """Power against sample size, with the target power marked.

    Parameters
    ----------
    curve : pandas.DataFrame
        The output of :func:`glmeeg.planning.analytic.power_curve`: columns ``n`` and ``power``.
    target : float or None, default 0.8
        Target power, drawn as a dashed horizontal line, in (0, 1); None draws none. The
        smallest ``n`` of the curve reaching it is marked with a dotted vertical line.
    n_label : str, default "n (participants)"
        The x axis label (say "n per group" for a two-sample curve).
    title : str, optional
        Default "Power curve".
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; by default a new figure of ``size`` is made.
    size : (float, float), default (6.0, 4.0)
        Width and height of a new figure, in inches.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    GlmeegError
        ``curve`` lacks the ``n`` or ``power`` column or is empty, or ``target`` is not in
        (0, 1).
    """
    if not all(hasattr(curve, "columns") and c in curve.columns for c in ("n", "power")):
        raise GlmeegError("curve: expected a table with columns 'n' and 'power' (the output of "
                          "glmeeg.power_curve)")
    if len(curve) == 0:
        raise GlmeegError("curve: the table has no rows")
    if target is not None and not (0.0 < float(target) < 1.0):
        raise GlmeegError(f"target: expected a power strictly between 0 and 1, got {target}")
    data = curve.sort_values("n")
    n = data["n"].to_numpy(dtype=float)
    power = data["power"].to_numpy(dtype=float)

    fig, ax = _figure(ax, size)
    ax.plot(n, power, marker="o", ms=3, lw=1.5, color="#1f4e79", label="power", gid="power-curve")
    if target is not None:
        ax.axhline(float(target), ls="--", lw=1.0, color="#b2182b", label=f"target {float(target):g}",
                   gid="target-line")
        reached = np.flatnonzero(power >= float(target))
        if reached.size:
            ax.axvline(n[reached[0]], ls=":", lw=1.0, color="0.4", gid="target-n",
                       label=f"first n reaching it: {n[reached[0]]:g}")
    ax.set_ylim(0.0, 1.0)
    ax.set_xlabel(n_label)
    ax.set_ylabel("power")
    ax.grid(alpha=0.3)
    ax.legend(fontsize="small", frameon=False, loc="lower right")
    ax.set_title(title if title is not None else "Power curve", fontsize="medium")
    return fig


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
    point of the shown time(s) is significant are drawn as white dots, the others as small
    black dots. An interpolated map shows the sensors' values smoothly; it is not a source
    estimate.
    """
    import scipy.interpolate

    result = _result(result)
    fi = _frequency_index(result, frequency)
    names = list(result.axes.channels)
    if len(names) < 4:
        raise GlmeegError(f"scalp map: {len(names)} channels; at least 4 are needed to interpolate")
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
    stat = _at_frequency(result.map("statistic"), fi)
    sig = _at_frequency(result.map("significant"), fi).astype(bool)
    times = np.asarray(result.axes.times)
    if time is not None and window is not None:
        raise GlmeegError("scalp map: give time or window, not both")
    if window is not None:
        cols = np.flatnonzero((times >= window[0]) & (times <= window[1]))
        if cols.size == 0:
            raise GlmeegError(f"scalp map: window {window[0]:g}-{window[1]:g} s holds no sample "
                              f"(times {times[0]:g} to {times[-1]:g} s)")
        when = f"{1000 * window[0]:.0f}-{1000 * window[1]:.0f} ms"
    else:
        if time is None:
            filled = np.nan_to_num(np.abs(stat), nan=-1.0)
            col = int(np.unravel_index(np.argmax(filled), filled.shape)[1])
        else:
            col = int(np.argmin(np.abs(times - time)))
        cols = np.array([col])
        when = f"{1000 * times[col]:.0f} ms"
    with np.errstate(all="ignore"):
        values = np.nanmean(stat[:, cols], axis=1)
    marked = sig[:, cols].any(axis=1)
    xy = _disc_coordinates(positions)
    radius = max(1.0, float(np.max(np.hypot(xy[:, 0], xy[:, 1]))) * 1.05)
    fig, ax = _figure(ax, size)
    style = _statistic_style(result, values)
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
    outside_clear = _colormap(style["cmap"], bad=(0.0, 0.0, 0.0, 0.0))  # off the head: nothing
    mesh = ax.pcolormesh(gx, gy, np.ma.masked_invalid(image), cmap=outside_clear,
                         vmin=style["vmin"], vmax=style["vmax"], shading="auto")
    angle = np.linspace(0, 2 * np.pi, 200)
    ax.plot(radius * np.cos(angle), radius * np.sin(angle), color="0.15", lw=1.5)
    ax.plot([-0.09 * radius, 0.0, 0.09 * radius], [0.995 * radius, 1.09 * radius, 0.995 * radius],
            color="0.15", lw=1.5)                                    # nose
    for side in (-1, 1):                                             # ears
        ax.plot(side * radius * (1 + 0.04 * np.sin(np.linspace(0, np.pi, 20))),
                radius * 0.16 * np.cos(np.linspace(0, np.pi, 20)), color="0.15", lw=1.5)
    ax.scatter(xy[~marked, 0], xy[~marked, 1], s=6, c="k", zorder=3)
    if marked.any():
        ax.scatter(xy[marked, 0], xy[marked, 1], s=30, c="white", edgecolors="k", zorder=4,
                   label="significant")
    ax.set_aspect("equal")
    ax.set_xlim(-1.2 * radius, 1.2 * radius)
    ax.set_ylim(-1.15 * radius, 1.2 * radius)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_xlabel("left - right")
    ax.set_ylabel("back - front")
    bar = fig.colorbar(mesh, ax=ax, shrink=0.8)
    bar.set_label(_statistic_label(result))
    at = f", {result.axes.frequencies[fi]:g} Hz" if fi is not None else ""
    ax.set_title(title if title is not None else f"{result.name}: {result.kind} at {when}{at}",
                 fontsize="medium")
    if footnote:
        _footnote(fig, "White dots: sensors with significant points; interpolated, not a source estimate.")
    return fig
