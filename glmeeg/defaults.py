"""Every default of glmeeg's methods, defined once.

The functions, the design file, the command line's help, the report and the methods paragraph
read these values from here when a setting is not given, at the time they run, so that a default
changed here is the default everywhere and is reported as what was done.

References
----------
.. [1] Holland, P. W., & Welsch, R. E. (1977). Robust regression using iteratively reweighted
   least-squares. Communications in Statistics - Theory and Methods, 6(9), 813-827 (tuning
   constants with 95 % efficiency at the normal distribution).
.. [2] Wilcox, R. R. (2017). Introduction to Robust Estimation and Hypothesis Testing (4th ed.),
   Academic Press (20 % trimming).
.. [3] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement. NeuroImage,
   44(1), 83-98 (E = 0.5, H = 2).
"""

from __future__ import annotations

__all__ = ["ALPHA", "CONFIDENCE_LEVEL", "PERMUTATIONS", "TFCE_EXTENT_EXPONENT",
           "TFCE_HEIGHT_EXPONENT", "TRIM", "ROBUST_TUNING", "ROBUST_SCALE_CONSTANT",
           "ROBUST_MAX_ITERATIONS", "ROBUST_TOLERANCE", "ROBUST_CONVERGENCE", "SIMULATIONS",
           "SIMULATED_PERMUTATIONS"]

# Significance level of one test and level of the effect-size intervals.
ALPHA = 0.05
CONFIDENCE_LEVEL = 0.95

# Resamplings of the max-statistic, cluster and TFCE corrections.
PERMUTATIONS = 5000
# Exponents of threshold-free cluster enhancement: extent E and height H [3]_.
TFCE_EXTENT_EXPONENT = 0.5
TFCE_HEIGHT_EXPONENT = 2.0

# Share trimmed from each tail by the trimmed-mean group tests [2]_.
TRIM = 0.2

# Robust subject fits: tuning constants in units of the robust scale [1]_, the divisor of the
# median absolute residual (the normal distribution's 3/4 quantile, so MAD / constant estimates
# sigma at the normal), the step cap, the tolerance and the stopping rule.
ROBUST_TUNING = {"huber": 1.345, "bisquare": 4.685}
ROBUST_SCALE_CONSTANT = 0.6744897501960817
ROBUST_MAX_ITERATIONS = 50
ROBUST_TOLERANCE = 1e-8
ROBUST_CONVERGENCE = "standardized-residuals"

# Simulated power: studies per sample size, and resamplings per simulated study.
SIMULATIONS = 200
SIMULATED_PERMUTATIONS = 500
