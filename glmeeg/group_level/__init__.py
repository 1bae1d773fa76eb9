"""Group level: the subjects' contrast estimates tested at every point.

Entrance: :func:`group_statistics` (the one place that chooses between the group methods).

``glm`` (the group GLM: t, F and Hotelling statistics), ``robust`` (trimmed means, Yuen and
Welch), ``effect_sizes`` (standardised effects and their intervals), ``bootstrap`` (intervals
of the group estimate) and ``assumptions`` (residual checks).
"""

from .glm import (GroupStatistics, group_arrays, group_test, group_test_in_chunks, hedges_factor,
                  p_values, unusable_variance)
from .robust import GROUP_METHODS, group_layout, trimmed_test, welch_test, winsorized_normal_sd
from .statistics import group_statistics

__all__ = ["group_statistics", "GroupStatistics", "group_arrays", "group_test", "group_test_in_chunks", "p_values",
           "unusable_variance", "hedges_factor", "GROUP_METHODS", "group_layout", "trimmed_test",
           "welch_test", "winsorized_normal_sd"]
