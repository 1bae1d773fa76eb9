"""Inference over many points: parametric and permutation-based multiple-comparison corrections."""

from .corrections import (TFCE, Bonferroni, ClusterMass, Correction, FalseDiscoveryRate, Holm,
                          MaxStatistic, NoCorrection, adjust_p, correction_from_name)

__all__ = ["Bonferroni", "ClusterMass", "Correction", "FalseDiscoveryRate", "Holm", "MaxStatistic",
           "NoCorrection", "TFCE", "adjust_p", "correction_from_name"]
