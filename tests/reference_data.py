"""Published data sets used as outside references for the mixed model.

Every constant names its source. The raw numbers were entered from memory of the
published tables; each set is checked in the tests against summary values that the
source reports (and that also follow from the raw numbers by hand), so a typing error
would show.
"""

from __future__ import annotations

# Rail data: travel time (ms, minus 36 100) of an ultrasonic wave along six railway rails,
# three measurements per rail. Pinheiro, J. C., & Bates, D. M. (2000). Mixed-Effects
# Models in S and S-PLUS. Springer, §1.1 (data set "Rail"; values from memory).
# Published REML fit (values from memory): σ_rail = 24.805, σ = 4.0208, intercept 66.5
# with standard error 10.17.
RAIL_TRAVEL = (
    (55.0, 53.0, 54.0),
    (26.0, 37.0, 32.0),
    (78.0, 91.0, 85.0),
    (92.0, 100.0, 96.0),
    (49.0, 51.0, 50.0),
    (80.0, 85.0, 83.0),
)
RAIL_SD_RAIL = 24.805
RAIL_SD_RESIDUAL = 4.0208
RAIL_INTERCEPT = 66.5
RAIL_INTERCEPT_SE = 10.17

# Dyestuff data: yield (grams of standard colour) of dyestuff from six batches (A–F) of
# an intermediate product, five preparations each. Davies, O. L. (1947). Statistical
# Methods in Research and Production. Oliver & Boyd; analysed by REML in standard
# mixed-model texts (values from memory).
# REML fit (values from memory): batch variance 1764.0, residual variance 2451.3,
# intercept 1527.5. The standard error of the intercept under REML is
# √(MS_between / 30) = 19.38; the value 17.69 sometimes quoted belongs to the
# maximum-likelihood fit (batch variance 1388.3), not to REML.
DYESTUFF_YIELD = (
    (1545.0, 1440.0, 1440.0, 1520.0, 1580.0),  # A
    (1540.0, 1555.0, 1490.0, 1560.0, 1495.0),  # B
    (1595.0, 1550.0, 1605.0, 1510.0, 1560.0),  # C
    (1445.0, 1440.0, 1595.0, 1465.0, 1545.0),  # D
    (1595.0, 1630.0, 1515.0, 1635.0, 1625.0),  # E
    (1520.0, 1455.0, 1450.0, 1480.0, 1445.0),  # F
)
DYESTUFF_VAR_BATCH = 1764.0
DYESTUFF_VAR_RESIDUAL = 2451.3
DYESTUFF_INTERCEPT = 1527.5
DYESTUFF_INTERCEPT_SE_REML = 19.38

# BCG vaccine trials: 2×2 counts of 13 trials (tuberculosis cases / non-cases among
# vaccinated and unvaccinated). Colditz, G. A., et al. (1994). Efficacy of BCG vaccine in
# the prevention of tuberculosis. JAMA 271:698–702 (counts from memory, as distributed
# with the meta-analysis example of Viechtbauer 2010).
# Columns: vaccinated cases, vaccinated non-cases, control cases, control non-cases.
BCG_COUNTS = (
    (4, 119, 11, 128),  # Aronson 1948
    (6, 300, 29, 274),  # Ferguson & Simes 1949
    (3, 228, 11, 209),  # Rosenthal et al 1960
    (62, 13536, 248, 12619),  # Hart & Sutherland 1977
    (33, 5036, 47, 5761),  # Frimodt-Moller et al 1973
    (180, 1361, 372, 1079),  # Stein & Aronson 1953
    (8, 2537, 10, 619),  # Vandiviere et al 1973
    (505, 87886, 499, 87892),  # TPT Madras 1980
    (29, 7470, 45, 7232),  # Coetzee & Berjak 1968
    (17, 1699, 65, 1600),  # Rosenthal et al 1961
    (186, 50448, 141, 27197),  # Comstock et al 1974
    (5, 2493, 3, 2338),  # Comstock & Webster 1969
    (27, 16886, 29, 17825),  # Comstock et al 1976
)
# Random-effects model of the log risk ratio fitted by REML. Viechtbauer, W. (2010).
# Conducting meta-analyses in R with the metafor package. Journal of Statistical
# Software 36(3):1–48 (values from memory): τ² = 0.3132, μ = −0.7145, SE(μ) = 0.1798.
BCG_TAU2 = 0.3132
BCG_MU = -0.7145
BCG_MU_SE = 0.1798


def bcg_log_risk_ratio() -> tuple[list[float], list[float]]:
    """Log risk ratio and its large-sample sampling variance for each BCG trial.

    ``log RR = log(a/(a+b)) − log(c/(c+d))`` and
    ``var = 1/a − 1/(a+b) + 1/c − 1/(c+d)`` (the usual delta-method variance; common
    practice).
    """
    import math

    effects, variances = [], []
    for a, b, c, d in BCG_COUNTS:
        effects.append(math.log(a / (a + b)) - math.log(c / (c + d)))
        variances.append(1 / a - 1 / (a + b) + 1 / c - 1 / (c + d))
    return effects, variances
