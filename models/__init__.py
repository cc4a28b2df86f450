"""Models: counts to posterior.

The full hierarchical model (PyMC NUTS) and a quick mode (exact normal-normal
pooling of stratified estimates), with convergence checks as structured data.
"""

from liftpool.models.design import CampaignFlags, Design, make_design
from liftpool.models.diagnostics import Check, Diagnostics, check_convergence
from liftpool.models.errors import FitError, NotConvergedError
from liftpool.models.fit import FitResult, fit_counts, load_fit
from liftpool.models.planning import Plan, PlanInputs, plan, plan_inputs_from_fit, simulate_plan
from liftpool.models.pooling import PoolingPosterior, PoolingPrior, pool
from liftpool.models.quick import mantel_haenszel, stratified_estimates
from liftpool.models.settings import ModelSettings
from liftpool.models.summary import NEW_CAMPAIGN, PORTFOLIO, SUMMARY_COLUMNS

__all__ = [
    "NEW_CAMPAIGN",
    "PORTFOLIO",
    "SUMMARY_COLUMNS",
    "CampaignFlags",
    "Check",
    "Design",
    "Diagnostics",
    "FitError",
    "FitResult",
    "ModelSettings",
    "NotConvergedError",
    "Plan",
    "PlanInputs",
    "PoolingPosterior",
    "PoolingPrior",
    "check_convergence",
    "fit_counts",
    "load_fit",
    "make_design",
    "mantel_haenszel",
    "plan",
    "plan_inputs_from_fit",
    "pool",
    "simulate_plan",
    "stratified_estimates",
]
