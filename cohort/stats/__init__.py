"""Statistics of Dromos: tidy estimators with published method names.

Survival and competing-risks estimators are exported here. Descriptive modules
(proportions, rates, standardize, trend, table_one, quality) are imported from their own
modules, e.g. ``from cohort.stats.rates import ...``.
"""

from cohort.stats.aalen_johansen import AalenJohansen
from cohort.stats.absolute_risk import AbsoluteRisk, landmark
from cohort.stats.cox import CoxPH, split_counting_process
from cohort.stats.fine_gray import FineGray
from cohort.stats.kaplan_meier import KaplanMeier
from cohort.stats.multistate import MultiState
from cohort.stats.splines import harrell_knots, hr_curve, rcs_basis, rcs_columns
from cohort.stats.turnbull import Turnbull

__all__ = [
    "AalenJohansen",
    "AbsoluteRisk",
    "CoxPH",
    "FineGray",
    "KaplanMeier",
    "MultiState",
    "Turnbull",
    "harrell_knots",
    "hr_curve",
    "landmark",
    "rcs_basis",
    "rcs_columns",
    "split_counting_process",
]
