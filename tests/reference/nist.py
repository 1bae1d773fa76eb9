"""NIST Statistical Reference Datasets (StRD), linear least-squares regression: certified values.

Source: National Institute of Standards and Technology, Statistical Reference Datasets, Linear
Least Squares Regression, https://www.itl.nist.gov/div898/strd/lls/lls.shtml (datasets
``Longley`` and ``Wampler1``). Certified values were computed by NIST in 500-digit arithmetic and
are given to 15 significant digits.

The Longley certified values below are from memory; they agree digit for digit with the copy of
the NIST certified values that statsmodels keeps in its regression test results
(``statsmodels/regression/tests/results/results_regression.py``, class ``Longley``), which is
where they were checked. The Longley data themselves are not repeated here: they ship with
``statsmodels.datasets.longley`` (TOTEMP on GNPDEFL, GNP, UNEMP, ARMED, POP, YEAR).

Longley, J. W. (1967). An appraisal of least squares programs for the electronic computer from
the point of view of the user. Journal of the American Statistical Association, 62(319), 819-841.

Wampler, R. H. (1970). A report on the accuracy of some widely used least squares computer
programs. Journal of the American Statistical Association, 65(330), 549-565.
"""

# Longley: y = B0 + B1*GNPDEFL + B2*GNP + B3*UNEMP + B4*ARMED + B5*POP + B6*YEAR, 16 rows.
LONGLEY_PARAMETER_NAMES = ("const", "GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR")
LONGLEY_COEFFICIENTS = (
    -3482258.63459582,       # B0 (intercept)
    15.0618722713733,        # B1 GNPDEFL
    -0.358191792925910E-01,  # B2 GNP
    -2.02022980381683,       # B3 UNEMP
    -1.03322686717359,       # B4 ARMED
    -0.511041056535807E-01,  # B5 POP
    1829.15146461355,        # B6 YEAR
)
LONGLEY_STANDARD_ERRORS = (
    890420.383607373,
    84.9149257747669,
    0.334910077722432E-01,
    0.488399681651699,
    0.214274163161675,
    0.226073200069370,
    455.478499142212,
)
LONGLEY_RESIDUAL_SD = 304.854073561965
LONGLEY_R_SQUARED = 0.995479004577296
LONGLEY_DF_RESID = 9

# Wampler1 (from memory): x = 0, 1, ..., 20 and y = 1 + x + x^2 + x^3 + x^4 + x^5 exactly;
# model y = B0 + B1 x + ... + B5 x^5. Every certified coefficient is 1, every certified
# standard deviation is 0, the residual standard deviation is 0 and R^2 is 1.
WAMPLER1_X = tuple(range(21))
WAMPLER1_Y = (
    1, 6, 63, 364, 1365, 3906, 9331, 19608, 37449, 66430, 111111, 177156, 271453, 402234,
    579195, 813616, 1118481, 1508598, 2000719, 2613660, 3368421,
)
WAMPLER1_DEGREE = 5
WAMPLER1_COEFFICIENTS = (1.0, 1.0, 1.0, 1.0, 1.0, 1.0)
WAMPLER1_STANDARD_ERRORS = (0.0, 0.0, 0.0, 0.0, 0.0, 0.0)
WAMPLER1_RESIDUAL_SD = 0.0
