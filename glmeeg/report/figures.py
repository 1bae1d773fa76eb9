"""Figures of results, designs and power curves (needs matplotlib: ``pip install 'glmeeg[plots]'``).

Every function returns a :class:`matplotlib.figure.Figure` drawn with the non-interactive Agg
canvas; save it with ``fig.savefig("map.png", dpi=150)``. Functions that draw one panel also take
an ``ax`` to draw into, in which case the figure returned is ``ax.figure``. matplotlib is
imported inside the functions, so importing glmeeg (or running its command line) never needs it.

The colours and marks every figure shares are described in :mod:`glmeeg.report.plotting`;
:func:`scalp_map` lives in :mod:`glmeeg.report.scalp` and is available here too.

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

from .plotting import (FOOTNOTE, F_MAP, T_MAP, add_footnote, as_result, at_frequency, cell_edges,
                      channel_order, channel_ticks, colormap, frequency_index, new_figure,
                      outline_significant, statistic_label, statistic_style)
from .scalp import scalp_map

__all__ = ["statistic_image", "estimate_time_courses", "frequency_time_image", "design_image",
           "power_curve_figure", "channel_order", "scalp_map"]



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
    result = as_result(result)
    fi = frequency_index(result, frequency)
    stat = at_frequency(result.map("statistic"), fi)
    sig = at_frequency(result.map("significant"), fi).astype(bool)
    order, by_position = channel_order(result.axes.channels)
    stat, sig = stat[order], sig[order]
    names = [result.axes.channels[i] for i in order]
    times_ms = np.asarray(result.axes.times) * 1000.0
    x_edges, y_edges = cell_edges(times_ms), np.arange(len(names) + 1) - 0.5

    fig, ax = new_figure(ax, size)
    style = statistic_style(result, stat)
    mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(stat), cmap=colormap(style["cmap"]),
                         vmin=style["vmin"], vmax=style["vmax"], shading="flat")
    if sig.any():
        outline_significant(ax, sig, x_edges, y_edges)
    ax.set_ylim(y_edges[-1], y_edges[0])  # front channels at the top
    channel_ticks(ax, names)
    ax.set_xlabel("time (ms)")
    from ..sensors.positions import standard_positions

    placed = int(np.isfinite(standard_positions(names)[:, 1]).sum())
    ax.set_ylabel("channel (file order)" if not by_position else "channel (front to back)"
                  if placed == len(names) else "channel (front to back, others after)")
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(statistic_label(result))
    at = f" at {result.axes.frequencies[fi]:g} Hz" if fi is not None else ""
    ax.set_title(title if title is not None else
                 f"{result.name}: {result.kind} statistic{at}, {result.n_significant} significant "
                 f"point{'' if result.n_significant == 1 else 's'} ({result.correction.method})", fontsize="medium")
    if footnote:
        add_footnote(fig, FOOTNOTE)
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
    result = as_result(result)
    labels = list(result.estimate_labels)
    if isinstance(row, str):
        if row not in labels:
            raise GlmeegError(f"row: {row!r} is not a contrast row of {result.name!r}; rows: "
                              f"{', '.join(labels)}")
        row = labels.index(row)
    if not (isinstance(row, (int, np.integer)) and 0 <= row < len(labels)):
        raise GlmeegError(f"row: expected 0 to {len(labels) - 1} or a row label, got {row!r}")
    fi = frequency_index(result, frequency)
    est = at_frequency(result.map("estimate")[row], fi)
    sig = at_frequency(result.map("significant"), fi).astype(bool)
    order, _ = channel_order(result.axes.channels)
    times_ms = np.asarray(result.axes.times) * 1000.0
    x_edges = cell_edges(times_ms)

    fig, ax = new_figure(ax, size)
    import matplotlib

    any_sig = sig.any(axis=0)
    starts = np.flatnonzero(any_sig & ~np.concatenate([[False], any_sig[:-1]]))
    ends = np.flatnonzero(any_sig & ~np.concatenate([any_sig[1:], [False]]))
    for s, e in zip(starts, ends):
        ax.axvspan(x_edges[s], x_edges[e + 1], color="0.85", zorder=0, lw=0, gid="significant-span")
    cmap = matplotlib.colormaps[F_MAP]
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
        add_footnote(fig, FOOTNOTE)
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
    result = as_result(result)
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
    x_edges, y_edges = cell_edges(times_ms), cell_edges(freqs)

    fig, ax = new_figure(ax, size)
    style = statistic_style(result, stat)
    mesh = ax.pcolormesh(x_edges, y_edges, np.ma.masked_invalid(stat), cmap=colormap(style["cmap"]),
                         vmin=style["vmin"], vmax=style["vmax"], shading="flat")
    if sig.any():
        outline_significant(ax, sig, x_edges, y_edges)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("frequency (Hz)")
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(statistic_label(result))
    ax.set_title(title if title is not None else
                 f"{result.name}: {result.kind} statistic at {channel}", fontsize="medium")
    if footnote:
        add_footnote(fig, FOOTNOTE)
    return fig


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
    fig, ax = new_figure(ax, size)
    image = ax.imshow(np.ma.masked_invalid(shown), aspect="auto", interpolation="nearest",
                      cmap=colormap(T_MAP), vmin=-1.0, vmax=1.0)
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

    fig, ax = new_figure(ax, size)
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
