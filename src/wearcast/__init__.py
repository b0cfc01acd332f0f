"""wearcast: which units of a fleet to look at before they fail.

Reads a monthly asset-register and work-order export, builds a validated
life table (suspensions, delayed entry, repeated lives, time-varying
covariates), fits survival models and ranks in-service units by their
probability of failure within a planning horizon.
"""

from wearcast.lifetable import LifeTable, check_life_table

__version__ = "0.1.0"

CAUTION = (
    "wearcast outputs are statistical estimates from past records. They support, "
    "and never replace, inspections, manufacturer instructions, local codes and "
    "licensed engineering judgement."
)

__all__ = ["LifeTable", "check_life_table", "CAUTION", "__version__"]
