"""Inference over many points: multiple-comparison corrections (permutation methods slot in here)."""

from .corrections import (Bonferroni, Correction, FalseDiscoveryRate, Holm, NoCorrection,
                          adjust_p, correction_from_name)

__all__ = ["Bonferroni", "Correction", "FalseDiscoveryRate", "Holm", "NoCorrection", "adjust_p",
           "correction_from_name"]
