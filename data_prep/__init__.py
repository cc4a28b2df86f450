"""Data preparation: impression and conversion logs to seen/unseen counts.

Only the counts table (and its prep summary) leaves this layer; no user
identifier does.
"""

from liftpool.data_prep.counts import (
    ARMS,
    COUNTS_COLUMNS,
    ROLES,
    PrepSummary,
    read_counts,
    to_dataset,
    validate_counts,
)
from liftpool.data_prep.errors import BadRow, ConfigError, InputError, LiftpoolError
from liftpool.data_prep.prepare import ENGINES, PrepResult, prepare_counts
from liftpool.data_prep.rules import BUILTIN_COVARIATES, FREQUENCY, VIEW_HISTORY, CountingRules
from liftpool.data_prep.simulate import FERNHOLLOW, simulate, write_scenario
from liftpool.data_prep.viewability import classify

__all__ = [
    "ARMS",
    "BUILTIN_COVARIATES",
    "COUNTS_COLUMNS",
    "ENGINES",
    "FERNHOLLOW",
    "FREQUENCY",
    "ROLES",
    "VIEW_HISTORY",
    "BadRow",
    "ConfigError",
    "CountingRules",
    "InputError",
    "LiftpoolError",
    "PrepResult",
    "PrepSummary",
    "classify",
    "prepare_counts",
    "read_counts",
    "simulate",
    "to_dataset",
    "validate_counts",
    "write_scenario",
]
