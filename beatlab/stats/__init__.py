"""Statistics across recordings: group comparisons, dose-response fits, plate QC."""

from beatlab.stats.dose_response import (
    DoseResponseFit,
    dose_response_table,
    fit_dose_response,
    logistic4,
)
from beatlab.stats.groups import compare_groups, hedges_g, mannwhitney_min_p, one_way_anova
from beatlab.stats.multiple import adjust_pvalues
from beatlab.stats.qc import binomial_ci, incidence_table, plate_z_prime, z_prime

__all__ = [
    "DoseResponseFit",
    "adjust_pvalues",
    "binomial_ci",
    "compare_groups",
    "dose_response_table",
    "fit_dose_response",
    "hedges_g",
    "incidence_table",
    "logistic4",
    "mannwhitney_min_p",
    "one_way_anova",
    "plate_z_prime",
    "z_prime",
]
