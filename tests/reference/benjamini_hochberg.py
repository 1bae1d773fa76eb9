"""The worked example of Benjamini & Hochberg (1995), section 4.

Benjamini, Y., & Hochberg, Y. (1995). Controlling the false discovery rate: a practical and
powerful approach to multiple testing. Journal of the Royal Statistical Society B, 57(1),
289-300.

Fifteen p-values from a clinical trial, in increasing order. At level 0.05 the paper reports
(from memory) that Bonferroni rejects 3 hypotheses, Holm's step-down procedure 3 and the
false discovery rate procedure 4 (those with the four smallest p-values). The values below are
from memory, not read from a copy of the paper.
"""

P_VALUES = (
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262,
    0.5719, 0.6528, 0.7590, 1.000,
)
ALPHA = 0.05
REJECTED_BONFERRONI = 3
REJECTED_HOLM = 3
REJECTED_FDR = 4
