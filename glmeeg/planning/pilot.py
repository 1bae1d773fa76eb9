"""What a simulation of power reads from the pilot (a saved test): its arrays, the layout its
simulated subjects are drawn from (one sample, groups or a regression), its neighbour graph and
the target region; and the checks of the numbers a simulation is given."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from ..errors import ModelError
from ..results import TestResult


@dataclass(frozen=True)
class PilotLayout:
    """Which pilot subjects a simulated subject may be drawn from."""

    kind: Literal["one-sample", "groups", "regression"]
    members: tuple[np.ndarray, ...]   # pilot subject indices of each group (one array without groups)
    labels: tuple[str, ...]

    def total(self, n: int) -> int:
        return n * len(self.members) if self.kind == "groups" else n

    def draw(self, n: int, rng: np.random.Generator) -> np.ndarray:
        if self.kind == "groups":
            return np.concatenate([m[rng.integers(0, m.size, size=n)] for m in self.members])
        m = self.members[0]
        return m[rng.integers(0, m.size, size=n)]


def pilot_layout(G: np.ndarray, columns: Sequence[str]) -> PilotLayout:
    """One sample, groups (distinct rows of the design's indicator columns) or a regression."""
    n0 = G.shape[0]
    constant = np.ptp(G, axis=0) == 0
    if constant.all():
        return PilotLayout("one-sample", (np.arange(n0),), ("all",))
    indicator = [j for j in range(G.shape[1]) if not constant[j]
                 and np.isin(np.unique(G[:, j]), (-1.0, 0.0, 1.0)).all()]
    if not indicator:
        return PilotLayout("regression", (np.arange(n0),), ("all",))
    keys, inverse = np.unique(G[:, indicator], axis=0, return_inverse=True)
    members = tuple(np.flatnonzero(inverse.ravel() == g) for g in range(keys.shape[0]))
    labels = tuple(", ".join(f"{columns[j]} = {v:g}" for j, v in zip(indicator, key)) for key in keys)
    return PilotLayout("groups", members, labels)


def whole_number(value, name: str, *, least: int) -> int:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ModelError.of(name, f"expected a whole number, got {value!r}") from None
    if not math.isfinite(v) or v != int(v) or isinstance(value, bool):
        raise ModelError.of(name, f"expected a whole number, got {value!r}")
    if v < least:
        raise ModelError.of(name, f"expected at least {least}, got {int(v)}")
    return int(v)


def points_graph_of(graph, result: TestResult) -> tuple[tuple[np.ndarray, np.ndarray], str]:
    """The points' neighbour graph as CSR arrays, and how it was obtained."""
    from ..errors import GlmeegError
    from ..inference.graph import map_graph
    from ..sensors.neighbours import SensorGraph, sensor_graph

    P = result.axes.n_points
    channels = result.axes.channels
    if graph is None:
        try:
            sg = sensor_graph(pd.DataFrame({"name": list(channels)}), sensors_label="the saved result")
        except GlmeegError:
            raise ModelError.of("graph", "the neighbour graph cannot be rebuilt from the channel names (not all "
                             "are 10-10 names); pass the pilot's neighbour table (on the command line "
                             "--neighbours FILE, written by 'glmeeg neighbours DESIGN --out FILE')") from None
        how = (f"{sg.method}, rebuilt from the channel names (the pilot may have used another graph: "
               "pass its neighbour table to use exactly it)")
    elif isinstance(graph, SensorGraph):
        if tuple(graph.channels) != tuple(channels):
            raise ModelError.of("graph", "the sensor graph's channels differ from the result's "
                             f"({len(graph.channels)} vs {len(channels)} channels, or another order)")
        sg, how = graph, graph.method
    else:
        try:
            indptr, indices = (np.ascontiguousarray(a, dtype=np.int64) for a in graph)
        except (TypeError, ValueError):
            raise ModelError.of("graph", "expected a SensorGraph or the points graph's (indptr, indices) "
                             f"arrays, got {type(graph).__name__}") from None
        if indptr.ndim != 1 or indptr.size != P + 1 or indices.ndim != 1 or indptr[-1] != indices.size \
                or (indices.size and (indices.min() < 0 or indices.max() >= P)):
            raise ModelError.of("graph", f"(indptr, indices) do not describe a graph of the result's {P} points")
        return (indptr, indices), "the points graph given"
    if sg.isolated:
        how += f"; {len(sg.isolated)} sensor(s) without neighbours: {', '.join(sg.isolated)}"
    return map_graph(sg.adjacency(), result.axes.shape), how


def pilot_arrays(result: TestResult) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The pilot's subject estimates ``(n, k, P)``, group design and group contrast, checked."""
    if not isinstance(result, TestResult):
        raise ModelError.of("result", f"expected a saved test (glmeeg.load_result), got {type(result).__name__}")
    if result.subject_estimates is None or result.group_design is None:
        raise ModelError.of("result", f"test {result.name!r} holds no subject-level estimates (saved by an "
                         "earlier glmeeg version); re-run the analysis with this version to simulate from it")
    Y = np.asarray(result.subject_estimates, dtype=np.float64)
    G = np.asarray(result.group_design, dtype=np.float64)
    L = np.atleast_2d(np.asarray(result.group_contrast, dtype=np.float64))
    P = result.axes.n_points
    n0 = len(result.subjects)
    k = Y.shape[1] if Y.ndim == 3 else 0
    if Y.shape != (n0, k, P) or G.shape != (n0, len(result.group_columns)) or L.shape[1] != G.shape[1]:
        raise ModelError.of("result", f"test {result.name!r} has inconsistent arrays (subject estimates "
                         f"{Y.shape}, group design {G.shape}, group contrast {L.shape})")
    return Y, G, L


def sample_sizes(n, *, result: TestResult, layout: PilotLayout, k: int, q: int) -> list[int]:
    """The sample sizes asked for, each whole, distinct and large enough for a residual df."""
    if isinstance(n, (int, np.integer, float)) and not isinstance(n, bool):
        n = [n]
    try:
        values = list(n)
    except TypeError:
        raise ModelError.of("n", f"expected sample sizes, got {n!r}") from None
    if not values:
        raise ModelError.of("n", "expected at least one sample size, got none")
    needed = q + (k if k > 1 else 1)
    per = " per group" if layout.kind == "groups" else ""
    least = max(1, math.ceil(needed / len(layout.members))) if layout.kind == "groups" else needed
    if result.spec.group_method != "glm":
        least = max(least, 2 if layout.kind == "groups" else 3)
    ns: list[int] = []
    for v in values:
        v = whole_number(v, "n", least=1)
        if v < least:
            raise ModelError.of("n", f"expected at least {least}{per} so that the {result.kind} test has a "
                             f"residual df ({q} group column(s){f', {k} joint contrasts' if k > 1 else ''}), "
                             f"got {v}")
        if v in ns:
            raise ModelError.of("n", f"{v} is listed twice")
        ns.append(v)
    return ns


def positive_number(value, name: str) -> float:
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise ModelError.of(name, f"expected a number > 0, got {value!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise ModelError.of(name, f"expected a finite number > 0, got {value:g}")
    return value


def target_region(result: TestResult, target) -> tuple[np.ndarray, str]:
    """The target region's points and their description."""
    P = result.axes.n_points
    if target is None:
        target_mask = np.asarray(result.significant, dtype=bool)
        count = int(target_mask.sum())
        text = (f"the {count} points of the pilot's significant clusters"
                if result.correction.method == "cluster" else f"the pilot's {count} significant points")
    else:
        target_mask = np.asarray(target)
        if target_mask.shape != (P,) or target_mask.dtype != bool:
            raise ModelError.of("target", f"expected a boolean array of the result's {P} points, got "
                             f"{target_mask.dtype} of shape {target_mask.shape}")
        text = f"the {int(target_mask.sum())} points given"
    if result.kind == "t":
        text += " (detected by a significant point there with the pilot's sign)"
    return target_mask, text
