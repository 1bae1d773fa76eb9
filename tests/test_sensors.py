"""Sensor positions and the neighbour graph of sensors (glmeeg.sensors, study.read_neighbour_table).

Outside references: the 10-20 / 10-10 proportional definition (Jasper 1958; Chatrian et al.
1985, from memory) for positions; the geometry of the 10-10 layout and of plane grids for the
neighbour facts; scipy.sparse.csgraph for connectivity.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from glmeeg.errors import GlmeegError, StudyError
from glmeeg.sensors.neighbours import (LONG_EDGE_FACTOR, SensorGraph, neighbours_from_positions,
                               neighbours_from_table, sensor_graph)
from glmeeg.sensors import standard_position, standard_positions
from glmeeg.study import read_neighbour_table

# The demo's 32-channel cap (glmeeg.demo.study.CHANNELS).
DEMO32 = ("Fp1 Fp2 AF3 AF4 F7 F3 Fz F4 F8 FC5 FC1 FC2 FC6 T7 C3 Cz C4 T8 CP5 CP1 CP2 CP6 "
          "P7 P3 Pz P4 P8 PO3 PO4 O1 Oz O2").split()


def _edge_names(g: SensorGraph) -> set[frozenset[str]]:
    return {frozenset((g.channels[i], g.channels[j])) for i, j in g.edges}


def _mirror(name: str) -> str:
    """Left-right mirror of a 10-10 name: odd numbers are left, even right, z on the midline."""
    if name[-1].isdigit():
        k = len(name.rstrip("0123456789"))
        n = int(name[k:])
        return name[:k] + str(n + 1 if n % 2 else n - 1)
    return name


@pytest.fixture(scope="module")
def demo_graph() -> SensorGraph:
    return neighbours_from_positions(DEMO32, standard_positions(DEMO32))


# --- standard positions -------------------------------------------------------------------------

def _arc_degrees(a, b) -> float:
    return float(np.degrees(np.arccos(np.clip(np.dot(a, b), -1.0, 1.0))))


def test_midline_electrodes_at_18_degree_steps_of_the_nasion_inion_arc():
    # 10-20 proportional definition (Jasper 1958, from memory): Fpz at 10 % of the nasion-inion
    # arc, then 20 % steps to Fz, Cz, Pz and Oz (at 90 %): 18, 54, 90, 126, 162 degrees on a
    # sphere whose nasion is +y and inion -y.
    nasion, inion = np.array([0.0, 1.0, 0.0]), np.array([0.0, -1.0, 0.0])
    for name, degrees in [("Fpz", 18), ("Fz", 54), ("Cz", 90), ("Pz", 126), ("Oz", 162)]:
        p = standard_position(name)
        assert np.linalg.norm(p) == pytest.approx(1.0, rel=1e-12)
        assert p[0] == pytest.approx(0.0, abs=1e-12)  # on the midline
        # 1e-9 degrees: exact construction, only rounding of sin/cos/arccos.
        assert _arc_degrees(p, nasion) == pytest.approx(degrees, abs=1e-9)
        assert _arc_degrees(p, inion) == pytest.approx(180 - degrees, abs=1e-9)


def test_coronal_electrodes_at_18_degree_steps_of_the_preauricular_arc():
    # Same definition along the left-right arc through Cz: T7 (old T3) at 10 % from the left
    # preauricular point, C3 at 30 %, Cz 50 %, C4 70 %, T8 90 % (Jasper 1958, from memory).
    left = np.array([-1.0, 0.0, 0.0])
    for name, degrees in [("T7", 18), ("C3", 54), ("Cz", 90), ("C4", 126), ("T8", 162)]:
        p = standard_position(name)
        assert p[1] == pytest.approx(0.0, abs=1e-12)
        assert _arc_degrees(p, left) == pytest.approx(degrees, abs=1e-9)
    assert np.array_equal(standard_position("T3"), standard_position("T7"))


# --- pruned triangulation of the demo cap------------------------------------------------------

def test_demo_triangulation_connected_with_2_to_8_neighbours(demo_graph):
    g = demo_graph
    n_comp, _ = connected_components(g.adjacency(), directed=False)
    assert n_comp == 1
    k = g.n_neighbours()
    assert list(k.index) == DEMO32
    assert k.between(2, 8).all(), k[~k.between(2, 8)]
    assert g.isolated == ()
    assert g.method.startswith("pruned-triangulation of ")


def test_demo_triangulation_follows_the_layout(demo_graph):
    g = demo_graph
    # Facts of the 10-10 layout geometry (common practice for neighbour definitions): Cz's
    # nearest sites in this montage are FC1, FC2, CP1, CP2 (about 20 degrees away) and C3, C4 lie
    # next to it on the coronal line; sites on opposite sides of the head are never neighbours.
    assert {"FC1", "FC2", "CP1", "CP2", "C3", "C4"} <= set(g.neighbours("Cz"))
    assert "Cz" in g.neighbours("C3")
    assert set(g.neighbours("Fz")) >= {"F3", "F4"}
    assert set(g.neighbours("Pz")) >= {"P3", "P4"}
    for a, b in [("Fp1", "O1"), ("Fp2", "O2"), ("T7", "T8"), ("Fz", "Pz"), ("F7", "F8"),
                 ("P7", "P8"), ("Fp1", "Cz"), ("C3", "C4")]:
        assert b not in g.neighbours(a), (a, b)


def test_demo_triangulation_is_symmetric(demo_graph):
    a = demo_graph.adjacency()
    assert a.dtype == bool and a.shape == (32, 32)
    assert (a != a.T).nnz == 0
    assert a.diagonal().sum() == 0
    # The 10-10 layout is left-right symmetric, and the graph must be too (this needs the
    # handling of cocircular sensors: Fp1, Fp2, AF3, AF4 form a symmetric trapezoid).
    edges = _edge_names(demo_graph)
    assert {frozenset(map(_mirror, e)) for e in edges} == edges


def test_triangulation_does_not_depend_on_channel_order_units_or_origin(demo_graph):
    rng = np.random.default_rng(7)
    order = rng.permutation(32)
    names = [DEMO32[i] for i in order]
    # Millimetres on a 92 mm head with the origin 40 mm below the head's centre.
    pos = standard_positions(names) * 92.0 + np.array([1.5, -3.0, 40.0])
    g = neighbours_from_positions(names, pos)
    assert _edge_names(g) == _edge_names(demo_graph)


def test_flat_grid_is_triangulated_into_its_four_neighbour_grid():
    # A 4 x 5 grid in a plane: every cell is a square with cocircular corners, so neither
    # diagonal is a neighbour pair; what remains is the grid graph with 4*4 + 3*5 = 31 edges.
    rows, cols = 4, 5
    yy, xx = np.meshgrid(np.arange(rows), np.arange(cols), indexing="ij")
    pos = np.column_stack([xx.ravel(), yy.ravel(), np.zeros(rows * cols)]) * 0.03
    names = [f"E{r}{c}" for r in range(rows) for c in range(cols)]
    g = neighbours_from_positions(names, pos)
    expected = {frozenset((f"E{r}{c}", f"E{r}{c + 1}")) for r in range(rows) for c in range(cols - 1)}
    expected |= {frozenset((f"E{r}{c}", f"E{r + 1}{c}")) for r in range(rows - 1) for c in range(cols)}
    assert _edge_names(g) == expected


def test_long_rim_edges_are_dropped():
    # The midline from Fpz to Oz is an arc; its triangulation's hull closes it with the chord
    # Fpz-Oz (144 degrees, 6 times the 36-degree spacing), which must go: a chain remains.
    midline = ["Fpz", "Fz", "Cz", "Pz", "Oz"]
    g = neighbours_from_positions(midline, standard_positions(midline))
    assert _edge_names(g) == {frozenset(p) for p in zip(midline[:-1], midline[1:])}
    assert "1 long edge dropped" in g.method
    # A U-shaped montage (the demo cap without its frontal and midline sites): the hull joins
    # F7-F8 and FC5-FC6 across the empty front of the head; they are not neighbours.
    gone = {"Fp1", "Fp2", "AF3", "AF4", "F3", "Fz", "F4", "FC1", "FC2", "Cz", "CP1", "CP2", "Pz"}
    u = [c for c in DEMO32 if c not in gone]
    g = neighbours_from_positions(u, standard_positions(u))
    assert "F8" not in g.neighbours("F7") and "FC6" not in g.neighbours("FC5")
    assert "2 long edges dropped" in g.method
    assert connected_components(g.adjacency(), directed=False)[0] == 1
    assert LONG_EDGE_FACTOR == 2.5


def test_jittered_cap_stays_connected():
    rng = np.random.default_rng(3)
    for _ in range(5):
        pos = standard_positions(DEMO32) + rng.normal(0.0, 0.01, (32, 3))
        g = neighbours_from_positions(DEMO32, pos)
        assert connected_components(g.adjacency(), directed=False)[0] == 1
        assert g.n_neighbours().between(2, 8).all()


@pytest.mark.parametrize("n", [1, 2, 3])
def test_few_sensors(n):
    names = ["Fz", "C3", "C4"][:n]
    g = neighbours_from_positions(names, standard_positions(names))
    assert g.n_edges == {1: 0, 2: 1, 3: 3}[n]
    assert g.isolated == (("Fz",) if n == 1 else ())


# --- radius method -----------------------------------------------------------------------------

def test_radius_method_is_monotone_in_max_distance():
    pos = standard_positions(DEMO32)
    previous: set = set()
    counts = []
    for d in [0.1, 0.8, 1.0, 1.2, 1.5, 2.0, 3.0, 100.0]:
        g = neighbours_from_positions(DEMO32, pos, method="radius", max_distance=d)
        edges = _edge_names(g)
        assert previous <= edges
        previous = edges
        counts.append(g.n_edges)
        assert g.method.startswith(f"radius of {d:g} x the median nearest-neighbour spacing")
    assert counts[0] == 0 and counts[-1] == 32 * 31 // 2
    assert counts == sorted(counts)
    assert neighbours_from_positions(DEMO32, pos, method="radius", max_distance=0.1).isolated \
        == tuple(DEMO32)


def test_radius_method_default_and_units():
    pos = standard_positions(DEMO32)
    default = neighbours_from_positions(DEMO32, pos, method="radius")
    explicit = neighbours_from_positions(DEMO32, pos * 90.0 + 5.0, method="radius",
                                         max_distance=1.5)
    # Relative to the median nearest-neighbour distance: units and origin do not matter.
    assert _edge_names(default) == _edge_names(explicit)


def test_bad_method_and_max_distance():
    pos = standard_positions(DEMO32)
    with pytest.raises(GlmeegError, match="neighbour method must be one of"):
        neighbours_from_positions(DEMO32, pos, method="nearest")
    with pytest.raises(GlmeegError, match="max_distance applies to method='radius' only"):
        neighbours_from_positions(DEMO32, pos, max_distance=2.0)
    with pytest.raises(GlmeegError, match="max_distance applies to method='radius' only"):
        neighbours_from_positions(DEMO32, pos, method="pruned-triangulation", max_distance=2.0)
    for bad in (0.0, -1.0, float("nan"), "2"):
        with pytest.raises(GlmeegError, match="max_distance must be a positive number"):
            neighbours_from_positions(DEMO32, pos, method="radius", max_distance=bad)
    for bad in (None, 1, "Triangulation", "pruned triangulation"):
        with pytest.raises(GlmeegError, match="one of pruned-triangulation, radius"):
            neighbours_from_positions(DEMO32, pos, method=bad)


@pytest.mark.parametrize("old, new", [("triangulation", "pruned-triangulation"), ("distance", "radius")])
def test_method_names_of_glmeeg_0_1_still_work_with_a_deprecation_warning(old, new):
    import warnings

    pos = standard_positions(DEMO32)
    extra = {"max_distance": 1.2} if new == "radius" else {}
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the current name warns about nothing
        current = neighbours_from_positions(DEMO32, pos, method=new, **extra)
        via_names = sensor_graph(pd.DataFrame({"name": DEMO32}), method=new, **extra)
    message = f"neighbour method '{old}' is now called '{new}'"
    with pytest.warns(DeprecationWarning, match=message) as caught:
        deprecated = neighbours_from_positions(DEMO32, pos, method=old, **extra)
    # One warning, attributed to the caller (this file), so Python shows it to API users.
    assert len(caught) == 1 and caught[0].filename == __file__
    assert deprecated == current                 # the same edges and the same description
    with pytest.warns(DeprecationWarning, match=message) as caught:
        deprecated = sensor_graph(pd.DataFrame({"name": DEMO32}), method=old, **extra)
    assert len(caught) == 1 and caught[0].filename == __file__
    assert deprecated == via_names and deprecated.method.startswith(f"{new} of ")


# --- bad positions -------------------------------------------------------------------------------

def test_bad_positions():
    names = ["A", "B", "C", "D"]
    pos = np.array([[0.0, 0.0, 1.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(StudyError, match=r"^channels.tsv: channels A and D have the same position"):
        neighbours_from_positions(names, pos, label="channels.tsv")
    pos[3] = [np.nan, 0.0, 0.0]
    with pytest.raises(StudyError, match=r"no finite x, y, z position for channel\(s\) D"):
        neighbours_from_positions(names, pos)
    with pytest.raises(StudyError, match=r"expected \(4, 3\)"):
        neighbours_from_positions(names, pos[:, :2])
    with pytest.raises(StudyError, match="channel A is listed more than once"):
        neighbours_from_positions(["A", "A", "B", "C"], np.eye(4, 3))


# --- neighbour tables -------------------------------------------------------------------------

def test_table_round_trip(demo_graph, tmp_path):
    table = demo_graph.to_frame()
    assert list(table.columns) == ["channel", "neighbour"]
    assert len(table) == 2 * demo_graph.n_edges  # both directions
    g = neighbours_from_table(DEMO32, table, label="neighbours.csv")
    assert np.array_equal(g.edges, demo_graph.edges)
    assert g.method == "neighbour table neighbours.csv"
    # Through a file, as the study reader sees it.
    path = tmp_path / "neighbours.csv"
    table.to_csv(path, index=False)
    g2 = neighbours_from_table(DEMO32, read_neighbour_table(path, label="neighbours.csv"),
                               label="neighbours.csv")
    assert g2 == g


def test_table_symmetrised_duplicates_and_self_pairs():
    channels = ["Fz", "Cz", "Pz", "Oz"]
    table = pd.DataFrame({"channel": ["Cz", "Fz", "Pz", "Cz", " Pz ", "Cz"],
                          "neighbour": ["Fz", "Cz", "Cz", "Cz", "Cz", "Pz"]})
    g = neighbours_from_table(channels, table, label="nb.csv")
    assert g.edges.tolist() == [[0, 1], [1, 2]]
    assert g.isolated == ("Oz",)
    assert g.neighbours("Cz") == ("Fz", "Pz")


def test_table_unknown_name():
    table = pd.DataFrame({"channel": ["Cz", "Cz"], "neighbour": ["Fz", "cpz"]})
    with pytest.raises(StudyError) as err:
        neighbours_from_table(["Fz", "Cz", "CPz"], table, label="neighbours.csv")
    msg = str(err.value)
    assert msg.startswith("neighbours.csv row 3: neighbour 'cpz' is not a channel of the sensors table")
    assert "did you mean CPz?" in msg and "\n" not in msg


def test_table_missing_column_and_empty_name():
    with pytest.raises(StudyError, match=r"^nb.csv: no column 'neighbour'"):
        neighbours_from_table(["Cz"], pd.DataFrame({"channel": ["Cz"], "nb": ["Cz"]}), label="nb.csv")
    with pytest.raises(StudyError, match=r"^nb.csv row 2: empty channel name"):
        neighbours_from_table(["Cz"], pd.DataFrame({"channel": [None], "neighbour": ["Cz"]}),
                              label="nb.csv")


def test_read_neighbour_table(tmp_path):
    path = tmp_path / "nb.csv"
    path.write_text("channel,neighbour\n1,2\n2,3\n")
    table = read_neighbour_table(path, label="nb.csv")
    assert table["channel"].tolist() == ["1", "2"]  # names stay text
    g = neighbours_from_table(["1", "2", "3"], table, label="nb.csv")
    assert g.edges.tolist() == [[0, 1], [1, 2]]
    path.write_text("channel;neighbour\n1;2\n")
    with pytest.raises(StudyError, match="^nb.csv: the header is separated by semicolons"):
        read_neighbour_table(path, label="nb.csv")
    path.write_text("channel,other\n1,2\n")
    with pytest.raises(StudyError, match="^nb.csv: no column 'neighbour'"):
        read_neighbour_table(path, label="nb.csv")
    with pytest.raises(StudyError, match="file not found"):
        read_neighbour_table(tmp_path / "missing.csv", label="missing.csv")


# --- sensor_graph: choosing the source ------------------------------------------------------------

def test_sensor_graph_uses_10_10_positions_without_xyz(demo_graph):
    g = sensor_graph(pd.DataFrame({"name": DEMO32}), sensors_label="channels.tsv")
    assert "standard 10-10 positions" in g.method and "channels.tsv has no x, y, z" in g.method
    assert np.array_equal(g.edges, demo_graph.edges)


def test_sensor_graph_uses_xyz_when_complete():
    pos = standard_positions(DEMO32) * 0.09
    sensors = pd.DataFrame({"name": [f"E{i}" for i in range(32)],
                            "x": pos[:, 0], "y": pos[:, 1], "z": pos[:, 2]})
    g = sensor_graph(sensors, sensors_label="channels.tsv")
    assert g.method.startswith("pruned-triangulation of x, y, z of channels.tsv")
    assert connected_components(g.adjacency(), directed=False)[0] == 1
    g = sensor_graph(sensors, method="radius", max_distance=1.5)
    assert g.method == ("radius of 1.5 x the median nearest-neighbour spacing of x, y, z of "
                        "sensors table")


def test_sensor_graph_missing_positions():
    sensors = pd.DataFrame({"name": ["Cz", "E1", "E2"], "x": [0.0, 1.0, np.nan],
                            "y": [0.0, 0.0, 1.0], "z": [1.0, 0.0, 0.0]})
    with pytest.raises(StudyError) as err:
        sensor_graph(sensors, sensors_label="channels.tsv")
    msg = str(err.value)
    assert msg.startswith("channels.tsv: no position for channel(s) E2;")  # NaN counts as missing
    assert "x, y, z" in msg and "neighbour file" in msg and "10-10" in msg
    with pytest.raises(StudyError, match=r"no position for channel\(s\) E1, E2;"):
        sensor_graph(sensors[["name"]], sensors_label="channels.tsv")


def test_sensor_graph_incomplete_xyz_with_10_10_names_falls_back():
    sensors = pd.DataFrame({"name": ["Fz", "Cz", "Pz", "C3"], "x": [0.0, 0.0, np.nan, -0.7],
                            "y": [0.6, 0.0, -0.6, 0.0], "z": [0.8, 1.0, 0.8, 0.7]})
    g = sensor_graph(sensors, sensors_label="channels.tsv")
    assert "standard 10-10 positions" in g.method and "lacks x, y, z for some channels" in g.method


def test_sensor_graph_prefers_the_neighbour_table():
    table = pd.DataFrame({"channel": ["Fz"], "neighbour": ["Pz"]})
    g = sensor_graph(pd.DataFrame({"name": ["Fz", "Cz", "Pz"]}), neighbour_table=table,
                     neighbour_label="neighbours.csv")
    assert g.method == "neighbour table neighbours.csv"
    assert g.edges.tolist() == [[0, 2]] and g.isolated == ("Cz",)
    with pytest.raises(StudyError, match="no column 'name'"):
        sensor_graph(pd.DataFrame({"label": ["Fz"]}))


# --- the SensorGraph object ----------------------------------------------------------------

def test_sensor_graph_object(demo_graph):
    g = demo_graph
    assert g.edges.dtype == np.int64 and g.edges.shape == (g.n_edges, 2)
    assert np.all(g.edges[:, 0] < g.edges[:, 1])
    with pytest.raises(ValueError):
        g.edges[0, 0] = 5  # read-only
    with pytest.raises(dataclasses.FrozenInstanceError):
        g.method = "x"  # type: ignore[misc]
    a = g.adjacency()
    assert isinstance(a, sp.csr_matrix) and a.nnz == 2 * g.n_edges
    assert g.n_neighbours().sum() == 2 * g.n_edges
    frame = g.to_frame()
    assert frame[frame["channel"] == "Cz"]["neighbour"].tolist() == list(g.neighbours("Cz"))
    text = str(g).splitlines()
    assert len(text) == 1 + 32 and text[0].startswith("Sensor neighbours: 32 channels")
    cz = next(line for line in text if line.split()[0] == "Cz")
    assert cz.split(None, 1)[1] == ", ".join(g.neighbours("Cz"))
    assert "32 channels" in repr(g)
    with pytest.raises(KeyError):
        g.neighbours("Xx")


def test_sensor_graph_validates_edges():
    with pytest.raises(ValueError, match="i < j"):
        SensorGraph(channels=("a", "b"), edges=np.array([[1, 0]]), method="m")
    with pytest.raises(ValueError, match="sorted and unique"):
        SensorGraph(channels=("a", "b", "c"), edges=np.array([[1, 2], [0, 1]]), method="m")
    with pytest.raises(ValueError, match="0..1"):
        SensorGraph(channels=("a", "b"), edges=np.array([[0, 2]]), method="m")
    g = SensorGraph(channels=("a", "b", "c"), edges=np.empty((0, 2)), method="none")
    assert g.isolated == ("a", "b", "c") and str(g).splitlines()[1].strip() == "a  (no neighbours)"
    assert g.to_frame().shape == (0, 2)
