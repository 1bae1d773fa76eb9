"""The neighbour graph of sensors: which channels count as adjacent for clusters and TFCE.

Which sensors are neighbours (:class:`SensorGraph`) is decided by :func:`sensor_graph`: from an
explicit neighbour table, else from the sensors' positions, else from the standard positions of
10-10 names (:func:`glmeeg.sensors.standard_positions`).

From positions there are two methods (:func:`neighbours_from_positions`), named after what they
compute:

- ``"pruned-triangulation"`` (default): the Delaunay triangulation of the positions projected
  flat from the vertex, its edges much longer than the local sensor spacing pruned;
- ``"radius"``: every sensor within a radius, given in median nearest-neighbour spacings.

The names ``"triangulation"`` and ``"distance"`` of glmeeg 0.1 are still accepted, with a
:class:`DeprecationWarning`, until the next release (``DEPRECATED_METHODS``).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.spatial import cKDTree

from ..errors import GlmeegError, StudyError
from .geometry import check_positions, delaunay_edges, few_names, other_edge_spacing, project_from_vertex
from .positions import standard_positions

__all__ = ["SensorGraph", "neighbours_from_positions", "neighbours_from_table", "sensor_graph",
           "LONG_EDGE_FACTOR", "DEFAULT_DISTANCE", "METHODS", "DEPRECATED_METHODS"]

# An edge of the triangulation is dropped when it is longer than this many times the larger of
# its two end sensors' local spacings (median length of a sensor's other triangulation edges).
# See neighbours_from_positions, Notes.
LONG_EDGE_FACTOR = 2.5


# Default radius of method="radius", in median nearest-neighbour distances.
DEFAULT_DISTANCE = 1.5


# The methods of neighbours_from_positions, and the names they had in glmeeg 0.1 (accepted with a
# DeprecationWarning for one release; nothing saved records them, so nothing else needs mapping).
METHODS = ("pruned-triangulation", "radius")


DEPRECATED_METHODS = {"triangulation": "pruned-triangulation", "distance": "radius"}


def _method(method: object, *, stacklevel: int) -> str:
    """``method`` checked and under its current name (a deprecated name warns, from the caller of
    the public function: ``stacklevel`` counts from here)."""
    if isinstance(method, str) and method in DEPRECATED_METHODS:
        new = DEPRECATED_METHODS[method]
        warnings.warn(f"neighbour method {method!r} is now called {new!r}; the old name will stop "
                      "working in the next release", DeprecationWarning, stacklevel=stacklevel + 1)
        return new
    if not (isinstance(method, str) and method in METHODS):
        raise GlmeegError(f"neighbour method must be one of {', '.join(METHODS)}; got {method!r}")
    return method


@dataclass(frozen=True, eq=False)
class SensorGraph:
    """Which sensors are neighbours: an undirected graph over the channels.

    Build it with :func:`sensor_graph` (or :func:`neighbours_from_positions`,
    :func:`neighbours_from_table`); the points graph of the inference stage is built from its
    :meth:`adjacency`.

    Attributes
    ----------
    channels : tuple of str
        Channel names, in the order of the data's channel axis.
    edges : numpy.ndarray
        ``(E, 2)`` int64, read-only: one row ``(i, j)`` per pair of neighbours, indices into
        ``channels`` with ``i < j``, rows sorted and unique.
    method : str
        Short description of how the graph was built, for reports.
    isolated : tuple of str
        Channels without any neighbour (computed from ``edges``, not passed in). Points of such
        a channel are connected only along time (and frequency); callers should warn about them.

    Examples
    --------
    >>> g = neighbours_from_table(["Fz", "Cz", "Pz"],
    ...                           pd.DataFrame({"channel": ["Cz", "Cz"], "neighbour": ["Fz", "Pz"]}),
    ...                           label="neighbours.csv")
    >>> g.edges.tolist()
    [[0, 1], [1, 2]]
    >>> g.neighbours("Cz")
    ('Fz', 'Pz')
    """

    channels: tuple[str, ...]
    edges: np.ndarray
    method: str
    isolated: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        channels = tuple(str(c) for c in self.channels)
        if len(set(channels)) != len(channels):
            raise ValueError("SensorGraph: channel names must be unique")
        edges = np.array(self.edges, dtype=np.int64).reshape(-1, 2)
        if len(edges):
            if edges.min() < 0 or edges.max() >= len(channels):
                raise ValueError(f"SensorGraph: edge indices must lie in 0..{len(channels) - 1}")
            if np.any(edges[:, 0] >= edges[:, 1]):
                raise ValueError("SensorGraph: every edge (i, j) must have i < j")
            key = edges[:, 0] * len(channels) + edges[:, 1]
            if np.any(np.diff(key) <= 0):
                raise ValueError("SensorGraph: edges must be sorted and unique")
        edges.setflags(write=False)
        degree = np.bincount(edges.ravel(), minlength=len(channels))
        object.__setattr__(self, "channels", channels)
        object.__setattr__(self, "edges", edges)
        object.__setattr__(self, "method", str(self.method))
        object.__setattr__(self, "isolated", tuple(c for c, d in zip(channels, degree) if d == 0))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, SensorGraph):
            return NotImplemented
        return (self.channels == other.channels and self.method == other.method
                and np.array_equal(self.edges, other.edges))

    __hash__ = None  # type: ignore[assignment]  # holds an array

    @property
    def n_channels(self) -> int:
        """Number of channels (nodes)."""
        return len(self.channels)

    @property
    def n_edges(self) -> int:
        """Number of neighbour pairs (each counted once)."""
        return int(self.edges.shape[0])

    def adjacency(self) -> sp.csr_matrix:
        """Symmetric boolean ``(C, C)`` adjacency matrix, no diagonal, sorted indices."""
        n = self.n_channels
        rows = np.concatenate([self.edges[:, 0], self.edges[:, 1]])
        cols = np.concatenate([self.edges[:, 1], self.edges[:, 0]])
        a = sp.csr_matrix((np.ones(rows.size, dtype=bool), (rows, cols)), shape=(n, n))
        a.sum_duplicates()
        a.sort_indices()
        return a

    def n_neighbours(self) -> pd.Series:
        """Number of neighbours of every channel (int64 Series indexed by channel name)."""
        degree = np.bincount(self.edges.ravel(), minlength=self.n_channels).astype(np.int64)
        return pd.Series(degree, index=pd.Index(self.channels, name="channel"), name="n_neighbours")

    def neighbours(self, channel: str) -> tuple[str, ...]:
        """Names of the neighbours of ``channel``, in channel order."""
        try:
            i = self.channels.index(channel)
        except ValueError:
            raise KeyError(f"no channel {channel!r} in the sensor graph") from None
        a = self.adjacency()
        return tuple(self.channels[j] for j in a.indices[a.indptr[i]:a.indptr[i + 1]])

    def to_frame(self) -> pd.DataFrame:
        """The graph as a neighbour table: columns ``channel``, ``neighbour``.

        Every pair appears in **both directions** (``Cz, Pz`` and ``Pz, Cz``), rows ordered by
        channel, then neighbour, in channel order, so the neighbours of one channel are one
        filter away. This is the table format :func:`neighbours_from_table` reads (which also
        accepts one row per pair); written as CSV it is a valid ``neighbours.csv``.
        """
        a = self.adjacency().tocoo()
        order = np.lexsort((a.col, a.row))
        names = np.asarray(self.channels, dtype=object)
        return pd.DataFrame({"channel": names[a.row[order]], "neighbour": names[a.col[order]]},
                            dtype=object)

    def __repr__(self) -> str:
        return (f"SensorGraph({_count(self.n_channels, 'channel')}, "
                f"{_count(self.n_edges, 'neighbour pair')}, method={self.method!r})")

    def __str__(self) -> str:
        a = self.adjacency()
        width = max((len(c) for c in self.channels), default=0)
        lines = [f"Sensor neighbours: {_count(self.n_channels, 'channel')}, "
                 f"{_count(self.n_edges, 'pair')} ({self.method})"]
        for i, c in enumerate(self.channels):
            nb = [self.channels[j] for j in a.indices[a.indptr[i]:a.indptr[i + 1]]]
            lines.append(f"  {c:<{width}}  {', '.join(nb) if nb else '(no neighbours)'}")
        return "\n".join(lines)


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}{'' if n == 1 else 's'}"


def _make_graph(channels: tuple[str, ...], pairs: np.ndarray, method: str) -> SensorGraph:
    """Normalise index pairs (either direction, repeats, self pairs) into a SensorGraph."""
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    pairs = np.unique(np.sort(pairs, axis=1), axis=0)
    return SensorGraph(channels=channels, edges=pairs, method=method)


def _check_channels(channels, label: str) -> tuple[str, ...]:
    channels = tuple(str(c) for c in channels)
    seen: set[str] = set()
    dupes = [c for c in channels if c in seen or seen.add(c)]
    if dupes:
        raise StudyError(f"{label}: channel {dupes[0]} is listed more than once")
    return channels


def neighbours_from_positions(channels, positions, *, method: str = "pruned-triangulation",
                              max_distance: float | None = None,
                              label: str = "sensor positions") -> SensorGraph:
    """Neighbouring sensors from their 3-D positions.

    Parameters
    ----------
    channels : sequence of str
        Channel names, unique, in the data's channel order.
    positions : array_like, shape (C, 3)
        x, y, z of every channel, on or near a sphere (any unit, any origin).
    method : {"pruned-triangulation", "radius"}, default "pruned-triangulation"
        ``"pruned-triangulation"``: neighbours share an edge of the Delaunay triangulation of
        the projected positions, edges far longer than the local spacing pruned (see Notes).
        ``"radius"``: neighbours are within ``max_distance`` of each other. The names
        ``"triangulation"`` and ``"distance"`` of glmeeg 0.1 still work, with a
        ``DeprecationWarning``.
    max_distance : float, optional
        Only for ``method="radius"``: the largest straight-line distance between neighbours,
        as a **multiple of the median nearest-neighbour distance** of the layout (default
        ``1.5``). Being relative, the same value means the same for positions in metres,
        millimetres or on the unit sphere of the 10-10 fallback; 1.5 takes in the four diagonal
        neighbours of a square grid (at 1.41) and the six of a hexagonal one (at 1.0).
    label : str, default "sensor positions"
        Where the positions come from, for the ``method`` description and error messages.

    Returns
    -------
    SensorGraph
        Its ``method`` starts with the method's name (``"pruned-triangulation of ..."``,
        ``"radius of 1.5 x the median nearest-neighbour spacing of ..."``).

    Raises
    ------
    StudyError
        Positions of the wrong shape, not finite, or two channels at the same position.
    GlmeegError
        Unknown ``method``; ``max_distance`` not a positive number.

    Notes
    -----
    **Pruned triangulation** (default). The sensors are mapped onto a plane by the azimuthal
    equidistant projection [2]_ from the vertex: each sensor goes to the point whose distance
    from the origin is its angle from the vertex and whose direction is its azimuth around it.
    Directions are taken from the centre of the least-squares sphere through the positions, and
    the vertex is the mean of those directions (the top of the head for a full cap, the middle of
    a partial one); if the sensors surround the centre evenly, +z is used. A flat layout (all
    sensors in one plane) is used as it is. The projected sensors are triangulated with the
    Delaunay triangulation [1]_ (``scipy.spatial.Delaunay``), and two sensors are neighbours
    when they share an edge. Where four or more sensors lie on one empty circle (rectangles and
    symmetric trapezoids of an idealised layout) the triangulation is not unique; the
    diagonals are then left out, so the graph is the same for any channel order and a
    left-right symmetric layout gives a left-right symmetric graph. One or two sensors, or
    sensors along one line, are joined in a chain.

    The pruned triangulation is the default because it has no distance to tune and adapts to
    uneven density: each sensor is joined to the sensors around it, wherever the cap is dense
    or sparse, whereas one radius either isolates sensors in sparse regions or joins far too
    many in dense ones.

    **Long edges (the pruning).** The triangulation of a plane covers the convex hull of the
    points, so along a concave stretch of the rim (a cap without frontal sensors, a U-shaped
    montage, the open side of an arc) it joins rim sensors that are far apart across a region
    with no sensors.
    Such an edge is dropped when it is longer than ``LONG_EDGE_FACTOR`` (2.5) times the larger
    *local spacing* of its two ends, a sensor's local spacing being the median length of its
    other triangulation edges. Lengths are straight-line 3-D distances, so the stretching of
    the projection near the rim does not matter. In the 10-10 layouts we checked (32 to 87
    sensors, also with every coordinate jittered by 2 % of the head radius) no edge exceeds 2.3
    times its local spacing (the largest are across a midline with no midline sensor, such as
    AF3-AF4 of a 32-channel cap, at 2.1); edges across a gap measure 2.5 to 6 (the first
    being a cap without its frontal rows, the last the chord closing a midline arc). Each
    sensor's shortest edge is never longer than its own local spacing, so the rule never leaves
    a sensor without neighbours; and being local, it does not cut the legitimately long edges
    of a sparse region of an uneven cap, as a threshold on the median edge length of the whole
    layout would. Three sensors not on one line are all neighbours of one another.

    **Radius.** Two sensors are neighbours when their straight-line 3-D distance is at most
    ``max_distance`` times the median nearest-neighbour distance. Sensors farther than that from all
    others are isolated.

    References
    ----------
    .. [1] Delaunay, B. (1934). Sur la sphere vide. Bulletin de l'Academie des Sciences de
       l'URSS, Classe des Sciences Mathematiques et Naturelles, 6, 793-800.
    .. [2] Snyder, J. P. (1987). Map projections: a working manual. U.S. Geological Survey
       Professional Paper 1395 (azimuthal equidistant projection).

    Examples
    --------
    >>> names = ["Fz", "C3", "Cz", "C4", "Pz"]
    >>> g = neighbours_from_positions(names, standard_positions(names))
    >>> g.neighbours("Cz")
    ('Fz', 'C3', 'C4', 'Pz')
    """
    method = _method(method, stacklevel=2)
    if max_distance is not None and method != "radius":
        raise GlmeegError("max_distance applies to method='radius' only")
    if max_distance is not None and not (isinstance(max_distance, (int, float, np.integer, np.floating))
                                         and np.isfinite(max_distance) and max_distance > 0):
        raise GlmeegError(f"max_distance must be a positive number (multiples of the median "
                          f"nearest-neighbour distance); got {max_distance!r}")
    channels = _check_channels(channels, label)
    pos = check_positions(channels, positions, label)
    n = len(channels)
    if method == "radius":
        factor = DEFAULT_DISTANCE if max_distance is None else float(max_distance)
        desc = f"radius of {factor:g} x the median nearest-neighbour spacing of {label}"
        if n < 2:
            return _make_graph(channels, np.empty((0, 2)), desc)
        tree = cKDTree(pos)
        nearest = tree.query(pos, k=2)[0][:, 1]
        limit = factor * float(np.median(nearest))
        pairs = tree.query_pairs(limit * (1 + 1e-12), output_type="ndarray")
        return _make_graph(channels, pairs, desc)

    edges = delaunay_edges(project_from_vertex(pos), channels, label)
    length = np.linalg.norm(pos[edges[:, 0]] - pos[edges[:, 1]], axis=1)
    keep = length <= LONG_EDGE_FACTOR * other_edge_spacing(edges, length, n)
    dropped = int((~keep).sum())
    desc = f"pruned-triangulation of {label}"
    if dropped:
        desc += f"; {dropped} long edge{'s' if dropped > 1 else ''} dropped"
    return _make_graph(channels, edges[keep], desc)


def neighbours_from_table(channels, table: pd.DataFrame, *, label: str) -> SensorGraph:
    """Neighbouring sensors from an explicit neighbour list.

    Parameters
    ----------
    channels : sequence of str
        Channel names of the study, in the data's channel order.
    table : pandas.DataFrame
        Columns ``channel`` and ``neighbour``, one pair of channel names per row (as read by
        :func:`glmeeg.study.read_neighbour_table`). Pairs are symmetrised: a row ``Cz, Pz``
        makes Pz a neighbour of Cz and Cz of Pz, so a table may list each pair once or in both
        directions; repeated rows are fine and rows pairing a channel with itself are ignored.
        Names are compared exactly, after stripping surrounding spaces. Channels of the study
        that appear in no row are isolated.
    label : str
        Name of the table's file, for messages.

    Returns
    -------
    SensorGraph

    Raises
    ------
    StudyError
        A column is missing, a name is empty or is not one of ``channels``.
    """
    channels = _check_channels(channels, label)
    missing = [c for c in ("channel", "neighbour") if c not in table.columns]
    if missing:
        raise StudyError(f"{label}: no column {', '.join(map(repr, missing))} "
                         f"(columns: {', '.join(map(str, table.columns))}); expected columns "
                         "channel, neighbour")
    index = {c: i for i, c in enumerate(channels)}
    lower = {c.lower(): c for c in channels}
    cols = []
    for col in ("channel", "neighbour"):
        values = table[col]
        empty = values.isna().to_numpy() | (values.astype(str).str.strip() == "").to_numpy()
        if empty.any():
            raise StudyError(f"{label} row {int(np.flatnonzero(empty)[0]) + 2}: empty {col} name")
        names = values.astype(str).str.strip()
        codes = names.map(index)
        unknown = codes.isna().to_numpy()
        if unknown.any():
            row = int(np.flatnonzero(unknown)[0])
            name = names.iloc[row]
            hint = f" (did you mean {lower[name.lower()]}?)" if name.lower() in lower else ""
            raise StudyError(f"{label} row {row + 2}: {col} {name!r} is not a channel of the "
                             f"sensors table{hint}; expected one of {few_names(list(channels))}")
        cols.append(codes.to_numpy(dtype=np.int64))
    pairs = np.column_stack(cols) if cols[0].size else np.empty((0, 2), dtype=np.int64)
    return _make_graph(channels, pairs, f"neighbour table {label}")


def sensor_graph(sensors: pd.DataFrame, *, neighbour_table: pd.DataFrame | None = None,
                 neighbour_label: str = "", method: str = "pruned-triangulation",
                 max_distance: float | None = None,
                 sensors_label: str = "sensors table") -> SensorGraph:
    """The neighbour graph of a study's sensors, from the best source available.

    In order of preference:

    1. ``neighbour_table``, when given (``method`` and ``max_distance`` are then not used);
    2. the sensors table's ``x``, ``y``, ``z`` columns, when every channel has a finite
       number in all three;
    3. the standard 10-10 positions of the channel names (:func:`standard_positions`), when
       every name is a 10-10 name; ``method`` says so. Positions given for only some channels
       are then not used, since mixing them with standard ones would mix two coordinate frames.

    Parameters
    ----------
    sensors : pandas.DataFrame
        Column ``name`` (channel names in the data's order), optional ``x``, ``y``, ``z``.
    neighbour_table : pandas.DataFrame, optional
        Explicit neighbour list (see :func:`neighbours_from_table`).
    neighbour_label : str, default ""
        File name of the neighbour table, for messages.
    method : {"pruned-triangulation", "radius"}, default "pruned-triangulation"
        How to find neighbours from positions (see :func:`neighbours_from_positions`; the
        glmeeg 0.1 names ``"triangulation"`` and ``"distance"`` still work, with a
        ``DeprecationWarning``).
    max_distance : float, optional
        For ``method="radius"``, in multiples of the median nearest-neighbour distance.
    sensors_label : str, default "sensors table"
        File name of the sensors table, for messages.

    Returns
    -------
    SensorGraph
        Its ``isolated`` lists channels without neighbours; the caller should warn about them.

    Raises
    ------
    StudyError
        No source applies: some channels have no position and are not all 10-10 names; or an
        error of :func:`neighbours_from_table` / :func:`neighbours_from_positions`.

    Notes
    -----
    Any number of channels works: one channel has no neighbours, two are neighbours of each
    other, more are joined by the chosen method (see :func:`neighbours_from_positions`).

    Examples
    --------
    >>> g = sensor_graph(pd.DataFrame({"name": ["Fpz", "Fz", "Cz", "Pz", "Oz"]}))
    >>> g.method
    'pruned-triangulation of standard 10-10 positions of the channel names (sensors table has no x, y, z); 1 long edge dropped'
    >>> g.edges.tolist()  # the midline: a chain
    [[0, 1], [1, 2], [2, 3], [3, 4]]
    """
    if "name" not in sensors.columns:
        raise StudyError(f"{sensors_label}: no column 'name'; expected the channel names")
    channels = _check_channels(sensors["name"].astype(str).str.strip(), sensors_label)
    if neighbour_table is not None:
        return neighbours_from_table(channels, neighbour_table,
                                     label=neighbour_label or "neighbour table")
    opts = {"method": _method(method, stacklevel=2), "max_distance": max_distance}
    has_xyz = all(c in sensors.columns for c in ("x", "y", "z"))
    if has_xyz:
        pos = sensors[["x", "y", "z"]].apply(pd.to_numeric, errors="coerce").to_numpy(dtype=float)
        without = ~np.all(np.isfinite(pos), axis=1)
    else:
        pos, without = None, np.ones(len(channels), dtype=bool)
    if not without.any():
        return neighbours_from_positions(channels, pos, label=f"x, y, z of {sensors_label}", **opts)
    standard = standard_positions(channels)
    not_standard = [c for c, p in zip(channels, standard) if not np.all(np.isfinite(p))]
    if not not_standard:
        why = "has no x, y, z" if not has_xyz else "lacks x, y, z for some channels"
        return neighbours_from_positions(
            channels, standard, **opts,
            label=f"standard 10-10 positions of the channel names ({sensors_label} {why})")
    # With x, y, z columns, name the channels lacking them; without, the names that are not 10-10.
    names = [c for c, w in zip(channels, without) if w] if has_xyz else not_standard
    raise StudyError(f"{sensors_label}: no position for channel(s) {few_names(names)}; expected numeric "
                     "x, y, z columns for every channel, a neighbour file ([data] neighbours), or "
                     "10-10 channel names")
