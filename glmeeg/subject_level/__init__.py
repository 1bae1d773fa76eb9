"""Subject level: the single-trial model fitted at every point of one participant.

Entrances: :func:`fit_ols` (least squares, one QR per design) and :func:`fit_robust`
(M-estimation by iteratively reweighted least squares). ``jobs`` turns a subject of a study into
one fit (the unit of work of every backend), ``cache`` stores and verifies finished fits.
"""

from .ols import BLOCK_POINTS, OLSFit, fit_ols, small_product, unusable_variance
from .robust import CONVERGENCE_RULES, NORMS, RobustFit, fit_robust

__all__ = ["OLSFit", "fit_ols", "small_product", "unusable_variance", "BLOCK_POINTS",
           "RobustFit", "fit_robust", "NORMS", "CONVERGENCE_RULES"]
