"""Series of maps along a stack dim (temperature, excitation power): per-pixel laws.

Layer 3 (beside fitting/): works on result maps, imports only layers 0–2.
"""

from ._fit import (
    LAW_TITLES,
    POWER_CLASS_CAVEAT,
    POWER_CLASS_LEGEND,
    STATUS_FLAG_MEANINGS,
    STATUS_FLAG_VALUES,
    STATUS_LEGEND,
    evaluate_law,
    fit_law,
)
from ._laws import K_B_EV, LAWS

__all__ = ["fit_law", "LAW_TITLES", "evaluate_law", "STATUS_FLAG_VALUES", "STATUS_FLAG_MEANINGS", "LAWS", "K_B_EV", "STATUS_LEGEND", "POWER_CLASS_LEGEND",
           "POWER_CLASS_CAVEAT"]
