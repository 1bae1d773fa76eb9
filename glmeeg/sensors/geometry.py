"""The geometry behind the neighbour graph: a sphere fitted to the sensor positions, their
projection from the vertex onto a plane, its Delaunay triangulation (co-circular ties resolved)
and the local spacing of each sensor's edges."""

from __future__ import annotations

import numpy as np
from scipy.spatial import Delaunay, cKDTree

from ..errors import StudyError

# Relative size under which two Delaunay triangles count as sharing one circumcircle.
_COCIRCULAR_TOL = 1e-6


# Relative distance under which two sensors count as being at the same place.
_SAME_PLACE_TOL = 1e-9


def fit_sphere(pos: np.ndarray) -> np.ndarray | None:
    """Centre of the least-squares sphere through ``pos`` (|p|^2 = 2 c.p + k), or None."""
    a = np.column_stack([2.0 * pos, np.ones(len(pos))])
    sol, _, rank, _ = np.linalg.lstsq(a, (pos ** 2).sum(axis=1), rcond=None)
    if rank < 4 or not np.all(np.isfinite(sol)):
        return None
    return sol[:3]


def project_from_vertex(pos: np.ndarray) -> np.ndarray:
    """2-D map of the head: azimuthal equidistant projection from the vertex.

    See :func:`neighbours_from_positions`, Notes, for the choices made here.
    """
    centred = pos - pos.mean(axis=0)
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    spread = s[0] if s.size else 0.0
    if len(pos) < 4 or s[2] <= 1e-3 * spread:  # a flat layout: use its own plane
        return centred @ vt[:2].T
    centre = fit_sphere(pos)
    if centre is None or np.linalg.norm(centre - pos.mean(axis=0)) > 100.0 * np.sqrt(spread ** 2 / len(pos)):
        # Too flat to define a sphere: the plane is the better map.
        return centred @ vt[:2].T
    d = pos - centre
    u = d / np.linalg.norm(d, axis=1, keepdims=True)
    v = u.mean(axis=0)
    # The vertex: the mean direction of the sensors from the centre, unless the sensors surround
    # the centre (no clear mean direction), then +z.
    v = v / np.linalg.norm(v) if np.linalg.norm(v) >= 0.1 else np.array([0.0, 0.0, 1.0])
    ref = np.array([0.0, 1.0, 0.0]) if abs(v[1]) < 0.9 else np.array([1.0, 0.0, 0.0])
    e1 = ref - (ref @ v) * v
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(v, e1)
    theta = np.arccos(np.clip(u @ v, -1.0, 1.0))  # angular distance from the vertex
    phi = np.arctan2(u @ e2, u @ e1)
    return np.column_stack([theta * np.cos(phi), theta * np.sin(phi)])


def circumcentres(p: np.ndarray) -> np.ndarray:
    """Circumcentres of triangles ``p`` of shape (n, 3, 2)."""
    a, b, c = p[:, 0], p[:, 1], p[:, 2]
    b, c = b - a, c - a
    d = 2.0 * (b[:, 0] * c[:, 1] - b[:, 1] * c[:, 0])
    bb, cc = (b ** 2).sum(axis=1), (c ** 2).sum(axis=1)
    ux = (c[:, 1] * bb - b[:, 1] * cc) / d
    uy = (b[:, 0] * cc - c[:, 0] * bb) / d
    return a + np.column_stack([ux, uy])


def delaunay_edges(xy: np.ndarray, channels: tuple[str, ...], label: str) -> np.ndarray:
    """Edges of the Delaunay tessellation of ``xy`` (pairs whose Voronoi cells share a border).

    Four or more points on one empty circle (a rectangle, a symmetric trapezoid: common in
    idealised layouts) have no unique triangulation; their diagonals, whose Voronoi border has
    zero length, are left out, so the graph does not depend on rounding or channel order.
    """
    n = len(xy)
    centred = xy - xy.mean(axis=0)
    s = np.linalg.svd(centred, compute_uv=False)
    if n < 3 or s[1] <= 1e-9 * s[0]:
        # Collinear (or one or two sensors): the triangulation of a line is the chain along it.
        order = np.argsort(centred @ np.linalg.svd(centred, full_matrices=False)[2][0], kind="stable")
        return np.column_stack([order[:-1], order[1:]])
    tri = Delaunay(xy)
    if len(tri.coplanar):
        lost = ", ".join(channels[i] for i in tri.coplanar[:, 0])
        raise StudyError(f"{label}: channel(s) {lost} coincide with another channel's position; "
                         "expected distinct positions")
    simp = tri.simplices
    with np.errstate(divide="ignore", invalid="ignore"):  # a flat sliver has no finite centre
        cc = circumcentres(xy[simp])
    e = np.sort(np.concatenate([simp[:, [0, 1]], simp[:, [1, 2]], simp[:, [0, 2]]]), axis=1)
    owner = np.tile(np.arange(len(simp)), 3)
    key = e[:, 0] * n + e[:, 1]
    order = np.argsort(key, kind="stable")
    key, e, owner = key[order], e[order], owner[order]
    _, first, count = np.unique(key, return_index=True, return_counts=True)
    edges = e[first]
    inner = count == 2
    border = np.full(len(edges), np.inf)
    with np.errstate(invalid="ignore"):
        border[inner] = np.linalg.norm(cc[owner[first[inner]]] - cc[owner[first[inner] + 1]], axis=1)
    border[~np.isfinite(border)] = np.inf
    length = np.linalg.norm(xy[edges[:, 0]] - xy[edges[:, 1]], axis=1)
    return edges[border > _COCIRCULAR_TOL * length]


def other_edge_spacing(edges: np.ndarray, length: np.ndarray, n: int) -> np.ndarray:
    """For every edge, the larger of its two ends' local spacings, each being the median length
    of that sensor's *other* edges (infinite for a sensor with no other edge).

    Leaving the edge itself out matters for sensors with two edges (the ends of an arc or a
    ring), whose median would otherwise always be half the long edge. A loop over sensors, not
    points: a few hundred at most.
    """
    spacing = np.full((len(edges), 2), np.inf)
    for i in range(n):
        for side in (0, 1):
            own = np.flatnonzero(edges[:, side] == i)
            mine = np.flatnonzero((edges[:, 0] == i) | (edges[:, 1] == i))
            for k in own:
                other = length[mine[mine != k]]
                if other.size:
                    spacing[k, side] = np.median(other)
    return spacing.max(axis=1)


def check_positions(channels: tuple[str, ...], positions, label: str) -> np.ndarray:
    pos = np.asarray(positions, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 3 or pos.shape[0] != len(channels):
        raise StudyError(f"{label}: positions have shape {pos.shape}; expected ({len(channels)}, 3), "
                         "one x, y, z row per channel")
    bad = ~np.all(np.isfinite(pos), axis=1)
    if bad.any():
        names = [c for c, b in zip(channels, bad) if b]
        raise StudyError(f"{label}: no finite x, y, z position for channel(s) {few_names(names)}")
    if len(pos) > 1:
        scale = np.max(np.ptp(pos, axis=0))
        pairs = sorted(cKDTree(pos).query_pairs(_SAME_PLACE_TOL * max(scale, 1e-300)))
        if scale == 0.0 or pairs:
            i, j = pairs[0] if pairs else (0, 1)
            raise StudyError(f"{label}: channels {channels[i]} and {channels[j]} have the same "
                             "position; expected distinct positions")
    return pos


def few_names(names: list[str], k: int = 8) -> str:
    more = f" and {len(names) - k} more" if len(names) > k else ""
    return ", ".join(names[:k]) + more
