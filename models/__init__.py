"""Models: counts to posterior.

The full hierarchical model (PyMC NUTS) and a quick mode (exact normal-normal
pooling of stratified estimates), with convergence checks as structured data.
"""

import importlib

#: Each public name and the module it lives in: imported on first use (PEP 562), so that
#: ``liftpool.models.settings`` (the command line's choices and defaults) loads without PyMC.
_WHERE = {
    "CampaignFlags": "liftpool.models.design",
    "Check": "liftpool.models.diagnostics",
    "Design": "liftpool.models.design",
    "Diagnostics": "liftpool.models.diagnostics",
    "FitError": "liftpool.models.errors",
    "FitResult": "liftpool.models.fit",
    "ModelSettings": "liftpool.models.settings",
    "NEW_CAMPAIGN": "liftpool.models.summary",
    "NotConvergedError": "liftpool.models.errors",
    "PORTFOLIO": "liftpool.models.summary",
    "Plan": "liftpool.models.planning",
    "PlanInputs": "liftpool.models.planning",
    "PoolingPosterior": "liftpool.models.pooling",
    "PoolingPrior": "liftpool.models.pooling",
    "SUMMARY_COLUMNS": "liftpool.models.summary",
    "add_money": "liftpool.models.estimands",
    "check_convergence": "liftpool.models.diagnostics",
    "estimand_draws": "liftpool.models.estimands",
    "fit_counts": "liftpool.models.fit",
    "load_fit": "liftpool.models.fit",
    "make_design": "liftpool.models.design",
    "mantel_haenszel": "liftpool.models.quick",
    "plan": "liftpool.models.planning",
    "plan_inputs_from_fit": "liftpool.models.planning",
    "pool": "liftpool.models.pooling",
    "simulate_plan": "liftpool.models.planning",
    "stratified_estimates": "liftpool.models.quick",
    "summarize": "liftpool.models.estimands",
}


def __getattr__(name: str):
    if name in _WHERE:
        value = getattr(importlib.import_module(_WHERE[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'liftpool.models' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)


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
    "add_money",
    "check_convergence",
    "estimand_draws",
    "fit_counts",
    "load_fit",
    "make_design",
    "mantel_haenszel",
    "plan",
    "plan_inputs_from_fit",
    "pool",
    "simulate_plan",
    "stratified_estimates",
    "summarize",
]
