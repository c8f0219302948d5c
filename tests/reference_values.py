"""Reference numbers from outside the project, each with its source and tolerance.

Kept in one place (in the manner of statsmodels' ``results_*.py`` modules) so that every test
compares against a value somebody else published, never against our own earlier output.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Reference:
    value: float
    rtol: float
    atol: float
    source: str


# --- Engel food-expenditure data, foodexp ~ 1 + income (235 Belgian working-class households) --
#
# Data: Engel's budget data as used by Koenker and Bassett (1982), shipped with statsmodels as
# statsmodels.api.datasets.engel.
#
# The quantile-regression solver is iterative and published figures are rounded. Tolerance for
# a figure printed with 4 decimals: rtol=1e-4 (solver precision) plus atol=5e-5 (half a unit
# in the last printed digit, the rounding).

_KH2001 = (
    "Koenker & Hallock (2001), Quantile Regression, J. Economic Perspectives 15(4), "
    "Engel-curve quantile table, as replicated in the statsmodels documentation's quantile "
    "regression example (foodexp ~ income)"
)
_STATA = (
    "Stata qreg on the Engel data, reference results kept in statsmodels' own test suite "
    "(statsmodels/regression/tests/results/results_quantile_regression.py)"
)

ROUNDED_4 = {"rtol": 1e-4, "atol": 5e-5}

ENGEL_QUANTREG = {
    # tau: (intercept, slope)
    0.5: (Reference(81.4823, source=_KH2001, **ROUNDED_4), Reference(0.5602, source=_KH2001, **ROUNDED_4)),
    0.95: (Reference(64.1040, source=_KH2001, **ROUNDED_4), Reference(0.7091, source=_KH2001, **ROUNDED_4)),
    0.75: (Reference(62.3965, source=_STATA, **ROUNDED_4), Reference(0.6440, source=_STATA, **ROUNDED_4)),
}

# Stata prints more digits than the published table; its reference file holds
#   q=0.5 : _cons 81.48233, income .5601805  (table of 'biweight_bofinger' and others)
#   q=0.75: _cons 62.39648, income .6440143  ('epanechnikov_hsheather_q75')
# Tolerance: rtol=1e-5 (iterative solver; Stata's own stopping rule differs from ours) plus
# half a unit of the last printed digit.
ENGEL_STATA_FULL = {
    0.5: (Reference(81.48233, rtol=1e-5, atol=5e-6, source=_STATA),
          Reference(0.5601805, rtol=1e-5, atol=5e-8, source=_STATA)),
    0.75: (Reference(62.39648, rtol=1e-5, atol=5e-6, source=_STATA),
           Reference(0.6440143, rtol=1e-5, atol=5e-8, source=_STATA)),
}

# Koenker-Machado pseudo-R1 = 1 - V(fit)/V(intercept only), V the summed check loss
# (Koenker & Machado 1999, JASA 94:1296-1310). Stata's qreg reports it as 'Pseudo R2'
# (e(psrsquared)); printed with 4 decimals, hence the rounding tolerance.
ENGEL_PSEUDO_R1 = {
    0.5: Reference(0.6206, source=_STATA + ", psrsquared at q=.5", **ROUNDED_4),
    0.75: Reference(0.6966, source=_STATA + ", psrsquared at q=.75", **ROUNDED_4),
}

# Stata's e(sum_adev): the weighted sum of absolute deviations of the fit, with weights 2*tau
# above and 2*(1-tau) below, i.e. twice the summed check loss (the factor 2 is Stata's
# convention, from memory; it cancels in the pseudo-R). Printed with many digits.
ENGEL_SUM_ADEV = {
    0.5: Reference(17559.93220318131, rtol=1e-6, atol=0.0, source=_STATA + ", sum_adev at q=.5"),
    0.75: Reference(13058.50008841318, rtol=1e-6, atol=0.0, source=_STATA + ", sum_adev at q=.75"),
}
ENGEL_N = 235  # Source: Koenker & Bassett (1982); statsmodels' engel dataset description


# --- Deriving factors from climate-model output (ceiling.derive) --------------------------------

# Month lengths of the CF calendars. Source: CF Conventions 1.10, section 4.4.1 "Calendar":
# noleap/365_day = Gregorian common year in every year; all_leap/366_day = Gregorian leap year in
# every year; 360_day = twelve months of 30 days; standard = Julian before 1582-10-15, Gregorian
# after (1900 is a common year, 2000 a leap year); julian = a leap year every 4 years (1900 too).
CF_MONTH_DAYS = {
    ("noleap", 2001): (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("noleap", 2000): (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("360_day", 2000): (30,) * 12,
    ("all_leap", 2001): (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("standard", 2000): (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("standard", 1900): (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("proleptic_gregorian", 1900): (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
    ("julian", 1900): (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31),
}

# Extraterrestrial radiation Ra (MJ m-2 day-1). Source: Allen, Pereira, Raes & Smith (1998), FAO
# Irrigation and Drainage Paper 56, chapter 3: Example 8 (20 deg S, 3 September, J = 246: Ra =
# 32.2) and Example 10 (22 deg 54' S, 15 May, J = 135: Ra = 25.1). The figures are printed to 0.1;
# the climate-index library's declination and eccentricity approximations differ from FAO-56's
# Eqs. 23-24 by up to about 0.6% of Ra: rtol 1%.
FAO56_RA = {
    "example_8": Reference(32.2, rtol=0.01, atol=0.05, source="FAO-56 Example 8: lat -20, J 246"),
    "example_10": Reference(25.1, rtol=0.01, atol=0.05, source="FAO-56 Example 10: lat -22.9, J 135"),
}
