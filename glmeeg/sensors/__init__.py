"""Sensors: positions from channel names, and the neighbour graph of the sensors."""

from .neighbours import (DEFAULT_DISTANCE, LONG_EDGE_FACTOR, SensorGraph, neighbours_from_positions,
                         neighbours_from_table, sensor_graph)
from .positions import standard_position, standard_positions

__all__ = ["standard_position", "standard_positions", "SensorGraph", "neighbours_from_positions",
           "neighbours_from_table", "sensor_graph", "LONG_EDGE_FACTOR", "DEFAULT_DISTANCE"]
